"""Words shared by storage, the worker, the CLI and the HTTP contract, each defined once.

The criterion is `solver.CRITERIA` (type `solver.Criterion`) and a weekday's name
`solver.spec.WEEKDAYS`; this module holds what only the service names:

* `JobKind`: what a job of the queue does;
* `JobState`: where a job stands;
* `SolveMode`: how a network asks to be solved (exact, priced, or auto: by its size), and
  `SolveMethod`: how a version is solved (its network's mode resolved, service.modes);
* `SolveStatus`: where the policy of a network's current version stands for one criterion
  (`service.db.reporting.solve_states`): ready, or the state of its newest solve job, or
  not_requested.

Storage maps them with typed columns (service.db.tables: JOB_KIND, JOB_STATE, SOLVE_MODE,
SOLVE_METHOD, and CRITERION for the criterion), which read back as these enums and which the
database checks (a CHECK constraint per column).

The HTTP models need a `Literal` of the same values so that the OpenAPI document lists them
inline (an enum would become a component of its own): `JobStateName`, `SolveStatusName`,
`SolveModeName` and `SolveMethodName`, which `tests/service/test_vocabulary.py` holds equal to
the enums.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Literal

__all__ = [
    "JobKind",
    "JobState",
    "JobStateName",
    "SolveMethod",
    "SolveMethodName",
    "SolveMode",
    "SolveModeName",
    "SolveStatus",
    "SolveStatusName",
]


class JobKind(StrEnum):
    SOLVE = "solve"
    SIMULATE = "simulate"
    WHAT_IF = "what_if"
    # A chunk of an assortment's calibration: estimate its items from their history and make
    # the estimates their next versions (service.assortment_history).
    CALIBRATE = "calibrate"


class JobState(StrEnum):
    QUEUED = "queued"
    RUNNING = "running"
    DONE = "done"
    FAILED = "failed"


class SolveMode(StrEnum):
    """What a network asks for."""

    EXACT = "exact"
    PRICED = "priced"
    AUTO = "auto"


class SolveMethod(StrEnum):
    """What a version is solved by (its network's mode, resolved for its size)."""

    EXACT = "exact"
    PRICED = "priced"


class SolveStatus(StrEnum):
    """Where one criterion of a network's current version stands."""

    READY = "ready"
    QUEUED = "queued"
    RUNNING = "running"
    FAILED = "failed"
    NOT_REQUESTED = "not_requested"


JobStateName = Literal["queued", "running", "done", "failed"]
SolveStatusName = Literal["ready", "queued", "running", "failed", "not_requested"]
SolveModeName = Literal["exact", "priced", "auto"]
SolveMethodName = Literal["exact", "priced"]
