"""Simulations and what-if comparisons: evidence for the optimal policy on simulated days beside
simple rules, and what a change to the network would be worth before it is made. Simulations
are queued for the workers; a what-if comparison of small networks is answered at once, of
larger ones queued.

Scope: a read key may start them, since they change no stored network or policy; they cost
solver time instead, so a tenant has at most `analysis_max_live_jobs` of them queued or running
at once (429 beyond), besides the per-key request rate."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Response, status
from fastapi.encoders import jsonable_encoder
from fastapi.responses import JSONResponse
from sqlalchemy.orm import Session

from service import jobs
from service.analysis_requests import SimulationRequest, WhatIfRequest
from service.api.deps import JobId, NetworkId, Reader, SessionDep, SettingsDep, get_network
from service.api.schemas.analysis import (
    SimulationJobOut,
    SimulationReportOut,
    WhatIfJobOut,
    WhatIfOut,
    WhatIfResultOut,
)
from service.jobs import NetworkVersion, SolveJob
from service.vocabulary import JobKind

router = APIRouter(prefix="/v1/networks/{network_id}", tags=["analysis"])


def _job_fields(network_id: int, version: NetworkVersion, job: SolveJob) -> dict[str, Any]:
    return {
        "id": job.id,
        "network_id": network_id,
        "version": version.number,
        "state": job.state,
        "criterion": job.criterion,
        "attempts": job.attempts,
        "created_at": job.created_at,
        "started_at": job.started_at,
        "finished_at": job.finished_at,
        "seconds": job.solve_seconds,
        "error": job.error,
    }


def _find(
    session: Session, tenant_id: int, network_id: int, kind: JobKind, job_id: int
) -> tuple[SolveJob, NetworkVersion]:
    network = get_network(session, tenant_id, network_id, archived_ok=True)
    return jobs.find_analysis(session, tenant_id, network, kind, job_id)


# -- simulations -------------------------------------------------------------------------------


def _simulation_out(network_id: int, version: NetworkVersion, job: SolveJob) -> SimulationJobOut:
    assert job.params is not None
    return SimulationJobOut(
        **_job_fields(network_id, version, job),
        request=SimulationRequest.model_validate_json(job.params),
        report=None if job.result is None else SimulationReportOut.model_validate_json(job.result),
    )


@router.post("/simulations", status_code=status.HTTP_202_ACCEPTED, response_model=SimulationJobOut)
def start_simulation(
    network_id: NetworkId,
    body: SimulationRequest,
    session: SessionDep,
    caller: Reader,
    settings: SettingsDep,
    response: Response,
) -> SimulationJobOut:
    """Queue a simulation of the current version: its optimal policy, moving nothing, and
    balancing days of cover, on the same simulated days (a priced network: its priced plan and
    moving nothing). The answer names the seed; the same
    seed gives the same report. 422 when the start stock does not fit the network or the
    simulation is longer than the limit allows."""
    network = get_network(session, caller.tenant_id, network_id)
    version, job = jobs.start_simulation(session, network, body, settings)
    response.headers["Location"] = f"/v1/networks/{network.id}/simulations/{job.id}"
    return _simulation_out(network.id, version, job)


@router.get("/simulations/{job_id}", response_model=SimulationJobOut)
def get_simulation(
    network_id: NetworkId, job_id: JobId, session: SessionDep, caller: Reader
) -> SimulationJobOut:
    """The simulation's state, and its report once done."""
    job, version = _find(session, caller.tenant_id, network_id, JobKind.SIMULATE, job_id)
    return _simulation_out(network_id, version, job)


# -- what-if comparisons -----------------------------------------------------------------------


def _what_if_out(network_id: int, version: NetworkVersion, job: SolveJob) -> WhatIfJobOut:
    return WhatIfJobOut(
        **_job_fields(network_id, version, job),
        result=None if job.result is None else WhatIfResultOut.model_validate_json(job.result),
    )


@router.post(
    "/what-if",
    response_model=WhatIfOut,
    responses={
        status.HTTP_202_ACCEPTED: {
            "model": WhatIfJobOut,
            "description": "Queued: the networks are too large to answer at once; the "
            "Location header names the job.",
        }
    },
)
def what_if(
    network_id: NetworkId,
    body: WhatIfRequest,
    session: SessionDep,
    caller: Reader,
    settings: SettingsDep,
) -> WhatIfOut | JSONResponse:
    """Solve the current version and the version the overrides would make, and compare their
    optimal values and moves. Answered at once when both networks are small and exact, else
    queued (202 with the job); priced networks compare upper bounds. 422 naming unknown
    locations and lanes, every problem of the changed network, and the sizes of one over the
    solver's limits."""
    network = get_network(session, caller.tenant_id, network_id)
    answer = jobs.start_what_if(session, network, body, settings)
    version, job = answer.version, answer.job
    if job is None:
        assert answer.result is not None
        return WhatIfOut(network_id=network.id, version=version.number, **answer.result)
    return JSONResponse(
        jsonable_encoder(_what_if_out(network.id, version, job)),
        status_code=status.HTTP_202_ACCEPTED,
        headers={"Location": f"/v1/networks/{network.id}/what-if/{job.id}"},
    )


@router.get("/what-if/{job_id}", response_model=WhatIfJobOut)
def get_what_if(
    network_id: NetworkId, job_id: JobId, session: SessionDep, caller: Reader
) -> WhatIfJobOut:
    """A queued what-if comparison's state, and its result once done."""
    job, version = _find(session, caller.tenant_id, network_id, JobKind.WHAT_IF, job_id)
    return _what_if_out(network_id, version, job)
