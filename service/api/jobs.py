"""Solve jobs. Simulations and what-if comparisons share the queue but are read under their
network (/v1/networks/{id}/simulations/{job_id}, /v1/networks/{id}/what-if/{job_id})."""

from __future__ import annotations

import json
from typing import Annotated

from fastapi import APIRouter, Query

from service.api.deps import JobId, Reader, SessionDep
from service.db import repository
from service.db.tables import NetworkVersion
from service.problems import NotFound
from service.schemas import JobOut
from service.vocabulary import JobKind, JobStateName

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])


@router.get("/{job_id}", response_model=JobOut)
def get_job(job_id: JobId, session: SessionDep, caller: Reader) -> JobOut:
    job = repository.get_job(session, job_id)
    if job is None or job.tenant_id != caller.tenant_id:
        raise NotFound(f"no job {job_id}")
    if job.kind == JobKind.CALIBRATE:
        chunk = json.loads(job.params or "{}")
        raise NotFound(
            f"job {job_id} is a chunk of a calibration; read the run at "
            f"/v1/assortments/{chunk.get('assortment')}/calibration/{chunk.get('run')}"
        )
    if job.kind != JobKind.SOLVE:
        network_id = session.get_one(NetworkVersion, job.version_id).network_id
        path = "simulations" if job.kind == JobKind.SIMULATE else "what-if"
        raise NotFound(
            f"job {job_id} is not a solve; read it at /v1/networks/{network_id}/{path}/{job_id}"
        )
    return JobOut.model_validate(job)


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
        for job in repository.list_jobs(session, state, limit, tenant_id=caller.tenant_id)
    ]
