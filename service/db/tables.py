"""Tables: tenants, networks and their versions, solve jobs, and stored policies.

A policy is keyed by (tenant, specification hash, criterion): versions of any network of one
tenant with identical specifications share it. A job is live while queued or running; a partial
unique index allows one live solve job per (tenant, hash, criterion), and a unique constraint one
policy, so no specification is ever solved into two live policies. The same queue runs
simulations and what-if comparisons (`kind`), which the index leaves alone: several may run for
one specification.
"""

from __future__ import annotations

from datetime import date, datetime, time
from enum import StrEnum

from sqlalchemy import (
    Boolean,
    Date,
    DateTime,
    Enum,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    Time,
    UniqueConstraint,
    text,
)
from sqlalchemy.orm import Mapped, mapped_column, relationship

from service.db.base import Base, utcnow
from service.vocabulary import JobKind, JobState, SolveMethod, SolveMode
from solver import CRITERIA, Criterion

__all__ = [
    "ApiKey",
    "Assortment",
    "CalibrationSettings",
    "ClosingCorrection",
    "ClosingCount",
    "IdempotencyRecord",
    "Instruction",
    "Network",
    "NetworkVersion",
    "PickList",
    "Policy",
    "SalesDay",
    "SolveJob",
    "Tenant",
]

_HASH = String(64)


def _choice(name: str, values: type[StrEnum] | tuple[str, ...], length: int) -> Enum:
    """A text column that holds one of `values` (an enum's values, or plain strings), read
    back as the enum's members. The database checks it too, by a CHECK constraint named
    ck_<table>_<name> (migration 0010): a row written by hand cannot hold another word."""
    words = tuple(values) if isinstance(values, tuple) else (values,)
    return Enum(
        *words,
        name=name,
        native_enum=False,
        create_constraint=True,
        length=length,
        validate_strings=True,
        values_callable=lambda members: [str(getattr(m, "value", m)) for m in members],
    )


# The service's words as column types, one definition each (service.vocabulary, solver.CRITERIA).
CRITERION = _choice("criterion", CRITERIA, 16)
JOB_KIND = _choice("job_kind", JobKind, 16)
JOB_STATE = _choice("job_state", JobState, 16)
SOLVE_METHOD = _choice("solve_method", SolveMethod, 8)
SOLVE_MODE = _choice("solve_mode", SolveMode, 8)


class Tenant(Base):
    __tablename__ = "tenants"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class Network(Base):
    __tablename__ = "networks"
    __table_args__ = (UniqueConstraint("tenant_id", "name"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    tenant_id: Mapped[int] = mapped_column(ForeignKey("tenants.id"), index=True)
    name: Mapped[str] = mapped_column(String(200))
    archived: Mapped[bool] = mapped_column(Boolean, default=False)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    # Local time of day (in the specification's time zone) before which a closing count still
    # belongs to the previous business date; None: midnight. Kept here, not in the
    # specification: it changes no number of the model, so changing it must not change the
    # specification's hash and queue a new solve.
    closing_cutoff: Mapped[time | None] = mapped_column(Time)
    mode: Mapped[SolveMode] = mapped_column(
        SOLVE_MODE, default=SolveMode.AUTO, server_default=SolveMode.AUTO.value
    )
    # An item of an assortment is a network on the assortment's layout (service.assortment_spec):
    # its specification is composed from the layout and the item, and it changes only through
    # the assortment. None for a network of its own.
    assortment_id: Mapped[int | None] = mapped_column(ForeignKey("assortments.id"), index=True)
    item_code: Mapped[str | None] = mapped_column(String(100))
    # Room one unit of the item takes on a lane's shared truck (the layout's unit); not part of
    # the item's own model, so not of its specification either.
    unit_volume: Mapped[float | None] = mapped_column(Float)

    versions: Mapped[list[NetworkVersion]] = relationship(
        back_populates="network", order_by="NetworkVersion.number"
    )


class Assortment(Base):
    """A store layout shared by many items (service.assortment_spec.Layout as JSON); each item is
    a network of its own (Network.assortment_id). `layout_version` counts the layout's changes."""

    __tablename__ = "assortments"
    __table_args__ = (UniqueConstraint("tenant_id", "name"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    tenant_id: Mapped[int] = mapped_column(ForeignKey("tenants.id"), index=True)
    name: Mapped[str] = mapped_column(String(200))
    layout_json: Mapped[str] = mapped_column(Text)
    layout_version: Mapped[int] = mapped_column(Integer, default=1)
    # The criteria every item is solved for (JSON list), its solving mode and closing cut-off,
    # as for a single network.
    criteria: Mapped[str] = mapped_column(Text)
    mode: Mapped[SolveMode] = mapped_column(SOLVE_MODE, default=SolveMode.AUTO)
    closing_cutoff: Mapped[time | None] = mapped_column(Time)
    archived: Mapped[bool] = mapped_column(Boolean, default=False)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class PickList(Base):
    """Every item's moves of one business date, computed once from all locations' closing
    reports and kept; a correction of a count issues the next revision. `body` is the lines as
    zlib-compressed JSON, `summary` (JSON) the totals and the shared-capacity figures."""

    __tablename__ = "pick_lists"
    __table_args__ = (UniqueConstraint("assortment_id", "business_date", "revision"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    assortment_id: Mapped[int] = mapped_column(ForeignKey("assortments.id"))
    business_date: Mapped[date] = mapped_column(Date)
    revision: Mapped[int] = mapped_column(Integer, default=1)
    computed_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    body: Mapped[bytes] = mapped_column(LargeBinary)
    summary: Mapped[str] = mapped_column(Text)


class NetworkVersion(Base):
    __tablename__ = "network_versions"
    __table_args__ = (UniqueConstraint("network_id", "number"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    network_id: Mapped[int] = mapped_column(ForeignKey("networks.id"))
    number: Mapped[int] = mapped_column(Integer)
    spec_json: Mapped[str] = mapped_column(Text)
    spec_hash: Mapped[str] = mapped_column(_HASH, index=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    # When the demand and replenishment of this version were estimated from sales history;
    # None for a specification sent as it is.
    calibrated_at: Mapped[datetime | None] = mapped_column(DateTime)
    # The network's mode resolved for this specification when the version was made.
    method: Mapped[SolveMethod] = mapped_column(
        SOLVE_METHOD, default=SolveMethod.EXACT, server_default=SolveMethod.EXACT.value
    )

    network: Mapped[Network] = relationship(back_populates="versions")


class SolveJob(Base):
    __tablename__ = "solve_jobs"
    __table_args__ = (
        Index(
            "uq_solve_jobs_live",
            "tenant_id",
            "spec_hash",
            "criterion",
            "method",
            unique=True,
            sqlite_where=text("state IN ('queued', 'running') AND kind = 'solve'"),
            postgresql_where=text("state IN ('queued', 'running') AND kind = 'solve'"),
        ),
        Index("ix_solve_jobs_state_id", "state", "id"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    tenant_id: Mapped[int] = mapped_column(ForeignKey("tenants.id"))
    version_id: Mapped[int] = mapped_column(ForeignKey("network_versions.id"), index=True)
    spec_hash: Mapped[str] = mapped_column(_HASH)
    criterion: Mapped[Criterion] = mapped_column(CRITERION)
    kind: Mapped[JobKind] = mapped_column(
        JOB_KIND, default=JobKind.SOLVE, server_default=JobKind.SOLVE.value
    )
    state: Mapped[JobState] = mapped_column(JOB_STATE, default=JobState.QUEUED)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    lease_owner: Mapped[str | None] = mapped_column(String(200))
    lease_expires_at: Mapped[datetime | None] = mapped_column(DateTime)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(DateTime)
    finished_at: Mapped[datetime | None] = mapped_column(DateTime)
    solve_seconds: Mapped[float | None] = mapped_column(Float)
    iterations: Mapped[int | None] = mapped_column(Integer)
    residual: Mapped[float | None] = mapped_column(Float)
    error: Mapped[str | None] = mapped_column(Text)
    # Simulations and what-if comparisons: the request as JSON, and the report once done.
    params: Mapped[str | None] = mapped_column(Text)
    result: Mapped[str | None] = mapped_column(Text)
    method: Mapped[SolveMethod] = mapped_column(
        SOLVE_METHOD, default=SolveMethod.EXACT, server_default=SolveMethod.EXACT.value
    )
    # A running priced solve's latest progress as JSON (stage, iteration, bounds, elapsed).
    progress: Mapped[str | None] = mapped_column(Text)

    version: Mapped[NetworkVersion] = relationship()

    @property
    def network_id(self) -> int:
        return self.version.network_id

    @property
    def version_number(self) -> int:
        return self.version.number


class Policy(Base):
    __tablename__ = "policies"
    __table_args__ = (UniqueConstraint("tenant_id", "spec_hash", "criterion", "method"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    tenant_id: Mapped[int] = mapped_column(ForeignKey("tenants.id"))
    spec_hash: Mapped[str] = mapped_column(_HASH)
    criterion: Mapped[Criterion] = mapped_column(CRITERION)
    job_id: Mapped[int | None] = mapped_column(ForeignKey("solve_jobs.id"))
    method: Mapped[SolveMethod] = mapped_column(
        SOLVE_METHOD, default=SolveMethod.EXACT, server_default=SolveMethod.EXACT.value
    )
    # Arrays (action, values, ...) as one zlib-compressed blob; `layout` (JSON) gives each
    # array's name, dtype, shape and offset, `checksum` the SHA-256 of the stored blob.
    arrays: Mapped[bytes] = mapped_column(LargeBinary)
    layout: Mapped[str] = mapped_column(Text)
    checksum: Mapped[str] = mapped_column(_HASH)
    meta: Mapped[str] = mapped_column(Text)
    gain: Mapped[float | None] = mapped_column(Float)
    residual: Mapped[float] = mapped_column(Float)
    error_bound: Mapped[float] = mapped_column(Float)
    iterations: Mapped[int] = mapped_column(Integer)
    solve_seconds: Mapped[float] = mapped_column(Float)
    solved_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class ClosingCount(Base):
    """Closing stock reported by one location for one business day; a repeat replaces it."""

    __tablename__ = "closing_counts"
    __table_args__ = (UniqueConstraint("network_id", "location_id", "business_date"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    network_id: Mapped[int] = mapped_column(ForeignKey("networks.id"))
    location_id: Mapped[str] = mapped_column(String(64))
    business_date: Mapped[date] = mapped_column(Date)
    units: Mapped[int] = mapped_column(Integer)
    reported_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class Instruction(Base):
    """Tonight's moves for a whole network on one business day, computed once from the full
    closing stock and kept, so every location reads the same answer."""

    __tablename__ = "instructions"
    __table_args__ = (UniqueConstraint("network_id", "business_date"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    network_id: Mapped[int] = mapped_column(ForeignKey("networks.id"))
    business_date: Mapped[date] = mapped_column(Date)
    version_id: Mapped[int] = mapped_column(ForeignKey("network_versions.id"))
    criterion: Mapped[Criterion] = mapped_column(CRITERION)
    # JSON: {"stock": {location: units}, "transfers": [{"from", "to", "units", "unit_cost"}],
    # "relays": [...], "notes": [...]}
    plan: Mapped[str] = mapped_column(Text)
    computed_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    # 1 when first issued; each correction of a count re-issues the plan with the next number.
    revision: Mapped[int] = mapped_column(Integer, default=1, server_default="1")


class ClosingCorrection(Base):
    """A closing count corrected after the night's instructions were issued: who (the key's
    public prefix), when, the count before and after, and the revision it produced."""

    __tablename__ = "closing_corrections"
    __table_args__ = (Index("ix_closing_corrections_network_day", "network_id", "business_date"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    network_id: Mapped[int] = mapped_column(ForeignKey("networks.id"))
    location_id: Mapped[str] = mapped_column(String(64))
    business_date: Mapped[date] = mapped_column(Date)
    old_units: Mapped[int] = mapped_column(Integer)
    new_units: Mapped[int] = mapped_column(Integer)
    revision: Mapped[int] = mapped_column(Integer)
    key_prefix: Mapped[str] = mapped_column(String(32))
    corrected_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class SalesDay(Base):
    """One location's business day as the ERP reports it; a repeat for the same day replaces
    it. Stock received during a day is on sale from the next day."""

    __tablename__ = "sales_history"
    __table_args__ = (UniqueConstraint("network_id", "location_id", "business_date"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    network_id: Mapped[int] = mapped_column(ForeignKey("networks.id"))
    location_id: Mapped[str] = mapped_column(String(64))
    business_date: Mapped[date] = mapped_column(Date)
    units_sold: Mapped[int] = mapped_column(Integer)
    stock_at_open: Mapped[int] = mapped_column(Integer)
    units_received: Mapped[int] = mapped_column(Integer)
    reported_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class CalibrationSettings(Base):
    """How a network's parameters are estimated from its history, and whether a new estimate
    that moves a parameter by more than `auto_apply_threshold` (relative) becomes a new
    version by itself."""

    __tablename__ = "calibration_settings"

    network_id: Mapped[int] = mapped_column(ForeignKey("networks.id"), primary_key=True)
    window_days: Mapped[int | None] = mapped_column(Integer)
    half_life_days: Mapped[float | None] = mapped_column(Float)
    confidence: Mapped[float] = mapped_column(Float)
    auto_apply_threshold: Mapped[float | None] = mapped_column(Float)
    # Units received in the morning may be sold the same day: a day's sales are then bounded
    # by (and sold out at) stock at open plus receipts, not stock at open alone.
    receipts_sell_same_day: Mapped[bool] = mapped_column(
        Boolean, default=False, server_default=text("false")
    )
    updated_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class ApiKey(Base):
    """An API key of a tenant. Only the SHA-256 of the key is kept; `prefix` (the public part)
    finds the row and names the key in listings."""

    __tablename__ = "api_keys"

    id: Mapped[int] = mapped_column(primary_key=True)
    tenant_id: Mapped[int] = mapped_column(ForeignKey("tenants.id"), index=True)
    prefix: Mapped[str] = mapped_column(String(32), unique=True)
    key_hash: Mapped[str] = mapped_column(_HASH)
    scope: Mapped[str] = mapped_column(String(16))
    label: Mapped[str | None] = mapped_column(String(200))
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(DateTime)


class IdempotencyRecord(Base):
    """The first response to a POST or PUT sent with an Idempotency-Key, replayed on repeats of
    the same API key. `request_id` is the first request's id (X-Request-ID)."""

    __tablename__ = "idempotency_records"
    __table_args__ = (UniqueConstraint("api_key_id", "key", "method", "path"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    api_key_id: Mapped[int] = mapped_column(ForeignKey("api_keys.id"))
    request_id: Mapped[str] = mapped_column(String(100))
    key: Mapped[str] = mapped_column(String(200))
    method: Mapped[str] = mapped_column(String(8))
    path: Mapped[str] = mapped_column(String(500))
    body_hash: Mapped[str] = mapped_column(_HASH)
    status: Mapped[int] = mapped_column(Integer)
    headers: Mapped[str] = mapped_column(Text)
    body: Mapped[bytes] = mapped_column(LargeBinary)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    expires_at: Mapped[datetime] = mapped_column(DateTime, index=True)
