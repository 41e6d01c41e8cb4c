"""The store and its job queue, on SQLite and PostgreSQL."""

from __future__ import annotations

import hashlib
import json
from datetime import date, timedelta
from pathlib import Path

import pytest
from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from service.codec import encode_policy
from service.db.assortments import insert_rows
from service.db.base import utcnow
from service.db.jobs import (
    claim_job,
    fail_exhausted_jobs,
    finish_job,
    list_jobs,
    release_job,
    renew_lease,
    retry_job,
)
from service.db.keys import get_or_create_tenant
from service.db.networks import add_version, canonical_spec, create_network, list_networks
from service.db.policies import policy_for, store_policy
from service.db.tables import Policy, SalesDay, SolveJob
from service.vocabulary import JobState
from solver import NetworkSpec, solve_network

DEMO = Path(__file__).resolve().parents[2] / "service" / "data" / "demo_network.json"


def demo(**changes: object) -> NetworkSpec:
    document = json.loads(DEMO.read_text())
    document.update(changes)
    return NetworkSpec.model_validate(document)


def count(session: Session, table: type[SolveJob] | type[Policy]) -> int:
    return int(session.scalar(select(func.count()).select_from(table)) or 0)


def test_spec_hash_is_sha256_of_canonical_json(sessions: sessionmaker[Session]) -> None:
    spec = demo()
    text, digest = canonical_spec(spec)
    assert digest == hashlib.sha256(text.encode()).hexdigest()
    assert json.loads(text) == spec.model_dump(mode="json", by_alias=True)
    # Key order in the input does not change the hash.
    reordered = NetworkSpec.model_validate(dict(reversed(list(json.loads(text).items()))))
    assert canonical_spec(reordered)[1] == digest


def test_new_network_queues_one_job_per_criterion(sessions: sessionmaker[Session]) -> None:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        _, version, jobs = create_network(
            session, tenant, demo(), ["discounted", "average", "discounted"]
        )
        assert version.number == 1
        assert sorted(job.criterion for job in jobs) == ["average", "discounted"]
        assert all(job.state == JobState.QUEUED for job in jobs)


def test_identical_specifications_share_one_solve(sessions: sessionmaker[Session]) -> None:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        network, _, _ = create_network(session, tenant, demo(), ["discounted"])
        version, jobs = add_version(session, network, demo(), ["discounted"])
        assert (version.number, jobs) == (2, [])
        # Another network of the same tenant with the same parameters shares the solve too...
        _, _, jobs = create_network(session, tenant, demo(name="copy"), ["discounted"])
        assert len(jobs) == 1  # the name is part of the specification, so this is a new hash
        # ...but another tenant never shares.
        other = get_or_create_tenant(session, "sporting goods")
        _, _, jobs = create_network(session, other, demo(), ["discounted"])
        assert len(jobs) == 1
        changed, jobs = add_version(session, network, demo(discount=0.99), ["average"])
        assert changed.number == 3 and [job.criterion for job in jobs] == ["average"]


def claim(session: Session, owner: str, *, at: timedelta = timedelta(0), attempts: int = 3):  # type: ignore[no-untyped-def]
    return claim_job(session, owner, 30.0, attempts, now=utcnow() + at)


def queue_two(sessions: sessionmaker[Session]) -> None:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        create_network(session, tenant, demo(), ["discounted", "average"])


def test_claims_take_the_oldest_job_and_lease_it(sessions: sessionmaker[Session]) -> None:
    queue_two(sessions)
    with sessions.begin() as session:
        first = claim(session, "worker-a")
        second = claim(session, "worker-b")
        assert claim(session, "worker-c") is None
        assert first is not None and second is not None
        assert first.id < second.id
        assert (first.state, first.lease_owner, first.attempts) == ("running", "worker-a", 1)
        assert first.lease_expires_at is not None and first.lease_expires_at > utcnow()


def test_an_expired_lease_is_claimed_again(sessions: sessionmaker[Session]) -> None:
    queue_two(sessions)
    with sessions.begin() as session:
        job = claim(session, "worker-a")
        claim(session, "worker-a")
        assert job is not None
        assert claim(session, "worker-b", at=timedelta(seconds=10)) is None  # lease still held
        again = claim(session, "worker-b", at=timedelta(seconds=31))
        assert again is not None and again.id == job.id
        assert (again.lease_owner, again.attempts) == ("worker-b", 2)
        # The first worker lost it: it can neither renew nor finish.
        assert not renew_lease(session, job.id, "worker-a", 30.0)
        assert renew_lease(session, job.id, "worker-b", 30.0)


def test_jobs_out_of_attempts_are_failed_with_the_reason(sessions: sessionmaker[Session]) -> None:
    queue_two(sessions)
    with sessions.begin() as session:
        job = claim(session, "worker-a", attempts=1)
        assert job is not None
        later = utcnow() + timedelta(seconds=31)
        assert claim(session, "worker-b", at=timedelta(seconds=31), attempts=1) is not None
        assert fail_exhausted_jobs(session, 1, now=later) == 1
        session.refresh(job)
        assert job.state == JobState.FAILED
        assert job.error is not None and "stopped before finishing" in job.error
        assert "worker-a" in job.error
        assert job.lease_owner is None


def test_released_job_returns_to_the_queue_uncounted(sessions: sessionmaker[Session]) -> None:
    queue_two(sessions)
    with sessions.begin() as session:
        job = claim(session, "worker-a")
        assert job is not None
        assert not release_job(session, job.id, "worker-b")
        assert release_job(session, job.id, "worker-a", "handed back")
        session.refresh(job)
        assert (job.state, job.attempts, job.lease_owner) == ("queued", 0, None)


def test_policy_is_stored_once_and_only_by_the_lease_holder(
    sessions: sessionmaker[Session],
) -> None:
    queue_two(sessions)
    spec = demo()
    result = solve_network(spec)
    encoded = encode_policy(result)
    with sessions.begin() as session:
        job = claim(session, "worker-a")
        assert job is not None and job.criterion == "discounted"
        assert not store_policy(session, job, "worker-b", result, encoded)
        assert count(session, Policy) == 0
        assert store_policy(session, job, "worker-a", result, encoded)
        session.refresh(job)
        assert job.state == JobState.DONE and job.iterations == result.iterations
        assert not store_policy(session, job, "worker-a", result, encoded)
        assert count(session, Policy) == 1
        policy = policy_for(session, job.tenant_id, job.spec_hash, "discounted")
        assert policy is not None and policy.job_id == job.id
        # A new version with the same specification needs no job now.
        network = list_networks(session)[0]
        _, jobs = add_version(session, network, spec, ["discounted"])
        assert jobs == []


def test_only_failed_jobs_are_retried(sessions: sessionmaker[Session]) -> None:
    queue_two(sessions)
    with sessions.begin() as session:
        job = claim(session, "worker-a")
        assert job is not None
        assert retry_job(session, job.id) is None
        assert finish_job(session, job.id, "worker-a", error="too large")
        session.refresh(job)
        assert (job.state, job.error) == ("failed", "too large")
        retried = retry_job(session, job.id)
        assert retried is not None
        assert (retried.state, retried.attempts, retried.error) == ("queued", 0, None)


@pytest.mark.parametrize("state", ["queued", "done"])
def test_jobs_are_listed_newest_first_by_state(sessions: sessionmaker[Session], state: str) -> None:
    queue_two(sessions)
    with sessions.begin() as session:
        job = claim(session, "worker-a")
        assert job is not None
        result = solve_network(demo())
        store_policy(session, job, "worker-a", result, encode_policy(result))
        listed = list_jobs(session, state)
        assert [j.state for j in listed] == [state]
        everything = list_jobs(session)
        assert [j.id for j in everything] == sorted((j.id for j in everything), reverse=True)


def test_a_queued_job_is_claimable_whatever_its_attempts(sessions: sessionmaker[Session]) -> None:
    # E.g. after STOCKRELAY_MAX_ATTEMPTS was lowered: the job must not sit in the queue forever.
    queue_two(sessions)
    with sessions.begin() as session:
        for job in session.scalars(select(SolveJob)):
            job.attempts = 5
    with sessions.begin() as session:
        job = claim(session, "worker-a", attempts=3)
        assert job is not None and job.attempts == 6


def test_bulk_rows_go_in_whole_and_a_duplicate_is_refused_as_sqlalchemy_reports_it(
    sessions: sessionmaker[Session],
) -> None:
    """insert_rows (COPY on PostgreSQL, executemany elsewhere) stores every row in the caller's
    transaction, and a row breaking a unique key raises SQLAlchemy's IntegrityError on both
    databases, undone with its savepoint, so that an upload's caller answers 409 rather than
    500."""
    table = SalesDay.metadata.tables[SalesDay.__tablename__]
    columns = [column.name for column in table.columns if column.name != "id"]
    start, now = date(2026, 11, 2), utcnow()
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "t")
        network, _, _ = create_network(session, tenant, demo(), ["discounted"])
        days = [
            (network.id, "riverside", start + timedelta(days=k), 2, 5, 1, now) for k in range(7)
        ]
        insert_rows(session, table, columns, iter(days))
        with pytest.raises(IntegrityError), session.begin_nested():
            insert_rows(session, table, columns, iter([days[3]]))
        stored = session.scalars(select(SalesDay.business_date).order_by(SalesDay.id)).all()
    assert stored == [day[2] for day in days]
