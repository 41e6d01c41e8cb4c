"""Use cases of the job queue as callers see it: solve jobs read and listed, simulations and
what-if comparisons started (checked against the network, then queued, or for small exact
networks answered at once) and read back.

Simulations and comparisons cost solver time: a tenant has at most `analysis_max_live_jobs` of
them queued or running at once (AnalysisCapError beyond). The pure work is service.analysis;
the worker runs what is queued here.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session

from service.analysis import apply_overrides, check_simulation, new_seed, run_what_if
from service.analysis_requests import SimulationRequest, WhatIfRequest
from service.db.analysis_jobs import analysis_job, enqueue_analysis, live_analysis_jobs
from service.db.jobs import get_job, list_jobs
from service.db.networks import latest_version
from service.db.tables import Network, NetworkVersion, SolveJob
from service.errors import AnalysisCapError, UnknownJobError
from service.modes import resolve_method
from service.settings import Settings
from service.vocabulary import JobKind
from solver import NetworkSpec
from solver.build import check_size

__all__ = [
    "NetworkVersion",
    "SolveJob",
    "WhatIfAnswer",
    "find_analysis",
    "solve_job",
    "solve_jobs",
    "start_simulation",
    "start_what_if",
]

# A simulation or a queued comparison takes seconds to minutes: a client refused for the cap
# should not come back at once.
_ANALYSIS_RETRY_SECONDS = "10"


def solve_job(session: Session, tenant_id: int, job_id: int) -> SolveJob:
    """The tenant's solve job; UnknownJobError otherwise (a simulation or comparison says
    where to read it)."""
    job = get_job(session, job_id)
    if job is None or job.tenant_id != tenant_id:
        raise UnknownJobError(f"no job {job_id}")
    if job.kind == JobKind.CALIBRATE:
        chunk = json.loads(job.params or "{}")
        raise UnknownJobError(
            f"job {job_id} is a chunk of a calibration; read the run at "
            f"/v1/assortments/{chunk.get('assortment')}/calibration/{chunk.get('run')}"
        )
    if job.kind != JobKind.SOLVE:
        network_id = session.get_one(NetworkVersion, job.version_id).network_id
        path = "simulations" if job.kind == JobKind.SIMULATE else "what-if"
        raise UnknownJobError(
            f"job {job_id} is not a solve; read it at /v1/networks/{network_id}/{path}/{job_id}"
        )
    return job


def solve_jobs(
    session: Session, tenant_id: int, state: str | None, limit: int
) -> Sequence[SolveJob]:
    """The tenant's solve jobs, newest first, optionally of one state."""
    return list_jobs(session, state, limit, tenant_id=tenant_id)


def _current(session: Session, network: Network) -> tuple[NetworkVersion, NetworkSpec]:
    version = latest_version(session, network.id)
    assert version is not None, "a network always has a version"
    return version, NetworkSpec.model_validate_json(version.spec_json)


def _check_analysis_cap(session: Session, tenant_id: int, settings: Settings) -> None:
    live = live_analysis_jobs(session, tenant_id)
    if live >= settings.analysis_max_live_jobs:
        raise AnalysisCapError(
            f"{live} simulations or what-if comparisons of this tenant are queued or running "
            f"(at most {settings.analysis_max_live_jobs}); start another when one has finished",
            retry_after=_ANALYSIS_RETRY_SECONDS,
        )


def start_simulation(
    session: Session, network: Network, params: SimulationRequest, settings: Settings
) -> tuple[NetworkVersion, SolveJob]:
    """Queue a simulation of the network's current version (with a seed chosen when absent).

    Raises AnalysisInputError, ModelTooLargeError (service.analysis.check_simulation) and
    AnalysisCapError."""
    version, spec = _current(session, network)
    check_simulation(
        spec,
        params,
        limits=settings.size_limits,
        max_replication_days=settings.simulation_max_replication_days,
        method=version.method,
    )
    _check_analysis_cap(session, network.tenant_id, settings)
    seeded = params.model_copy(update={"seed": new_seed() if params.seed is None else params.seed})
    job = enqueue_analysis(
        session,
        network.tenant_id,
        version,
        JobKind.SIMULATE,
        params.criterion,
        seeded.model_dump_json(by_alias=True),
    )
    return version, job


@dataclass(frozen=True)
class WhatIfAnswer:
    """A what-if comparison of the current version: answered at once (`result`, the fields of
    service.analysis.run_what_if) or queued (`job`)."""

    version: NetworkVersion
    result: dict[str, Any] | None = None
    job: SolveJob | None = None


def start_what_if(
    session: Session, network: Network, request: WhatIfRequest, settings: Settings
) -> WhatIfAnswer:
    """Compare the current version with the version the overrides would make: at once when
    both networks are exact and within `what_if_sync_max_states`, else queued (priced networks
    always are).

    Raises AnalysisInputError (overrides that do not fit the network), ModelTooLargeError and
    AnalysisCapError."""
    version, spec = _current(session, network)
    changed = apply_overrides(spec, request.overrides)
    limits = settings.size_limits
    methods = {resolve_method(candidate, network.mode, limits) for candidate in (spec, changed)}
    if methods == {"exact"} and (
        max(check_size(candidate, limits)[0] for candidate in (spec, changed))
        <= settings.what_if_sync_max_states
    ):
        result = run_what_if(
            spec, request.overrides, criterion=request.criterion, limits=limits, mode=network.mode
        )
        return WhatIfAnswer(version, result=result)
    _check_analysis_cap(session, network.tenant_id, settings)
    # exclude_unset: an absent max_units_per_night keeps the limit, a null one lifts it.
    job = enqueue_analysis(
        session,
        network.tenant_id,
        version,
        JobKind.WHAT_IF,
        request.criterion,
        request.model_dump_json(by_alias=True, exclude_unset=True),
    )
    return WhatIfAnswer(version, job=job)


def find_analysis(
    session: Session, tenant_id: int, network: Network, kind: JobKind, job_id: int
) -> tuple[SolveJob, NetworkVersion]:
    """The tenant's simulation or comparison `job_id` of the network, with its version;
    UnknownJobError otherwise."""
    found = analysis_job(session, tenant_id, network.id, kind, job_id)
    if found is None:
        what = "simulation" if kind is JobKind.SIMULATE else "what-if comparison"
        raise UnknownJobError(f"no {what} {job_id} of network {network.id}")
    return found
