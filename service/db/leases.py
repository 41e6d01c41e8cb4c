"""A job's lease: while a worker holds one, only that worker may change its job.

A worker that stalls past its lease loses the job to whoever claims it next
(service.db.jobs.claim_job); its later writes must then change nothing. Every write of a
lease holder therefore goes through `update_held`, whose single UPDATE holds only while the
lease does, and whose answer says whether it did.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import ColumnElement, and_, update
from sqlalchemy.orm import Session

from service.db.tables import SolveJob
from service.vocabulary import JobState

__all__ = ["update_held"]


def update_held(
    session: Session, job_id: int, owner: str, *also: ColumnElement[bool], **values: Any
) -> bool:
    """Set `values` on the job while `owner` holds its lease (and every condition of `also`
    holds). False, and nothing written, when the job is no longer theirs."""
    held = and_(
        SolveJob.id == job_id,
        SolveJob.lease_owner == owner,
        SolveJob.state == JobState.RUNNING,
        *also,
    )
    result = session.execute(update(SolveJob).where(held).values(**values))
    return bool(getattr(result, "rowcount", 0))
