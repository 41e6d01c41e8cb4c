"""Priced networks through the service: the solving mode on the API, the worker's priced solves
and their progress, the stored policy, recommendations with a certificate, closing
instructions, simulations, the export, pictures, metrics and the status page.

The outside facts checked: the Lagrangian relaxation's value is an upper bound on the optimal
value at every stock (Adelman & Mersereau, "Relaxations of weakly coupled stochastic dynamic
programs", Operations Research 56(3), 2008, section 3; from memory), so it can never lie below
the exact optimal value that Howard's policy iteration computes, and no policy's value can lie
above it."""

from __future__ import annotations

import io
import itertools
import json
import threading
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, select, update
from sqlalchemy.orm import Session, sessionmaker

from service import worker as worker_module
from service.cli import CAUTION, main
from service.codec import decode_policy, encode_policy
from service.db import networks as db_networks
from service.db.keys import get_or_create_tenant
from service.db.networks import canonical_spec
from service.db.tables import Network, NetworkVersion, Policy, SolveJob
from service.pictures import choose_plane, net_inflow_grid, value_grid
from service.priced import all_stocks, progress_printer
from solver import NetworkSpec, PolicyResult, build_transfer_model, solve_network
from solver.priced import solve_priced
from solver.priced_result import PricedPolicy, PricedProgress
from solver.simulation import do_nothing_policy, simulate_policies
from tests.service.api_support import (
    assert_problem,
    create_network,
    database_url_of,
    demo_document,
    open_client,
    run_worker,
    sqlite_only,
    stock_of,
)
from tests.service.test_api_calibration import simulated_rows, upload
from tests.service.test_metrics import scrape, value
from tests.service.test_repository import demo
from tests.service.test_rules_service import RULED, assert_within_rules, ruled_document
from tests.service.test_status_page import basic
from tests.service.test_worker import make_worker

DEMO_SPEC = NetworkSpec.model_validate(demo_document())
STOCKS = ([0, 0], [14, 0], [0, 9], [13, 1], [7, 4])


@pytest.fixture(scope="module")
def exact_demo() -> PolicyResult:
    return solve_network(DEMO_SPEC)


def scale(result: PolicyResult) -> float:
    return float(np.abs(result.values).max())


def priced_network(client: TestClient, engine: Engine, **changes: Any) -> int:
    """The demo network in priced mode, solved by the worker."""
    network_id: int = create_network(client, demo_document(mode="priced", **changes))["id"]
    assert run_worker(engine) == 1
    return network_id


def stored_priced(engine: Engine) -> PricedPolicy:
    with sessionmaker(engine)() as session:
        row = session.scalars(select(Policy).where(Policy.method == "priced")).one()
        policy = decode_policy(row.arrays, row.layout, row.checksum, row.meta)
    assert isinstance(policy, PricedPolicy)
    return policy


# -- modes -------------------------------------------------------------------------------------


def test_mode_round_trips_is_kept_on_put_and_a_change_queues_the_new_method(
    client: TestClient,
) -> None:
    plain = create_network(client, demo_document(name="Plain"))
    assert (plain["mode"], plain["method"]) == ("auto", "exact")  # the demo fits the limits

    created = create_network(client, demo_document(mode="priced"))
    assert (created["mode"], created["method"]) == ("priced", "priced")
    assert [(job["criterion"], job["method"]) for job in created["jobs"]] == [
        ("discounted", "priced")
    ]
    # The mode is not part of the specification's hash.
    assert created["spec_hash"] == canonical_spec(DEMO_SPEC)[1]
    path = f"/v1/networks/{created['id']}"

    kept = client.put(path, json=demo_document(discount=0.9), headers={"If-Match": '"1"'})
    assert kept.status_code == 200, kept.text
    assert (kept.json()["mode"], kept.json()["method"]) == ("priced", "priced")
    assert client.get(path).json()["mode"] == "priced"

    switched = client.put(
        path, json=demo_document(discount=0.9, mode="exact"), headers={"If-Match": '"2"'}
    ).json()
    assert (switched["mode"], switched["method"], switched["version"]) == ("exact", "exact", 3)
    assert switched["spec_hash"] == kept.json()["spec_hash"]
    assert [job["method"] for job in switched["jobs"]] == ["exact"]


@sqlite_only
def test_auto_mode_prices_a_network_beyond_the_exact_limits_which_exact_mode_refuses(
    engine: Engine,
) -> None:
    with open_client(engine, max_states=100) as client:
        created = create_network(client)  # 150 stock states
        assert (created["mode"], created["method"]) == ("auto", "priced")
        refused = client.post("/v1/networks", json=demo_document(name="Exact", mode="exact"))
        problem = assert_problem(refused, 422, "network-too-large")
        assert "mode 'priced'" in problem["detail"]


# -- solves, storage and recommendations ------------------------------------------------------


def test_worker_solves_a_priced_network_and_recommendations_carry_its_certificate(
    client: TestClient, engine: Engine, exact_demo: PolicyResult
) -> None:
    network_id = priced_network(client, engine)
    state = client.get(f"/v1/networks/{network_id}").json()
    assert state["solves"][0]["state"] == "ready"
    [job] = client.get("/v1/jobs").json()
    assert (job["method"], job["state"], job["residual"]) == ("priced", "done", None)
    assert job["progress"]["iteration"] >= 1  # the last progress is kept

    policy = stored_priced(engine)
    tolerance = 1e-9 * scale(exact_demo)
    for stock in STOCKS:
        response = client.post(
            f"/v1/networks/{network_id}/recommendation",
            json={"stock": stock_of(DEMO_SPEC, stock)},
        )
        assert response.status_code == 200, response.text
        body = response.json()
        assert (body["method"], body["residual"]) == ("priced", None)
        # Lagrangian bound >= optimal value (theorem; module docstring).
        optimal = float(exact_demo.values[0, exact_demo.state_index(stock)])
        assert body["upper_bound"] >= optimal - tolerance
        assert body["upper_bound"] == pytest.approx(policy.upper_bound(stock), rel=1e-12)
        flows = policy.plan(stock)
        moved = {(t["from"], t["to"]): t["units"] for t in body["transfers"]}
        ids = DEMO_SPEC.location_ids
        assert moved == {
            (ids[a], ids[b]): int(u) for (a, b), u in zip(policy.lanes, flows, strict=True) if u
        }
        certificate = body["certificate"]
        assert certificate["reference_stock"] == stock_of(
            DEMO_SPEC, list(policy.certificate.reference_stock)
        )
        low, high = certificate["policy_value_interval"]
        assert low <= certificate["policy_value"] <= high
        assert certificate["certified_gap"] >= 0 and certificate["replications"] >= 2
        # The certificate's bound is the bound at its reference stock.
        reference = list(policy.certificate.reference_stock)
        assert certificate["upper_bound"] == pytest.approx(policy.upper_bound(reference))
        # and the optimal value there lies below it.
        assert certificate["upper_bound"] >= (
            float(exact_demo.values[0, exact_demo.state_index(reference)]) - tolerance
        )

    # Exact networks answer as before: no priced fields.
    exact_id = create_network(client, demo_document(name="Exact pair"))["id"]
    run_worker(engine)
    exact = client.post(
        f"/v1/networks/{exact_id}/recommendation", json={"stock": stock_of(DEMO_SPEC, [13, 1])}
    ).json()
    assert (exact["method"], exact["upper_bound"], exact["certificate"]) == ("exact", None, None)
    assert exact["residual"] is not None


@sqlite_only
def test_batch_answers_priced_and_exact_networks_side_by_side(
    client: TestClient, engine: Engine
) -> None:
    priced_id = create_network(client, demo_document(mode="priced"))["id"]
    exact_id = create_network(client, demo_document(name="Exact pair"))["id"]
    assert run_worker(engine) == 2
    stock = stock_of(DEMO_SPEC, [13, 1])
    items = [{"network_id": priced_id, "stock": stock}, {"network_id": exact_id, "stock": stock}]
    outcomes = client.post("/v1/recommendations/batch", json={"items": items}).json()["items"]
    assert [o["result"]["method"] for o in outcomes] == ["priced", "exact"]
    assert outcomes[0]["result"]["certificate"] is not None
    # The solve-time histogram keeps the two methods apart.
    samples = scrape(client)
    for method in ("priced", "exact"):
        labels = {"states": "<1k", "criterion": "discounted", "method": method}
        assert value(samples, "stockrelay_solve_seconds_count", **labels) == 1


def test_a_mode_change_serves_the_old_method_marked_stale_until_solved(
    client: TestClient, engine: Engine
) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    path = f"/v1/networks/{network_id}"
    client.put(path, json=demo_document(mode="priced"), headers={"If-Match": '"1"'})
    stock = {"stock": stock_of(DEMO_SPEC, [13, 1])}
    before = client.post(f"{path}/recommendation", json=stock).json()
    assert (before["method"], before["stale"], before["version"]) == ("exact", True, 1)
    run_worker(engine)
    after = client.post(f"{path}/recommendation", json=stock).json()
    assert (after["method"], after["stale"], after["version"]) == ("priced", False, 2)


@sqlite_only
def test_priced_policy_round_trips_bit_exactly_through_the_codec(engine: Engine) -> None:
    with open_client(engine) as client:
        priced_network(client, engine)
    policy = stored_priced(engine)
    encoded = encode_policy(policy)
    assert json.loads(encoded.meta)["kind"] == "priced"
    decoded = decode_policy(encoded.arrays, encoded.layout, encoded.checksum, encoded.meta)
    assert isinstance(decoded, PricedPolicy)
    arrays, meta = policy.to_arrays()
    again, again_meta = decoded.to_arrays()
    assert again_meta == meta
    for name, array in arrays.items():
        assert again[name].dtype == array.dtype and again[name].tobytes() == array.tobytes()
    stocks = all_stocks(policy)
    np.testing.assert_array_equal(decoded.plan_batch(stocks), policy.plan_batch(stocks))
    assert decoded.recommend([13, 1]) == policy.recommend([13, 1])
    # Exact policies keep their format: no `kind`, so blobs stored before still decode.
    assert "kind" not in json.loads(encode_policy(solve_network(demo())).meta)


# -- progress ----------------------------------------------------------------------------------


def test_a_running_priced_solve_reports_its_progress_into_the_job(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        db_networks.create_network(
            session, tenant, demo(), ["discounted"], mode="priced", method="priced"
        )
    seen: list[str] = []
    real = solve_priced

    def watched(spec: NetworkSpec, **kwargs: Any) -> PricedPolicy:
        report = kwargs.pop("progress")
        first = threading.Event()

        def progress(step: Any) -> None:
            report(step)
            if first.is_set():
                return
            first.set()
            # While the solve is still running, the job shows the report (written by the
            # worker thread, throttled to once per PROGRESS_SECONDS).
            deadline = time.monotonic() + 10
            while time.monotonic() < deadline:
                with sessions() as session:
                    text = session.scalars(select(SolveJob.progress)).one()
                    state = session.scalars(select(SolveJob.state)).one()
                if text is not None:
                    seen.append(text)
                    assert state == "running"
                    return
                time.sleep(0.02)

        return real(spec, progress=progress, **kwargs)

    monkeypatch.setattr(worker_module, "solve_priced", watched)
    assert make_worker(engine, sessions).run(until_idle=True) == 1
    [job] = list(sessions().scalars(select(SolveJob)))
    assert job.state == "done"
    assert seen, "no progress was visible while the solve ran"
    shown = json.loads(seen[0])
    assert shown["stage"] == "pricing" and shown["iteration"] >= 1
    assert shown["upper_bound"] > 0 and shown["elapsed"] >= 0


def _running_with_progress(
    engine: Engine, client: TestClient, **progress: Any
) -> tuple[dict[str, Any], dict[str, str]]:
    """A priced network whose solve job runs elsewhere with `progress` stored as its latest
    report: the job as /v1/jobs shows it, and the labels of its progress gauges."""
    network_id = create_network(client, demo_document(mode="priced"))["id"]
    progress["reported_at"] = datetime.now(UTC).replace(tzinfo=None).isoformat()
    with sessionmaker(engine).begin() as session:
        session.execute(
            update(SolveJob).values(
                state="running", lease_owner="elsewhere", progress=json.dumps(progress)
            )
        )
    [job] = client.get("/v1/jobs").json()
    labels = {
        "job_id": str(job["id"]),
        "network_id": str(network_id),
        "criterion": "discounted",
        "stage": progress["stage"],
    }
    return job, labels


def test_progress_of_running_solves_is_on_the_metrics_and_the_status_page(
    engine: Engine,
) -> None:
    with open_client(engine) as client:
        job, labels = _running_with_progress(
            engine,
            client,
            stage="certifying",
            iteration=17,
            upper_bound=1234.5,
            lower_bound=1210.25,
            elapsed=42.0,
        )
        assert job["progress"]["upper_bound"] == 1234.5 and job["progress"]["stage"] == "certifying"
        samples = scrape(client)
        assert value(samples, "stockrelay_priced_solve_upper_bound", **labels) == 1234.5
        assert value(samples, "stockrelay_priced_solve_lower_bound", **labels) == 1210.25
        assert value(samples, "stockrelay_priced_solve_iteration", **labels) == 17
        assert value(samples, "stockrelay_priced_solve_elapsed_seconds", **labels) == 42
        key = client.headers["Authorization"].removeprefix("Bearer ")
        page = client.get("/status", headers=basic(key)).text
        assert "priced solve" in page
        assert "certifying, iteration 17, bound 1,234.50, best lower 1,210.25" in page


def test_planning_progress_names_the_candidate_on_the_job_metrics_and_status_page(
    engine: Engine,
) -> None:
    with open_client(engine) as client:
        job, labels = _running_with_progress(
            engine,
            client,
            stage="planning",
            iteration=3,
            upper_bound=987.5,
            lower_bound=None,
            elapsed=12.0,
            candidates=4,
            trade_limit=4,
        )
        shown = job["progress"]
        assert shown["stage"] == "planning" and shown["iteration"] == 3
        assert shown["candidates"] == 4 and shown["trade_limit"] == 4
        samples = scrape(client)
        assert value(samples, "stockrelay_priced_solve_iteration", **labels) == 3
        assert value(samples, "stockrelay_priced_solve_upper_bound", **labels) == 987.5
        key = client.headers["Authorization"].removeprefix("Bearer ")
        page = client.get("/status", headers=basic(key)).text
        assert "planning, candidate 3 of 4 (trade limit 4), bound 987.50, 12 s" in page


def test_progress_printer_names_the_planning_candidate() -> None:
    stream = io.StringIO()
    report = progress_printer(stream, every=0.0)
    report(PricedProgress("pricing", 5, 100.0, None, 1.0))
    report(PricedProgress("planning", 1, 99.5, None, 2.0, candidates=3, trade_limit=None))
    report(PricedProgress("planning", 2, 99.5, None, 3.0, candidates=3, trade_limit=2))
    assert stream.getvalue().splitlines() == [
        "pricing: iteration 5, upper bound 100.0000 (1.0 s)",
        "planning: candidate 1 of 3 (plain store values), upper bound 99.5000 (2.0 s)",
        "planning: candidate 2 of 3 (trade limit 2), upper bound 99.5000 (3.0 s)",
    ]


# -- closing, simulations, export, pictures ----------------------------------------------------


@sqlite_only
def test_closing_instructions_of_a_priced_network_follow_its_plan(
    client: TestClient, engine: Engine
) -> None:
    network_id = priced_network(client, engine)
    policy = stored_priced(engine)
    stock = next(s for s in ([14, 0], [13, 1], [0, 9], [12, 2]) if policy.plan(s).any())
    day = datetime.now(UTC).date()
    for location, units in stock_of(DEMO_SPEC, stock).items():
        response = client.put(
            f"/v1/networks/{network_id}/locations/{location}/closing-stock",
            json={"business_date": day.isoformat(), "units": units},
        )
        assert response.status_code == 200, response.text
    flows = policy.plan(stock)
    ids = DEMO_SPEC.location_ids
    for i, location in enumerate(ids):
        got = client.get(
            f"/v1/networks/{network_id}/locations/{location}/instructions",
            params={"business_date": day.isoformat()},
        ).json()
        sent = {m["location"]: m["units"] for m in got["send"]}
        assert sent == {
            ids[b]: int(u) for (a, b), u in zip(policy.lanes, flows, strict=True) if a == i and u
        }


@sqlite_only
def test_a_simulation_of_a_priced_network_runs_its_plan_beside_the_baselines(
    client: TestClient, engine: Engine
) -> None:
    network_id = priced_network(client, engine)
    params = {"criterion": "discounted", "days": 40, "replications": 8, "warmup_days": 5, "seed": 7}
    started = client.post(f"/v1/networks/{network_id}/simulations", json=params)
    assert started.status_code == 202, started.text
    assert run_worker(engine) == 1
    report = client.get(started.headers["Location"]).json()["report"]
    assert report["optimal_source"] == "stored"
    assert [p["name"] for p in report["policies"]] == ["priced", "do_nothing", "balance_cover"]
    # Moving nothing on the same random days as solver.simulation's table simulation (common
    # random numbers: the same uniforms per day, replication and location).
    model = build_transfer_model(DEMO_SPEC)
    reference = simulate_policies(
        DEMO_SPEC,
        model,
        {"do_nothing": do_nothing_policy(model)},
        days=40,
        replications=8,
        rng=np.random.default_rng(7),
        warmup_days=5,
    ).outcome("do_nothing")
    nothing = report["policies"][1]
    assert nothing["profit_per_day"]["mean"] == pytest.approx(reference.profit_per_day.mean)
    assert nothing["fill_rate"]["mean"] == pytest.approx(reference.fill_rate.mean)
    assert nothing["difference_to_optimal"] is not None


@sqlite_only
def test_export_of_a_priced_network_gives_prices_values_and_the_table_where_it_fits(
    client: TestClient, engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    network_id = priced_network(client, engine)
    policy = stored_priced(engine)
    document = client.get(f"/v1/networks/{network_id}/policy").json()
    assert document["method"] == "priced" and document["rows_omitted"] is False
    np.testing.assert_array_equal(document["prices"], policy.prices)
    assert set(document["store_values"]) == set(DEMO_SPEC.location_ids)
    assert document["columns"][-1] == "upper_bound"
    assert len(document["rows"]) == policy.n_states
    for row in document["rows"][::17]:
        stock = row[:2]
        np.testing.assert_array_equal(row[2:-1], policy.plan(stock))
        assert row[-1] == pytest.approx(policy.upper_bound(stock))

    monkeypatch.setattr("service.api.policy_export.FULL_TABLE_MAX_STATES", 100)
    trimmed = client.get(f"/v1/networks/{network_id}/policy").json()
    assert trimmed["rows_omitted"] is True and "rows" not in trimmed
    refused = client.get(f"/v1/networks/{network_id}/policy", params={"format": "csv"})
    assert_problem(refused, 422, "invalid-input")


@sqlite_only
def test_pictures_of_a_priced_network_slice_its_plan_and_bound(
    client: TestClient, engine: Engine
) -> None:
    network_id = priced_network(client, engine)
    for picture in ("policy.svg", "value.svg"):
        response = client.get(f"/v1/networks/{network_id}/{picture}")
        assert response.status_code == 200, response.text
        assert response.headers["content-type"] == "image/svg+xml"
    key = client.headers["Authorization"].removeprefix("Bearer ")
    status = client.get("/status", headers=basic(key)).text
    assert "<svg" in status and "priced solve" in status  # its heatmap, and the done job
    policy = stored_priced(engine)
    plane = choose_plane(policy, "hilltop", "riverside", {})
    moves, bounds = net_inflow_grid(policy, plane), value_grid(policy, plane)
    for y, x in ((13, 1), (0, 9), (7, 4)):
        flows = policy.plan([y, x])
        into_riverside = sum(
            int(u) if b == 0 else -int(u) for (_, b), u in zip(policy.lanes, flows, strict=True)
        )
        assert moves[y, x] == into_riverside
        assert bounds[y, x] == pytest.approx(policy.upper_bound([y, x]))


# -- the command line --------------------------------------------------------------------------


def dense_policy_value(spec: NetworkSpec, plans: np.ndarray) -> np.ndarray:
    """Textbook policy evaluation v = (I - beta P)^-1 r on the explicit matrices of a
    two-location stationary network (numpy.linalg.solve), from the plan at every state."""
    model = build_transfer_model(spec)
    k0, k1 = model.kernels[0]
    shape = model.shape
    n = int(np.prod(shape))
    lanes = [
        (spec.location_ids.index(lane.from_), spec.location_ids.index(lane.to))
        for lane in spec.lanes
    ]
    costs = np.array([lane.unit_cost for lane in spec.lanes])
    transition = np.zeros((n, n))
    reward = np.zeros(n)
    for state in range(n):
        stock = np.array(np.unravel_index(state, shape))
        post = stock.copy()
        for (a, b), units in zip(lanes, plans[state], strict=True):
            post[a] -= units
            post[b] += units
        reward[state] = model.reward[0][tuple(post)] - plans[state] @ costs
        transition[state] = np.outer(k0[post[0]], k1[post[1]]).reshape(-1)
    return np.linalg.solve(np.eye(n) - spec.discount * transition, reward)


def test_cli_priced_solve_writes_plan_value_and_bound_at_every_state(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], exact_demo: PolicyResult
) -> None:
    network = tmp_path / "network.json"
    network.write_text(json.dumps(demo_document()))
    out = tmp_path / "result.json"
    code = main(
        [
            "solve",
            str(network),
            "--mode",
            "priced",
            "--out",
            str(out),
            "--stock",
            "riverside=14,hilltop=0",
        ]
    )
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "certified" in captured.out and "pricing: iteration" in captured.err
    # Like an exact solve, the summary shows moves and ends with the caution.
    assert "from closing stock riverside 14, hilltop 0:" in captured.out
    assert "riverside -> hilltop" in captured.out
    assert captured.out.rstrip().endswith(CAUTION)
    document = json.loads(out.read_text())
    contract = {"network", "criterion", "states", "lanes", "value", "policy", "gain"}
    assert contract | {"iterations", "residual", "seconds", "certificate"} <= set(document)
    assert document["method"] == "priced" and document["states"] == 150
    plans = np.array(document["policy"])
    values = np.array(document["value"])
    bounds = np.array(document["upper_bound"])
    assert plans.shape == (150, 2) and values.shape == bounds.shape == (150,)
    tolerance = 1e-7 * scale(exact_demo)
    # The value written is the plan's exact value: textbook dense evaluation agrees.
    np.testing.assert_allclose(values, dense_policy_value(DEMO_SPEC, plans), atol=tolerance)
    # Any policy's value <= the optimal value <= the Lagrangian bound (a theorem: any
    # violation is a bug).
    optimal = exact_demo.values[0]
    assert np.all(values <= optimal + tolerance)
    assert np.all(optimal <= bounds + tolerance)
    assert np.all(values <= bounds + tolerance)
    certificate = document["certificate"]
    assert set(certificate) == {
        "reference_stock",
        "upper_bound",
        "policy_value",
        "policy_value_interval",
        "certified_gap",
        "replications",
    }


def test_networks_import_takes_a_mode(
    database_url: str,
    engine: Engine,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.setenv("STOCKRELAY_DATABASE_URL", database_url_of(engine))
    network = tmp_path / "network.json"
    network.write_text(json.dumps(demo_document()))
    assert main(["networks", "import", str(network), "--mode", "priced"]) == 0
    assert main(["networks", "import", str(network)]) == 0  # keeps priced
    capsys.readouterr()
    with sessionmaker(engine)() as session:
        rows = session.execute(select(NetworkVersion.number, NetworkVersion.method)).all()
        modes = session.scalars(select(Network.mode)).all()
    assert sorted(rows) == [(1, "priced"), (2, "priced")] and modes == ["priced"]


@sqlite_only
def test_a_what_if_comparison_of_a_priced_network_is_queued_and_solved_by_prices(
    client: TestClient, engine: Engine, exact_demo: PolicyResult
) -> None:
    network_id = priced_network(client, engine)
    overrides = {"lanes": [{"from": "riverside", "to": "hilltop", "unit_cost": 1000.0}]}
    response = client.post(f"/v1/networks/{network_id}/what-if", json={"overrides": overrides})
    assert response.status_code == 202, response.text  # priced comparisons go to a worker
    assert run_worker(engine) == 1
    done = client.get(response.headers["Location"]).json()
    assert done["state"] == "done", done["error"]
    base, changed = done["result"]["base"], done["result"]["changed"]
    assert (base["method"], changed["method"]) == ("priced", "priced")
    assert base["residual"] is None and base["mean_value"] is None
    reference = list(base["reference_stock"].values())
    # Each bound lies above its network's optimal value at the reference stock.
    optimal = float(exact_demo.values[0, exact_demo.state_index(reference)])
    assert base["upper_bound_at_reference"] >= optimal - 1e-9 * scale(exact_demo)
    assert done["result"]["change"]["upper_bound_at_reference"] == pytest.approx(
        changed["upper_bound_at_reference"] - base["upper_bound_at_reference"]
    )
    moves = done["result"]["moves"]
    assert moves["comparable"] is True and moves["states_changed"] >= 0


def test_calibration_applied_to_a_priced_network_keeps_its_method(client: TestClient) -> None:
    network = create_network(client, demo_document(mode="priced"))
    rows = simulated_rows(5, 60, {"riverside": 4.0, "hilltop": 1.0}, {"riverside": 5, "hilltop": 3})
    upload(client, network["id"], rows)
    applied = client.post(
        f"/v1/networks/{network['id']}/calibration/apply", headers={"If-Match": '"1"'}
    )
    assert applied.status_code == 201, applied.text
    body = applied.json()
    assert (body["version"], body["mode"], body["method"]) == (2, "priced", "priced")
    assert [job["method"] for job in body["jobs"]] == ["priced"]


# -- rules: dispatch costs, floors, handling limits ---------------------------------------------


@pytest.fixture(scope="module")
def exact_ruled() -> PolicyResult:
    return solve_network(RULED)


@sqlite_only
def test_a_priced_network_with_rules_keeps_them_and_charges_the_dispatch(
    client: TestClient, engine: Engine, exact_ruled: PolicyResult
) -> None:
    network_id = create_network(client, ruled_document(mode="priced"))["id"]
    assert run_worker(engine) == 1
    policy = stored_priced(engine)
    assert policy.dispatch_costs.tolist() == [3.0, 0.0]
    tolerance = 1e-9 * scale(exact_ruled)
    charged = 0
    for stock in all_stocks(policy).tolist():
        body = client.post(
            f"/v1/networks/{network_id}/recommendation", json={"stock": stock_of(RULED, stock)}
        ).json()
        assert body["method"] == "priced"
        flows = tuple(int(u) for u in policy.plan(stock))
        assert_within_rules(RULED, tuple(stock), flows)
        # Lagrangian bound >= the exact optimum with the rules (theorem, solver.priced; the exact
        # solver is checked against quantecon's DiscreteDP in tests/solver/test_rules.py).
        optimal = float(exact_ruled.values[0, exact_ruled.state_index(stock)])
        assert body["upper_bound"] >= optimal - tolerance
        for transfer in body["transfers"]:
            lane = [(ln.from_, ln.to) for ln in RULED.lanes].index(
                (transfer["from"], transfer["to"])
            )
            assert transfer["dispatch_cost"] == RULED.lanes[lane].dispatch_cost
            charged += transfer["dispatch_cost"] > 0
        expected = sum(t["units"] * t["unit_cost"] + t["dispatch_cost"] for t in body["transfers"])
        assert body["transfer_cost"] == pytest.approx(expected)
    assert charged > 0  # the van was sent somewhere
    # A simulation checks every night's moves against the rules (solver.simulation).
    params = {"criterion": "discounted", "days": 30, "replications": 4, "seed": 3}
    started = client.post(f"/v1/networks/{network_id}/simulations", json=params)
    assert started.status_code == 202, started.text
    assert run_worker(engine) == 1
    done = client.get(started.headers["Location"]).json()
    assert done["state"] == "done", done
    report = done["report"]
    names = [p["name"] for p in report["policies"]]
    assert names[0] == "priced" and "optimal_without_rules" in names
    # What the rules cost and protect, as for exact networks: the priced policy without them
    # runs on the same days (simulation estimates; only their form is checked here).
    rules = report["rules"]
    assert set(rules["by_location"]) == set(RULED.location_ids)
    riverside = rules["by_location"]["riverside"]
    assert 0.0 <= riverside["fill_rate_with_rules"]["mean"] <= 1.0
    assert 0.0 <= riverside["fill_rate_without_rules"]["mean"] <= 1.0


def test_cli_priced_solve_of_a_network_with_rules(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], exact_ruled: PolicyResult
) -> None:
    network = tmp_path / "network.json"
    network.write_text(json.dumps(ruled_document()))
    out = tmp_path / "result.json"
    code = main(["solve", str(network), "--mode", "priced", "--out", str(out)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    document = json.loads(out.read_text())
    plans = np.array(document["policy"])
    values, bounds = np.array(document["value"]), np.array(document["upper_bound"])
    stocks = itertools.product(*(range(loc.capacity + 1) for loc in RULED.locations))
    for stock, flows in zip(stocks, plans.tolist(), strict=True):
        assert_within_rules(RULED, stock, tuple(flows))
    # Plan value <= optimal value <= Lagrangian bound (outside reference: exact DP, checked
    # against quantecon's DiscreteDP in tests/solver/test_rules.py).
    tolerance = 1e-7 * scale(exact_ruled)
    optimal = exact_ruled.values[0]
    assert np.all(values <= optimal + tolerance)
    assert np.all(optimal <= bounds + tolerance)
    # and the plan is close to optimal (loss relative to the mean optimal value).
    assert float(((optimal - values) / np.abs(optimal).mean()).max()) <= 0.025
