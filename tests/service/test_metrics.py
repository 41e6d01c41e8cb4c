"""GET /metrics: the exposition parses with prometheus-client's own text parser, and every metric
moves with what happened: solves run by the worker, jobs failed and retried, the queue, the age of
the served policies, recommendations answered and policy cache lookups.

Request-side metrics are counted per process, and this process runs many apps: those checks
compare a scrape after with a scrape before."""

from __future__ import annotations

import os
import subprocess
import sys
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import Engine, select, update
from sqlalchemy.orm import Session, sessionmaker

import service.worker as worker_module
from service.db.base import utcnow
from service.db.session import make_engine, make_session_factory
from service.db.tables import Policy, SolveJob
from service.metrics import SOLVE_BUCKETS, DatabaseCollector, render_metrics, size_class
from solver import PolicyResult, solve_network
from tests.service.api_support import (
    create_network,
    database_url_of,
    demo_document,
    open_client,
    run_worker,
    sqlite_only,
)

ROOT = Path(__file__).resolve().parents[2]

Samples = dict[tuple[str, frozenset[tuple[str, str]]], float]

STOCK = {"riverside": 13, "hilltop": 1}


def parse(text: str) -> tuple[dict[str, str], Samples]:
    """(type by family name, value by (sample name, labels)), parsed with prometheus-client's
    own text parser, which raises on anything malformed."""
    types: dict[str, str] = {}
    samples: Samples = {}
    for family in text_string_to_metric_families(text):
        types[family.name] = family.type
        for sample in family.samples:
            key = (sample.name, frozenset(sample.labels.items()))
            assert key not in samples, f"sample {key} given twice"
            samples[key] = sample.value
    return types, samples


def scrape(client: TestClient) -> Samples:
    response = client.get("/metrics", headers={"Authorization": ""})
    assert response.status_code == 200, response.text
    assert response.headers["content-type"].startswith("text/plain; version=0.0.4")
    return parse(response.text)[1]


def value(samples: Samples, name: str, **labels: str) -> float:
    """A sample's value; 0 when the series is absent (a counter or histogram not yet touched)."""
    return samples.get((name, frozenset(labels.items())), 0.0)


def big_document(name: str) -> dict[str, Any]:
    """The demo network with room for 40 units at each store: 41 x 41 = 1,681 stock states."""
    document = demo_document(name=name)
    for location in document["locations"]:
        location["capacity"] = 40
    return document


def test_every_family_is_exposed_with_its_type_without_a_key(engine: Engine) -> None:
    with open_client(engine) as client:
        response = client.get("/metrics", headers={"Authorization": ""})
    assert response.status_code == 200
    types, samples = parse(response.text)
    assert types == {
        "stockrelay_recommendation_seconds": "histogram",
        "stockrelay_policy_cache_lookups": "counter",
        "stockrelay_database_up": "gauge",
        "stockrelay_jobs": "counter",
        "stockrelay_queue_depth": "gauge",
        "stockrelay_jobs_running": "gauge",
        "stockrelay_queue_oldest_age_seconds": "gauge",
        "stockrelay_solve_seconds": "histogram",
        "stockrelay_policy_age_seconds": "gauge",
        "stockrelay_priced_solve_iteration": "gauge",
        "stockrelay_priced_solve_upper_bound": "gauge",
        "stockrelay_priced_solve_lower_bound": "gauge",
        "stockrelay_priced_solve_elapsed_seconds": "gauge",
        "stockrelay_assortment_items": "gauge",
        "stockrelay_assortment_closing_locations": "gauge",
    }
    assert value(samples, "stockrelay_database_up") == 1
    # Every kind of job and outcome has its series from the start, at 0.
    for kind in ("solve", "simulate", "what_if", "calibrate"):
        for outcome in ("done", "failed", "retried"):
            labels = frozenset({("kind", kind), ("outcome", outcome)})
            assert samples[("stockrelay_jobs_total", labels)] == 0
        assert samples[("stockrelay_queue_depth", frozenset({("kind", kind)}))] == 0
    assert value(samples, "stockrelay_queue_oldest_age_seconds") == 0


def test_queue_gauges_follow_the_jobs(engine: Engine) -> None:
    with open_client(engine) as client:
        create_network(client, demo_document(criteria=["discounted", "average"]))
        queued = scrape(client)
        assert value(queued, "stockrelay_queue_depth", kind="solve") == 2
        assert value(queued, "stockrelay_jobs_running", kind="solve") == 0

        # The oldest queued job says how long the queue has waited, from its created_at.
        with make_session_factory(engine).begin() as session:
            session.execute(
                update(SolveJob)
                .where(SolveJob.criterion == "average")
                .values(created_at=utcnow() - timedelta(hours=2))
            )
        waited = value(scrape(client), "stockrelay_queue_oldest_age_seconds")
        assert 2 * 3600 <= waited < 3 * 3600

        run_worker(engine)
        drained = scrape(client)
        assert value(drained, "stockrelay_queue_depth", kind="solve") == 0
        assert value(drained, "stockrelay_queue_oldest_age_seconds") == 0


def test_solves_fill_the_histogram_by_size_class_and_criterion(engine: Engine) -> None:
    with open_client(engine) as client:
        create_network(client, demo_document(criteria=["discounted", "average"]))
        create_network(client, big_document("Forty a side"))
        assert run_worker(engine) == 3
        samples = scrape(client)
    # The demo network has 15 x 10 = 150 stock states, the other 41 x 41 = 1,681.
    for states, criterion in (("<1k", "discounted"), ("<1k", "average"), ("1k-100k", "discounted")):
        labels = {"states": states, "criterion": criterion, "method": "exact"}
        assert value(samples, "stockrelay_solve_seconds_count", **labels) == 1
        assert value(samples, "stockrelay_solve_seconds_bucket", le="+Inf", **labels) == 1
        assert value(samples, "stockrelay_solve_seconds_sum", **labels) > 0
        buckets = [
            value(samples, "stockrelay_solve_seconds_bucket", le=repr(bound), **labels)
            for bound in SOLVE_BUCKETS
        ]
        assert buckets == sorted(buckets), "buckets are cumulative"
    assert (
        value(
            samples,
            "stockrelay_solve_seconds_count",
            states="1k-100k",
            criterion="average",
            method="exact",
        )
        == 0
    )
    assert value(samples, "stockrelay_jobs_total", kind="solve", outcome="done") == 3


def test_solve_seconds_come_from_the_jobs_table(engine: Engine) -> None:
    """Each job lands in the buckets its stored solve_seconds belongs to."""
    with open_client(engine) as client:
        create_network(client)
        create_network(client, demo_document(name="Second pair", discount=0.9))
        assert run_worker(engine) == 2
        with make_session_factory(engine).begin() as session:
            first, second = session.scalars(select(SolveJob).order_by(SolveJob.id)).all()
            first.solve_seconds, second.solve_seconds = 0.02, 7.5
        samples = scrape(client)
    labels = {"states": "<1k", "criterion": "discounted", "method": "exact"}
    assert value(samples, "stockrelay_solve_seconds_sum", **labels) == pytest.approx(7.52)
    assert value(samples, "stockrelay_solve_seconds_bucket", le="0.01", **labels) == 0
    assert value(samples, "stockrelay_solve_seconds_bucket", le="0.025", **labels) == 1
    assert value(samples, "stockrelay_solve_seconds_bucket", le="5.0", **labels) == 1
    assert value(samples, "stockrelay_solve_seconds_bucket", le="10.0", **labels) == 2


def test_simulations_are_counted_by_kind_and_kept_out_of_the_solve_histogram(
    engine: Engine,
) -> None:
    with open_client(engine) as client:
        create_network(client)
        run_worker(engine)
        with make_session_factory(engine).begin() as session:
            solve = session.scalars(select(SolveJob)).one()
            for state in ("queued", "done"):
                session.add(
                    SolveJob(
                        tenant_id=solve.tenant_id,
                        version_id=solve.version_id,
                        spec_hash=solve.spec_hash,
                        criterion="discounted",
                        kind="simulate",
                        state=state,
                        attempts=1,
                        solve_seconds=42.0 if state == "done" else None,
                    )
                )
        samples = scrape(client)
    assert value(samples, "stockrelay_queue_depth", kind="simulate") == 1
    assert value(samples, "stockrelay_queue_depth", kind="solve") == 0
    assert value(samples, "stockrelay_jobs_total", kind="simulate", outcome="done") == 1
    assert value(samples, "stockrelay_jobs_total", kind="solve", outcome="done") == 1
    labels = {"states": "<1k", "criterion": "discounted", "method": "exact"}
    assert value(samples, "stockrelay_solve_seconds_count", **labels) == 1
    assert value(samples, "stockrelay_solve_seconds_sum", **labels) < 42.0


def test_failed_and_retried_jobs_are_counted(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    calls: list[int] = []

    def flaky(*args: Any, **kwargs: Any) -> PolicyResult:
        calls.append(1)
        if len(calls) == 1:
            raise RuntimeError("the machine hiccupped")
        return solve_network(*args, **kwargs)

    monkeypatch.setattr(worker_module, "solve_network", flaky)
    with open_client(engine) as client:
        create_network(client)
        # The first attempt fails unexpectedly and is retried; the second solves it.
        assert run_worker(engine) == 2
        create_network(client, big_document("Too large for this worker"))
        # A solver refusal fails at once, without a retry.
        assert run_worker(engine, max_states=1_000) == 1
        samples = scrape(client)
    assert value(samples, "stockrelay_jobs_total", kind="solve", outcome="done") == 1
    assert value(samples, "stockrelay_jobs_total", kind="solve", outcome="failed") == 1
    assert value(samples, "stockrelay_jobs_total", kind="solve", outcome="retried") == 1


def test_policy_age_is_that_of_the_current_versions_policy(engine: Engine) -> None:
    with open_client(engine) as client:
        network_id = create_network(client)["id"]
        labels = {"network_id": str(network_id), "criterion": "discounted"}
        assert ("stockrelay_policy_age_seconds", frozenset(labels.items())) not in scrape(client)

        run_worker(engine)
        with make_session_factory(engine).begin() as session:
            session.execute(update(Policy).values(solved_at=utcnow() - timedelta(minutes=30)))
        age = value(scrape(client), "stockrelay_policy_age_seconds", **labels)
        assert 30 * 60 <= age < 31 * 60

        # A new version waiting for its solve has no policy: the series goes away, although
        # recommendations are still served (stale) from version 1.
        changed = client.put(
            f"/v1/networks/{network_id}",
            json=demo_document(discount=0.95),
            headers={"If-Match": '"1"'},
        )
        assert changed.status_code == 200, changed.text
        unsolved = scrape(client)
        assert ("stockrelay_policy_age_seconds", frozenset(labels.items())) not in unsolved

        run_worker(engine)
        assert value(scrape(client), "stockrelay_policy_age_seconds", **labels) < 30 * 60


def test_recommendations_move_the_latency_histogram_and_cache_counters(engine: Engine) -> None:
    with open_client(engine) as client:
        network_id = create_network(client)["id"]
        run_worker(engine)
        before = scrape(client)
        for _ in range(3):
            response = client.post(
                f"/v1/networks/{network_id}/recommendation", json={"stock": STOCK}
            )
            assert response.status_code == 200, response.text
        batch = {"items": [{"network_id": network_id, "stock": STOCK}] * 2}
        assert client.post("/v1/recommendations/batch", json=batch).status_code == 200
        # Not answered: not counted as a recommendation (nor as a cache lookup: 404 first).
        assert (
            client.post("/v1/networks/999/recommendation", json={"stock": STOCK}).status_code == 404
        )
        after = scrape(client)

    def moved(name: str, **labels: str) -> float:
        return value(after, name, **labels) - value(before, name, **labels)

    assert moved("stockrelay_recommendation_seconds_count", endpoint="single") == 3
    assert moved("stockrelay_recommendation_seconds_bucket", endpoint="single", le="+Inf") == 3
    assert moved("stockrelay_recommendation_seconds_count", endpoint="batch") == 1
    assert moved("stockrelay_recommendation_seconds_sum", endpoint="single") > 0
    # Five policy loads on a fresh app: the first decodes the stored policy, the rest are hits.
    assert moved("stockrelay_policy_cache_lookups_total", result="miss") == 1
    assert moved("stockrelay_policy_cache_lookups_total", result="hit") == 4


@pytest.mark.parametrize(
    ("states", "label"),
    [(1, "<1k"), (999, "<1k"), (1_000, "1k-100k"), (99_999, "1k-100k"), (100_000, "100k+")],
)
def test_size_classes_have_stated_boundaries(states: int, label: str) -> None:
    assert size_class(states) == label


def test_a_database_that_fails_the_queries_reports_down(tmp_path: Path) -> None:
    """An empty database (no tables): the database metrics are missing and say why."""
    broken = make_engine(f"sqlite:///{tmp_path / 'empty.db'}")
    sessions = make_session_factory(broken)

    def factory() -> sessionmaker[Session]:
        return sessions

    try:
        types, samples = parse(render_metrics(factory).decode())
    finally:
        broken.dispose()
    assert value(samples, "stockrelay_database_up") == 0
    assert "stockrelay_jobs" not in types
    assert [m.name for m in DatabaseCollector(factory).collect()] == ["stockrelay_database_up"]


# Imports what an API process imports, and counts as one would.
_API_PROCESS = """
import sys, time
from service.metrics import MeteredPolicyCache, observe_recommendation
for _ in range(int(sys.argv[1])):
    observe_recommendation("single", time.perf_counter())
MeteredPolicyCache(1).get((1, "discounted"))
"""
_SCRAPE = """
import sys
from service.db.session import make_engine, make_session_factory
from service.metrics import render_metrics
sessions = make_session_factory(make_engine(sys.argv[1]))
sys.stdout.write(render_metrics(lambda: sessions).decode())
"""


@sqlite_only
def test_multiprocess_mode_sums_the_counts_of_every_process(engine: Engine, tmp_path: Path) -> None:
    """With PROMETHEUS_MULTIPROC_DIR set, a scrape from any process reports what all processes
    counted (prometheus-client's multiprocess mode), and the database metrics once."""
    shared = tmp_path / "prometheus"
    shared.mkdir()
    env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(shared)}

    def python(script: str, *args: str) -> str:
        done = subprocess.run(
            [sys.executable, "-c", script, *args],
            env=env,
            cwd=ROOT,
            capture_output=True,
            text=True,
            timeout=120,
            check=False,
        )
        assert done.returncode == 0, done.stderr
        return done.stdout

    python(_API_PROCESS, "2")
    python(_API_PROCESS, "3")
    types, samples = parse(python(_SCRAPE, database_url_of(engine)))
    assert value(samples, "stockrelay_recommendation_seconds_count", endpoint="single") == 5
    assert value(samples, "stockrelay_policy_cache_lookups_total", result="miss") == 2
    assert value(samples, "stockrelay_database_up") == 1
    assert types["stockrelay_jobs"] == "counter"
