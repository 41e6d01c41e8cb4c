"""Solve jobs as the API shows them (GET /v1/jobs, and the jobs a write queued)."""

from __future__ import annotations

import json
from typing import Any, Literal

from pydantic import (
    BaseModel,
    Field,
    field_validator,
)

from service.api.schemas.common import (
    Attempts,
    CreatedAt,
    FinishedAt,
    JobError,
    JobState,
    StartedAt,
    Timestamp,
    _Out,
)
from service.vocabulary import (
    SolveMethodName,
)

__all__ = [
    "JobOut",
    "JobProgressOut",
]


class JobProgressOut(BaseModel):
    """The latest progress a running priced solve reported."""

    stage: Literal["pricing", "planning", "certifying"] = Field(
        description="pricing: improving the lane prices; planning: simulating each candidate "
        "trade limit of the plan to keep the best; certifying: simulating the policy for its "
        "lower bound."
    )
    iteration: int = Field(
        description="Pricing iteration; planning: the candidate being simulated (1 is the "
        "plain store values); certifying: replications finished."
    )
    upper_bound: float = Field(description="Best upper bound on the optimal value so far.")
    lower_bound: float | None = Field(
        description="Best lower bound so far (the policy's simulated value); null until certifying."
    )
    elapsed: float = Field(description="Seconds since the solve started.")
    candidates: int | None = Field(
        default=None, description="Planning: how many candidates are simulated; else null."
    )
    trade_limit: int | None = Field(
        default=None,
        description="Planning: the units a store may trade on each later night under the "
        "candidate being simulated; null for the plain store values and outside planning.",
    )
    reported_at: Timestamp = Field(description="When the worker reported it (UTC).")


class JobOut(_Out):
    id: int = Field(description="The job's id (GET /v1/jobs/{job_id}).")
    network_id: int = Field(description="The network whose version is solved.")
    version_number: int = Field(description="The network version solved (as in If-Match).")
    version_id: int = Field(description="Internal id of that version's row; prefer the two above.")
    criterion: str = Field(
        description="discounted: expected discounted profit; average: long-run profit per day."
    )
    method: SolveMethodName = Field(
        default="exact", description="exact or priced: how the job solves."
    )
    state: JobState
    attempts: Attempts
    created_at: CreatedAt
    started_at: StartedAt
    finished_at: FinishedAt
    solve_seconds: float | None = Field(description="Solve time in seconds; null until done.")
    iterations: int | None = Field(description="Policy iterations the solve took; null until done.")
    residual: float | None = Field(
        description="Bellman residual of the final values (currency units); null until done."
    )
    error: JobError
    progress: JobProgressOut | None = Field(
        default=None,
        description="Priced solves: the latest progress reported while running (kept once done).",
    )

    @field_validator("progress", mode="before")
    @classmethod
    def _progress_json(cls, value: Any) -> Any:
        return json.loads(value) if isinstance(value, str) else value
