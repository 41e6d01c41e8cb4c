"""GET /status over HTTP: a browser is challenged for the key (HTTP Basic), the page shows the
caller's networks, solve states, queue and jobs and the chosen network's heatmap, and every piece
of stored text is escaped. Pages are read with the standard library's HTML parser."""

from __future__ import annotations

import base64
import re
from datetime import UTC, date, datetime, timedelta
from html.parser import HTMLParser
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, select, update

import service.serving
from service.db.session import make_session_factory
from service.db.tables import SolveJob
from service.serving import today_in
from service.status_page import CAUTION, age, sparkline
from service.vocabulary import JobState
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    make_key,
    open_client,
    run_worker,
)

HOSTILE_NAME = '<script>alert("x")</script> & <b>Tools</b>'


class Page(HTMLParser):
    """The rows of each table by its class (cell texts, whitespace collapsed), every start tag,
    and the text of the page."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: dict[str, list[list[str]]] = {}
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self._table: str | None = None
        self._row: list[str] | None = None
        self._cell: list[str] | None = None
        self._in_body = False
        self.feed(text)
        self.close()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        if tag == "table":
            self._table = dict(attrs).get("class") or ""
            self.tables[self._table] = []
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
        elif tag == "tbody":
            self._in_body = True

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._row is not None and self._cell is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and self._row is not None and self._table is not None:
            if self._in_body:
                self.tables[self._table].append(self._row)
            self._row = None
        elif tag == "tbody":
            self._in_body = False
        elif tag == "table":
            self._table = None

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)

    def has(self, tag: str, **attrs: str) -> bool:
        return any(t == tag and all(a.get(k) == v for k, v in attrs.items()) for t, a in self.tags)


def basic(key: str, user: str = "ops") -> dict[str, str]:
    token = base64.b64encode(f"{user}:{key}".encode()).decode()
    return {"Authorization": f"Basic {token}"}


def page(client: TestClient, key: str, **params: Any) -> Page:
    response = client.get("/status", headers=basic(key), params=params)
    assert response.status_code == 200, response.text
    assert response.headers["content-type"] == "text/html; charset=utf-8"
    return Page(response.text)


def test_without_a_key_a_browser_is_asked_for_one(engine: Engine) -> None:
    with open_client(engine) as client:
        for headers in (
            {"Authorization": ""},
            basic("sr_not_a_real_key"),
            {"Authorization": "Basic not-base64!"},
            {"Authorization": "Basic " + base64.b64encode(b"no colon").decode()},
        ):
            response = client.get("/status", headers=headers)
            assert_problem(response, 401, "unauthorized")
            assert response.headers["WWW-Authenticate"].startswith('Basic realm="stockrelay"')


def test_the_key_is_accepted_as_basic_password_or_bearer_with_read_scope(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        assert client.get("/status", headers=basic(key, user="")).status_code == 200
        assert client.get("/status", headers=basic(key, user="anyone")).status_code == 200
        bearer = client.get("/status", headers={"Authorization": f"Bearer {key}"})
        assert bearer.status_code == 200
        assert "default-src 'none'" in bearer.headers["Content-Security-Policy"]
        assert bearer.headers["Cache-Control"] == "no-store"


def test_networks_states_queue_and_jobs_are_shown(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        first = create_network(client, demo_document(criteria=["discounted", "average"]))["id"]
        empty = page(client, key)
        [row] = empty.tables["networks"]
        assert row[:3] == [str(first), demo_document()["name"], "1"]
        assert row[3].startswith("queued job") and row[4].startswith("queued job")
        assert [r[4] for r in empty.tables["queue"]] == ["queued", "queued"]
        assert not empty.has("svg"), "no policy yet, no heatmap"

        # One failure with a message, to be shown beside the job.
        with make_session_factory(engine).begin() as session:
            session.execute(
                update(SolveJob)
                .where(SolveJob.criterion == "average")
                .values(state="failed", error="solver refused: <too big> & slow")
            )
        run_worker(engine)
        second = create_network(client, demo_document(name="Garden hoses"))["id"]
        shown = page(client, key)
    networks = {int(r[0]): r for r in shown.tables["networks"]}
    assert networks[first][3].startswith("ready solved")
    assert networks[first][4].startswith("failed")
    assert "solver refused: <too big> & slow" in networks[first][4]
    assert networks[second][:3] == [str(second), "Garden hoses", "1"]
    assert networks[second][3].startswith("queued job")
    assert networks[second][4] == "not requested"
    [queued] = shown.tables["queue"]
    assert queued[1:5] == ["Garden hoses v1", "solve", "discounted", "queued"]
    recent = {int(r[0]): r for r in shown.tables["recent"]}
    assert [r[4] for r in recent.values()] == ["queued", "failed", "done"]
    assert recent[2][8] == "solver refused: <too big> & slow"
    assert recent[1][6].endswith(" s"), "a done job shows its solve time"
    # The first network is pictured by default, the one chosen otherwise.
    assert shown.has("svg", **{"class": "heatmap"})
    assert f"Policy of {demo_document()['name']}" in "".join(shown.text)


def test_another_network_can_be_chosen_but_not_another_tenants(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        create_network(client)
        chosen = create_network(client, demo_document(name="Paint mixers"))["id"]
        run_worker(engine)
        shown = page(client, key, network=chosen)
        assert "Policy of Paint mixers" in "".join(shown.text)
        assert shown.has("tr", **{"class": "chosen", "data-network": str(chosen)})

        stranger = make_key(engine, tenant="someone else", scope="read")
        theirs = page(client, stranger)
        assert theirs.tables == {}, "another tenant sees no networks and no jobs"
        response = client.get("/status", headers=basic(stranger), params={"network": chosen})
        assert_problem(response, 404, "not-found")


def test_stored_text_is_escaped(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        create_network(client, demo_document(name=HOSTILE_NAME))
        run_worker(engine)
        response = client.get("/status", headers=basic(key))
    assert response.status_code == 200
    assert "<script" not in response.text
    assert "<b>Tools" not in response.text
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &lt;b&gt;Tools" in response.text
    shown = Page(response.text)
    # No tag came from the name, the heatmap's SVG (which draws the name as its title) included.
    assert not shown.has("script")
    [row] = shown.tables["networks"]
    assert row[1] == HOSTILE_NAME, "shown to the reader exactly as it was named"


@pytest.mark.parametrize(
    ("seconds", "text"),
    [
        (0, "0 s"),
        (59.9, "59 s"),
        (60, "1 min"),
        (3_599, "59 min"),
        (3_660, "1 h 1 min"),
        (90_000, "1 d 1 h"),
    ],
)
def test_ages_read_naturally(seconds: float, text: str) -> None:
    assert age(seconds) == text


def test_simulations_wait_in_the_queue_without_changing_the_solve_state(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        create_network(client)
        with make_session_factory(engine).begin() as session:
            solve = session.scalars(select(SolveJob)).one()
            solve.state, solve.error = JobState.FAILED, "no luck"
            session.add(
                SolveJob(
                    tenant_id=solve.tenant_id,
                    version_id=solve.version_id,
                    spec_hash=solve.spec_hash,
                    criterion="discounted",
                    kind="simulate",
                    state="queued",
                    attempts=0,
                )
            )
            solve_id = solve.id
        shown = page(client, key)
    [network] = shown.tables["networks"]
    assert network[3] == f"failed job {solve_id} no luck", "the solve's state, not the simulation's"
    [queued] = shown.tables["queue"]
    assert queued[2:5] == ["simulation", "discounted", "queued"]


def test_tonights_closing_counts_show_who_has_reported(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        document = demo_document(timezone="Pacific/Auckland")
        network = create_network(client, document)["id"]
        tonight = today_in("Pacific/Auckland").isoformat()
        before = page(client, key)
        [row] = before.tables["closing"]
        assert row == [document["name"], tonight, "0 of 2", "none yet", "riverside, hilltop"]

        url = f"/v1/networks/{network}/locations/hilltop/closing-stock"
        sent = client.put(url, json={"business_date": tonight, "units": 4})
        assert sent.status_code == 200, sent.text
        # A count for the night before is not tonight's.
        yesterday = (date.fromisoformat(tonight) - timedelta(days=1)).isoformat()
        earlier = client.put(
            f"/v1/networks/{network}/locations/riverside/closing-stock",
            json={"business_date": yesterday, "units": 1},
        )
        assert earlier.status_code == 200, earlier.text
        [row] = page(client, key).tables["closing"]
        assert row == [document["name"], tonight, "1 of 2", "hilltop", "riverside"]


def test_before_the_closing_cutoff_tonight_is_still_the_previous_business_date(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    day = datetime.now(UTC).date()
    yesterday = (day - timedelta(days=1)).isoformat()
    # 02:30 UTC, before a 04:00 cut-off: the stores are still closing yesterday.
    moment = datetime(day.year, day.month, day.day, 2, 30, tzinfo=UTC)
    monkeypatch.setattr(service.serving, "utc_now", lambda: moment)
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        document = demo_document(timezone="UTC", closing_cutoff="04:00")
        network = create_network(client, document)["id"]
        sent = client.put(
            f"/v1/networks/{network}/locations/hilltop/closing-stock", json={"units": 4}
        )
        assert sent.json()["business_date"] == yesterday
        [row] = page(client, key).tables["closing"]
        assert row == [document["name"], yesterday, "1 of 2", "hilltop", "riverside"]


def test_solve_times_are_drawn_per_network(engine: Engine) -> None:
    with open_client(engine) as client:
        key = make_key(engine, scope="read")
        assert "No finished solves yet." in "".join(page(client, key).text)
        network = create_network(client, demo_document(criteria=["discounted", "average"]))["id"]
        run_worker(engine)
        shown = page(client, key)
    with make_session_factory(engine)() as session:
        seconds = sorted(
            job.solve_seconds
            for job in session.scalars(select(SolveJob))
            if job.solve_seconds is not None
        )
    [row] = shown.tables["solve-times"]
    assert row[0] == demo_document()["name"]
    assert row[2] == "2"
    assert row[5] == f"{max(seconds):.3f} s"
    assert shown.has("svg", **{"class": "spark"})
    assert shown.has("tr", **{"data-network": str(network)})


def test_a_sparkline_spans_zero_to_the_largest_value() -> None:
    svg = sparkline([0.0, 2.0, 1.0], width=100, height=20)
    [points] = re.findall(r'points="([^"]*)"', svg)
    xs, ys = zip(*(map(float, point.split(",")) for point in points.split()), strict=True)
    assert xs == (0.0, 50.0, 100.0)
    # SVG y grows downward: zero on the bottom margin, the largest value on the top one.
    assert ys == (18.0, 2.0, 10.0)
    assert "<script" not in sparkline([1.0])


def test_the_cautions_are_on_the_page(engine: Engine) -> None:
    with open_client(engine) as client:
        shown = page(client, make_key(engine, scope="read"))
    assert CAUTION in " ".join("".join(shown.text).split())
    assert shown.has("p", **{"class": "caution"})
