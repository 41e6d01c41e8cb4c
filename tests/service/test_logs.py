"""Structured logs: one JSON object per line, carrying the id of the request being handled (the
X-Request-ID the client sent), on the event loop and in the thread pool alike; the audit lines
keep their JSON message."""

from __future__ import annotations

import io
import json
import logging
import sys
from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy import Engine

from service.logs import JsonFormatter, TextFormatter, configure_server_logging
from service.settings import Settings
from tests.service.api_support import create_network, open_client, run_worker, sqlite_only

STOCK = {"riverside": 13, "hilltop": 1}
probe = logging.getLogger("tests.service.test_logs")


@pytest.fixture
def json_lines() -> Iterator[io.StringIO]:
    """Every record at INFO and above, written by JsonFormatter into the returned buffer."""
    buffer = io.StringIO()
    handler = logging.StreamHandler(buffer)
    handler.setFormatter(JsonFormatter())
    root = logging.getLogger()
    level = root.level
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    try:
        yield buffer
    finally:
        root.removeHandler(handler)
        root.setLevel(level)


def lines(buffer: io.StringIO) -> list[dict[str, Any]]:
    """Each line parsed on its own: every line must be one whole JSON object."""
    parsed = [json.loads(line) for line in buffer.getvalue().splitlines()]
    assert all(isinstance(line, dict) for line in parsed)
    return parsed


def test_a_record_becomes_one_json_object_with_its_extra_fields() -> None:
    record = logging.LogRecord(
        "stockrelay.example", logging.WARNING, __file__, 1, "job %d: %s", (7, "slow"), None
    )
    record.job_id = 7
    record.detail = {"attempts": 2}
    try:
        raise RuntimeError("boom\nsecond line")
    except RuntimeError:
        record.exc_info = sys.exc_info()
    text = JsonFormatter().format(record)
    assert "\n" not in text
    line = json.loads(text)
    assert line["level"] == "WARNING"
    assert line["logger"] == "stockrelay.example"
    assert line["message"] == "job 7: slow"
    assert line["job_id"] == 7
    assert line["detail"] == {"attempts": 2}
    assert "RuntimeError: boom" in line["exception"]
    assert "request_id" not in line, "no request is being handled"
    # ISO 8601 in UTC, to the millisecond.
    assert line["time"].endswith("Z") and len(line["time"]) == len("2026-12-02T01:54:20.911Z")


@sqlite_only
def test_lines_logged_while_handling_a_request_carry_its_id(
    engine: Engine, json_lines: io.StringIO
) -> None:
    with open_client(engine) as client:
        network_id = create_network(client)["id"]
        run_worker(engine)
        json_lines.truncate(0)
        json_lines.seek(0)
        response = client.post(
            f"/v1/networks/{network_id}/recommendation",
            json={"stock": STOCK},
            headers={"X-Request-ID": "till-12-closing"},
        )
        assert response.status_code == 200
        probe.info("after the request")
    [audit] = [line for line in lines(json_lines) if line["logger"] == "stockrelay.audit"]
    assert audit["request_id"] == "till-12-closing"
    assert audit["level"] == "INFO"
    # The audit message is still the JSON document it always was.
    assert json.loads(audit["message"])["request_id"] == "till-12-closing"
    [after] = [line for line in lines(json_lines) if line["message"] == "after the request"]
    assert "request_id" not in after


@sqlite_only
def test_the_request_id_reaches_code_run_in_the_thread_pool(
    engine: Engine, json_lines: io.StringIO
) -> None:
    with open_client(engine) as client:

        def handler() -> dict[str, str]:  # a plain def: FastAPI runs it in the thread pool
            probe.warning("inside the handler", extra={"stage": "probe"})
            return {}

        client.app.add_api_route("/probe", handler)  # type: ignore[attr-defined]
        assert client.get("/probe", headers={"X-Request-ID": "probe-1"}).status_code == 200
        assert client.get("/probe", headers={"X-Request-ID": "probe-2"}).status_code == 200
    probed = [line for line in lines(json_lines) if line["message"] == "inside the handler"]
    assert [(line["request_id"], line["stage"]) for line in probed] == [
        ("probe-1", "probe"),
        ("probe-2", "probe"),
    ]


def test_text_lines_name_the_request_when_there_is_one() -> None:
    record = logging.LogRecord("stockrelay.x", logging.ERROR, __file__, 1, "failed", None, None)
    assert TextFormatter().format(record) == "ERROR stockrelay.x: failed"
    record.request_id = "r-1"
    assert TextFormatter().format(record) == "ERROR stockrelay.x [r-1]: failed"


def test_settings_choose_the_format_and_level_in_any_case() -> None:
    settings = Settings(log_format="JSON", log_level="info")
    assert (settings.log_format, settings.log_level) == ("json", "INFO")
    with pytest.raises(ValueError, match="log_format"):
        Settings(log_format="xml")


def test_server_start_leaves_a_logging_set_up_it_did_not_make_alone() -> None:
    """Under a test runner (or any embedding program) the root logger already has handlers:
    the API must not replace them."""
    root = logging.getLogger()
    before = list(root.handlers)
    assert before, "pytest installs its capturing handlers on the root logger"
    configure_server_logging(Settings(log_format="json"))
    assert root.handlers == before
