"""Stored policies: one per (tenant, specification hash, criterion, method), written by
`store_policy` when a solve finishes (under the solving worker's lease, service.db.leases).

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from service.codec import EncodedPolicy
from service.db.base import utcnow
from service.db.leases import update_held
from service.db.tables import Policy, SolveJob
from service.vocabulary import JobState
from solver import PolicyResult
from solver.priced_result import PricedPolicy

__all__ = [
    "delete_policy",
    "policy_for",
    "solve_accuracy",
    "store_policy",
]


def policy_for(
    session: Session, tenant_id: int, spec_hash: str, criterion: str, method: str = "exact"
) -> Policy | None:
    return session.scalars(
        select(Policy).where(
            Policy.tenant_id == tenant_id,
            Policy.spec_hash == spec_hash,
            Policy.criterion == criterion,
            Policy.method == method,
        )
    ).one_or_none()


def delete_policy(session: Session, policy_id: int) -> None:
    session.execute(delete(Policy).where(Policy.id == policy_id))


def store_policy(
    session: Session,
    job: SolveJob,
    owner: str,
    result: PolicyResult | PricedPolicy,
    encoded: EncodedPolicy,
    now: datetime | None = None,
) -> bool:
    """Mark the job done and store its policy, in the caller's transaction. False (and nothing
    written) when the lease was lost; the job then belongs to whoever holds it now.

    A priced policy has no Bellman residual: the job's residual is null, the policy row's 0, and
    its error bound the certified distance to the optimum at the reference stock (upper bound
    minus the low end of the policy value's interval)."""
    now = now or utcnow()
    residual, error_bound = solve_accuracy(result)
    done = update_held(
        session,
        job.id,
        owner,
        state=JobState.DONE,
        finished_at=now,
        lease_owner=None,
        lease_expires_at=None,
        solve_seconds=result.seconds["total"],
        iterations=result.iterations,
        residual=residual,
        error=None,
    )
    if not done:
        return False
    if policy_for(session, job.tenant_id, job.spec_hash, job.criterion, job.method) is None:
        session.add(
            Policy(
                tenant_id=job.tenant_id,
                spec_hash=job.spec_hash,
                criterion=job.criterion,
                method=job.method,
                job_id=job.id,
                arrays=encoded.arrays,
                layout=encoded.layout,
                checksum=encoded.checksum,
                meta=encoded.meta,
                gain=result.gain,
                residual=residual or 0.0,
                error_bound=error_bound,
                iterations=result.iterations,
                solve_seconds=result.seconds["total"],
                solved_at=now,
            )
        )
        session.flush()
    return True


def solve_accuracy(result: PolicyResult | PricedPolicy) -> tuple[float | None, float]:
    """(Bellman residual, error bound) of a solve; a priced one has no residual, and its error
    bound is upper bound minus the low end of the policy value's interval at the reference
    stock (currency)."""
    if isinstance(result, PricedPolicy):
        certificate = result.certificate
        return None, max(0.0, certificate.upper_bound - certificate.policy_value_interval[0])
    return result.residual, result.error_bound
