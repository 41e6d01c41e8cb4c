"""Solve jobs. Simulations and what-if comparisons share the queue but are read under their
network (/v1/networks/{id}/simulations/{job_id}, /v1/networks/{id}/what-if/{job_id})."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query

from service import jobs
from service.api.deps import JobId, Reader, SessionDep
from service.api.schemas.jobs import JobOut
from service.vocabulary import JobStateName

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])


@router.get("/{job_id}", response_model=JobOut)
def get_job(job_id: JobId, session: SessionDep, caller: Reader) -> JobOut:
    return JobOut.model_validate(jobs.solve_job(session, caller.tenant_id, job_id))


@router.get("", response_model=list[JobOut])
def list_jobs(
    session: SessionDep,
    caller: Reader,
    state: JobStateName | None = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> list[JobOut]:
    """Newest first."""
    return [
        JobOut.model_validate(job)
        for job in jobs.solve_jobs(session, caller.tenant_id, state, limit)
    ]
