"""Metrics and logs of `stockrelay serve --processes 2` as deployed: with PROMETHEUS_MULTIPROC_DIR
set, every scrape reports the recommendations of both API processes, whichever process answers
it; with STOCKRELAY_LOG_FORMAT=json each line our code logs is one JSON object carrying the
request id the client sent. Metrics are parsed with prometheus-client's own text parser."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import httpx2
from prometheus_client.parser import text_string_to_metric_families

from service.db.keys import get_or_create_tenant
from service.db.networks import create_network
from service.db.session import make_engine, make_session_factory
from service.settings import Settings
from service.worker import Worker
from solver import NetworkSpec
from tests.e2e.live import (
    START_DEADLINE,
    Live,
    api_key,
    demo_document,
    environment,
    migrate,
)

MIN_RECOMMENDATIONS = 12
MAX_RECOMMENDATIONS = 200
# uvicorn's line when a process has started the app (JSON, through our handler).
STARTED = '"message": "Application startup complete."'
N_SCRAPES = 6
STOCK = {"riverside": 13, "hilltop": 1}


def solved_demo(url: str) -> int:
    """The demo network of tenant "default", solved in this process; its id."""
    engine = make_engine(url)
    try:
        sessions = make_session_factory(engine)
        with sessions.begin() as session:
            tenant = get_or_create_tenant(session, "default")
            spec = NetworkSpec.model_validate(demo_document())
            network, _version, _jobs = create_network(session, tenant, spec, ["discounted"])
            network_id = network.id
        Worker(Settings(database_url=url), sessions, "e2e").run(until_idle=True)
        return network_id
    finally:
        engine.dispose()


def samples(text: str) -> dict[tuple[str, frozenset[tuple[str, str]]], float]:
    return {
        (sample.name, frozenset(sample.labels.items())): sample.value
        for family in text_string_to_metric_families(text)
        for sample in family.samples
    }


def test_two_api_processes_report_together_and_log_json(tmp_path: Path, live: Live) -> None:
    url = f"sqlite:///{tmp_path / 'stockrelay.db'}"
    migrate(url)
    network_id = solved_demo(url)
    key = api_key(url)
    shared = tmp_path / "prometheus"
    shared.mkdir()
    env: dict[str, Any] = {
        **environment(url, log_format="json", log_level="INFO"),
        "PROMETHEUS_MULTIPROC_DIR": str(shared),
    }
    base, server = live.serve(env, workers=2)

    def both_started() -> bool:
        started = [line for line in server.output().splitlines() if STARTED in line]
        return len(started) >= 2

    live.wait_for(both_started, deadline=START_DEADLINE, what="both API processes")

    auth = {"authorization": f"Bearer {key}"}
    sent = 0
    # A connection per request: the two processes share the listening socket, and each new
    # connection goes to whichever accepts it first. Until both have answered (each process
    # keeps its own files in the shared folder), within a bound.
    while sent < MIN_RECOMMENDATIONS or (
        len(list(shared.glob("histogram_*.db"))) < 2 and sent < MAX_RECOMMENDATIONS
    ):
        response = httpx2.post(
            f"{base}/v1/networks/{network_id}/recommendation",
            json={"stock": STOCK},
            headers={**auth, "X-Request-ID": f"e2e-{sent}"},
            timeout=10,
        )
        assert response.status_code == 200, response.text
        sent += 1

    for _ in range(N_SCRAPES):
        scraped = httpx2.get(base + "/metrics", timeout=10)
        assert scraped.status_code == 200
        values = samples(scraped.text)
        single = frozenset({("endpoint", "single")})
        assert values[("stockrelay_recommendation_seconds_count", single)] == sent
        lookups = sum(
            values.get(("stockrelay_policy_cache_lookups_total", frozenset({("result", r)})), 0)
            for r in ("hit", "miss")
        )
        assert lookups == sent
        done = frozenset({("kind", "solve"), ("outcome", "done")})
        assert values[("stockrelay_jobs_total", done)] == 1
    assert len(list(shared.glob("histogram_*.db"))) >= 2, "both processes answered"

    live.stop_all()
    lines = [json.loads(line) for line in server.output().splitlines() if line.startswith("{")]
    audited = {line["request_id"] for line in lines if line["logger"] == "stockrelay.audit"}
    assert audited == {f"e2e-{n}" for n in range(sent)}
    for line in lines:
        assert {"time", "level", "logger", "message"} <= line.keys()
    # uvicorn's access lines go through the same JSON handler once the app has started.
    assert any(line["logger"] == "uvicorn.access" for line in lines)
