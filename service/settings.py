"""Settings: the only reader of the environment. Every variable is prefixed `STOCKRELAY_`."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, ValidationInfo, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError
from threadpoolctl import threadpool_limits

from solver import SizeLimits

# Default bound on (days + warmup days) x replications of a simulation. Each simulated day costs
# the same whatever the number of stock states (a table look-up per policy and replication), so
# the simulation's time is bounded by this and the network's size by the solver's limits.
SIMULATION_MAX_REPLICATION_DAYS = 2_000_000

__all__ = ["Settings"]


class Settings(BaseSettings):
    """Validated at start-up; invalid values stop the process with a clear message."""

    model_config = SettingsConfigDict(env_prefix="STOCKRELAY_", frozen=True, extra="ignore")

    database_url: Annotated[
        str,
        Field(description="SQLAlchemy URL; postgresql:// URLs use psycopg 3."),
    ] = "sqlite:///./var/stockrelay.db"
    database_pool_size: Annotated[
        int,
        Field(ge=1, le=1000, description="Database connections kept open per process."),
    ] = 20
    lease_seconds: Annotated[
        float, Field(gt=0, description="How long a worker holds a job without renewing.")
    ] = 60.0
    poll_interval: Annotated[
        float, Field(gt=0, description="Seconds an idle worker waits before looking again.")
    ] = 1.0
    max_attempts: Annotated[
        int, Field(ge=1, description="Claims of one job before it is failed.")
    ] = 3
    max_states: Annotated[int, Field(ge=1)] = SizeLimits.max_states
    max_pairs: Annotated[int, Field(ge=1)] = SizeLimits.max_pairs
    policy_cache_size: Annotated[
        int, Field(ge=0, description="Decoded policies kept in memory per process.")
    ] = 64
    item_policy_cache_size: Annotated[
        int,
        Field(
            ge=0,
            description="Decoded policies of assortment items kept in memory per process "
            "(items with identical numbers share one).",
        ),
    ] = 10_000
    simulation_max_replication_days: Annotated[
        int,
        Field(
            ge=1,
            description="Largest simulation accepted: (days + warmup days) x replications.",
        ),
    ] = SIMULATION_MAX_REPLICATION_DAYS
    what_if_sync_max_states: Annotated[
        int,
        Field(
            ge=0,
            description="What-if comparisons whose networks both have at most this many stock "
            "states are answered at once; larger ones are queued for a worker.",
        ),
    ] = 20_000
    analysis_max_live_jobs: Annotated[
        int,
        Field(
            ge=1,
            description="Simulations and queued what-if comparisons one tenant may have queued "
            "or running at once; another answers 429 until one finishes. (Read keys may start "
            "them: they change no stored data, but they cost solver time.)",
        ),
    ] = 4

    rate_limit_per_second: Annotated[
        float, Field(gt=0, description="Sustained requests per second per API key.")
    ] = 200.0
    rate_limit_burst: Annotated[
        int, Field(ge=1, description="Requests per API key allowed at once above the rate.")
    ] = 400
    max_body_bytes: Annotated[int, Field(ge=1024, description="Largest request body.")] = 4_194_304
    max_upload_bytes: Annotated[
        int,
        Field(
            ge=1024,
            description="Largest bulk upload (an assortment's items, history or closing "
            "report), read as it arrives.",
        ),
    ] = 67_108_864
    idempotency_seconds: Annotated[
        float, Field(gt=0, description="How long an Idempotency-Key's response is kept.")
    ] = 86_400.0
    key_cache_seconds: Annotated[
        float, Field(ge=0, description="How long a process trusts a key it has checked.")
    ] = 5.0
    blas_threads: Annotated[
        int,
        Field(
            ge=1,
            le=256,
            description="Threads of the BLAS library per process (worker, API and CLI). One "
            "keeps a solve fast when other processes share the cores; scale out by processes.",
        ),
    ] = 1
    run_token: Annotated[
        str | None,
        Field(
            description="Set by `stockrelay run` for the API it starts: /readyz echoes it in "
            "the Stockrelay-Run header, so the supervisor knows it reached its own child and "
            "not another server on the same port.",
        ),
    ] = None
    log_format: Annotated[
        Literal["text", "json"],
        Field(description="Log lines as text for people, or one JSON object per line."),
    ] = "text"
    log_level: Annotated[
        Literal["DEBUG", "INFO", "WARNING", "ERROR"],
        Field(description="Lowest level logged (INFO includes the audit lines)."),
    ] = "WARNING"

    @field_validator("log_format", "log_level", mode="before")
    @classmethod
    def _any_case(cls, value: object, info: ValidationInfo) -> object:
        if not isinstance(value, str):
            return value
        return value.upper() if info.field_name == "log_level" else value.lower()

    @field_validator("database_url")
    @classmethod
    def _psycopg_for_postgresql(cls, url: str) -> str:
        for prefix in ("postgresql://", "postgres://"):
            if url.startswith(prefix):
                url = "postgresql+psycopg://" + url[len(prefix) :]
        example = "e.g. sqlite:///./var/stockrelay.db or postgresql://user@host:5432/database"
        try:
            backend = make_url(url).get_backend_name()
        except ArgumentError as exc:
            raise ValueError(f"not a database URL; expected {example}") from exc
        if backend not in ("sqlite", "postgresql"):
            raise ValueError(f"stockrelay stores its data in SQLite or PostgreSQL, {example}")
        return url

    def limit_blas_threads(self) -> None:
        """Apply `blas_threads` to every BLAS library this process has loaded (numpy's and
        scipy's): by default one thread per core, which collapses when the cores are busy.
        Call it from the main thread: OpenBLAS ignores the request from any other."""
        threadpool_limits(limits=self.blas_threads, user_api="blas")

    @property
    def size_limits(self) -> SizeLimits:
        return SizeLimits(max_states=self.max_states, max_pairs=self.max_pairs)
