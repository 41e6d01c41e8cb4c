"""The read path: newest ready policy, staleness, the cache, corruption, recommendations."""

from __future__ import annotations

import pytest
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session, sessionmaker

from service.db.keys import get_or_create_tenant
from service.db.networks import add_version, create_network
from service.db.tables import Network, Policy, SolveJob
from service.errors import PolicyNotReadyError, PolicyNotSolvedError
from service.serving import PolicyCache, ServedPolicy, recommend
from service.vocabulary import JobState
from solver import InvalidStockError, Recommendation, solve_network
from tests.service.test_repository import demo
from tests.service.test_worker import make_worker


def new_network(sessions: sessionmaker[Session]) -> int:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        network, _, _ = create_network(session, tenant, demo(), ["discounted"])
        return network.id


def serve(
    sessions: sessionmaker[Session],
    cache: PolicyCache,
    network_id: int,
    stock: dict[str, int],
    criterion: str | None = "discounted",
) -> tuple[ServedPolicy, Recommendation]:
    with sessions.begin() as session:
        served, recommendation, _ = recommend(
            session, cache, session.get_one(Network, network_id), stock, criterion
        )
        return served, recommendation


def test_nothing_is_served_before_the_solve(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    network_id = new_network(sessions)
    with pytest.raises(PolicyNotReadyError, match="job 1 queued") as info:
        serve(sessions, PolicyCache(4), network_id, {"riverside": 3, "hilltop": 2})
    assert info.value.job_state == "queued"
    with pytest.raises(PolicyNotSolvedError, match="not solved for average") as never:
        serve(sessions, PolicyCache(4), network_id, {"riverside": 3, "hilltop": 2}, "average")
    assert never.value.criteria == ["discounted"]


def test_an_older_version_is_not_served_as_stale_when_nothing_solves_the_newest(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    network_id = new_network(sessions)
    worker = make_worker(engine, sessions)
    worker.run(until_idle=True)
    with sessions.begin() as session:
        network = session.get_one(Network, network_id)
        _, jobs = add_version(session, network, demo(discount=0.98), ["discounted"])
        # The newest version's only solve fails for good.
        jobs[0].state = JobState.FAILED
        jobs[0].error = "gave up"
    with pytest.raises(PolicyNotSolvedError, match="failed") as failed:
        serve(sessions, PolicyCache(4), network_id, {"riverside": 5, "hilltop": 5})
    assert failed.value.job_state == "failed"
    with sessions.begin() as session:
        network = session.get_one(Network, network_id)
        # A version solved for another criterion only: discounted is no longer in use.
        add_version(session, network, demo(discount=0.97), ["average"])
    with pytest.raises(PolicyNotSolvedError, match="not solved for discounted"):
        serve(sessions, PolicyCache(4), network_id, {"riverside": 5, "hilltop": 5})
    worker.run(until_idle=True)
    served, _ = serve(sessions, PolicyCache(4), network_id, {"riverside": 5, "hilltop": 5}, None)
    assert (served.criterion, served.version_number, served.stale) == ("average", 3, False)


def test_recommendation_equals_the_solver_and_comes_from_the_cache(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    network_id = new_network(sessions)
    make_worker(engine, sessions).run(until_idle=True)
    cache = PolicyCache(4)
    expected = solve_network(demo())
    for stock in ({"riverside": 13, "hilltop": 1}, {"hilltop": 9, "riverside": 2}):
        served, recommendation = serve(sessions, cache, network_id, stock)
        assert not served.stale and served.version_number == 1
        vector = [stock["riverside"], stock["hilltop"]]
        assert recommendation.flows == expected.recommend(vector).flows
        assert recommendation.expected_value == pytest.approx(
            expected.recommend(vector).expected_value, rel=1e-9
        )
    assert (cache.misses, cache.hits) == (1, 1)


def test_a_newer_version_being_solved_is_reported_stale(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    network_id = new_network(sessions)
    worker = make_worker(engine, sessions)
    worker.run(until_idle=True)
    with sessions.begin() as session:
        network = session.get_one(Network, network_id)
        add_version(session, network, demo(discount=0.99), ["discounted"])
    cache = PolicyCache(4)
    served, _ = serve(sessions, cache, network_id, {"riverside": 5, "hilltop": 5})
    assert served.stale and served.version_number == 1
    worker.run(until_idle=True)
    served, _ = serve(sessions, cache, network_id, {"riverside": 5, "hilltop": 5})
    assert not served.stale and served.version_number == 2
    assert served.result.discount == 0.99


def test_a_corrupt_policy_is_never_served_and_is_solved_again(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    network_id = new_network(sessions)
    worker = make_worker(engine, sessions)
    worker.run(until_idle=True)
    with sessions.begin() as session:
        policy = session.scalars(select(Policy)).one()
        damaged = bytearray(policy.arrays)
        damaged[len(damaged) // 2] ^= 0xFF
        policy.arrays = bytes(damaged)
    with pytest.raises(PolicyNotReadyError, match="queued"):
        serve(sessions, PolicyCache(4), network_id, {"riverside": 1, "hilltop": 1})
    with sessions() as session:
        assert session.scalars(select(Policy)).all() == []
        assert [job.state for job in session.scalars(select(SolveJob))] == ["done", "queued"]
    worker.run(until_idle=True)
    served, _ = serve(sessions, PolicyCache(4), network_id, {"riverside": 1, "hilltop": 1})
    assert served.version_number == 1


@pytest.mark.parametrize(
    ("stock", "message"),
    [
        ({"riverside": 3}, "hilltop: missing"),
        ({"riverside": 3, "hilltop": 1, "harbour": 2}, "harbour: unknown location"),
        ({"riverside": 3, "hilltop": 10}, "hilltop: 10 units is outside 0..9"),
    ],
)
def test_stock_that_does_not_fit_is_refused(
    engine: Engine, sessions: sessionmaker[Session], stock: dict[str, int], message: str
) -> None:
    network_id = new_network(sessions)
    make_worker(engine, sessions).run(until_idle=True)
    with pytest.raises(InvalidStockError, match=message):
        serve(sessions, PolicyCache(4), network_id, stock)
