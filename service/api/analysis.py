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

from service.analysis import apply_overrides, check_simulation, new_seed, run_what_if
from service.api.deps import JobId, NetworkId, Reader, SessionDep, SettingsDep, get_network
from service.db.jobs import analysis_job, enqueue_analysis, live_analysis_jobs
from service.db.networks import latest_version
from service.db.tables import Network, NetworkVersion, SolveJob
from service.modes import resolve_method
from service.problems import NotFound, RateLimited
from service.schemas import (
    SimulationJobOut,
    SimulationReportOut,
    SimulationRequest,
    WhatIfJobOut,
    WhatIfOut,
    WhatIfRequest,
    WhatIfResultOut,
)
from service.settings import Settings
from service.vocabulary import JobKind
from solver import NetworkSpec
from solver.build import check_size

router = APIRouter(prefix="/v1/networks/{network_id}", tags=["analysis"])


def _current(session: Session, network: Network) -> tuple[NetworkVersion, NetworkSpec]:
    version = latest_version(session, network.id)
    assert version is not None, "a network always has a version"
    return version, NetworkSpec.model_validate_json(version.spec_json)


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


# A simulation or a queued comparison takes seconds to minutes: a client refused for the cap
# should not come back at once.
_ANALYSIS_RETRY_SECONDS = "10"


def _check_analysis_cap(session: Session, tenant_id: int, settings: Settings) -> None:
    live = live_analysis_jobs(session, tenant_id)
    if live >= settings.analysis_max_live_jobs:
        raise RateLimited(
            f"{live} simulations or what-if comparisons of this tenant are queued or running "
            f"(at most {settings.analysis_max_live_jobs}); start another when one has finished",
            retry_after=_ANALYSIS_RETRY_SECONDS,
        )


def _find(
    session: Session, tenant_id: int, network_id: int, kind: JobKind, job_id: int
) -> tuple[SolveJob, NetworkVersion]:
    network = get_network(session, tenant_id, network_id, archived_ok=True)
    found = analysis_job(session, tenant_id, network.id, kind, job_id)
    if found is None:
        what = "simulation" if kind is JobKind.SIMULATE else "what-if comparison"
        raise NotFound(f"no {what} {job_id} of network {network_id}")
    return found


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
    version, spec = _current(session, network)
    check_simulation(
        spec,
        body,
        limits=settings.size_limits,
        max_replication_days=settings.simulation_max_replication_days,
        method=version.method,
    )
    _check_analysis_cap(session, caller.tenant_id, settings)
    params = body.model_copy(update={"seed": new_seed() if body.seed is None else body.seed})
    job = enqueue_analysis(
        session,
        caller.tenant_id,
        version,
        JobKind.SIMULATE,
        body.criterion,
        params.model_dump_json(by_alias=True),
    )
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
    version, spec = _current(session, network)
    changed = apply_overrides(spec, body.overrides)
    limits = settings.size_limits
    methods = {resolve_method(candidate, network.mode, limits) for candidate in (spec, changed)}
    # Priced networks are large, or asked for: their comparisons always go to a worker.
    if methods == {"exact"} and (
        max(check_size(candidate, limits)[0] for candidate in (spec, changed))
        <= settings.what_if_sync_max_states
    ):
        result = run_what_if(
            spec, body.overrides, criterion=body.criterion, limits=limits, mode=network.mode
        )
        return WhatIfOut(network_id=network.id, version=version.number, **result)
    _check_analysis_cap(session, caller.tenant_id, settings)
    # exclude_unset: an absent max_units_per_night keeps the limit, a null one lifts it.
    job = enqueue_analysis(
        session,
        caller.tenant_id,
        version,
        JobKind.WHAT_IF,
        body.criterion,
        body.model_dump_json(by_alias=True, exclude_unset=True),
    )
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
