"""Use cases of networks and their versions, shared by the API and the command line.

Every write of a network goes through here: creating one, adding a version (a PUT, a
calibration applied by hand or automatically, a CLI import), archiving. Each new version is
checked against the size limits of its solving mode once, here (service.modes.resolve_method:
ModelTooLargeError names the sizes), before anything is written, and its solves are queued
for the criteria asked for or, when none are given, those the current version is solved for.

Functions take the caller's Session and leave committing to it; they raise the errors of
service.errors (and the solver's ModelTooLargeError), never HTTP ones.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, time

from sqlalchemy.orm import Session

from service.db import reporting
from service.db.jobs import criteria_requested
from service.db.keys import get_or_create_tenant, get_tenant
from service.db.networks import (
    add_version,
    canonical_spec,
    latest_version,
    network_by_name,
    versions_newest_first,
)
from service.db.networks import create_network as store_network
from service.db.tables import Network, NetworkVersion, SolveJob
from service.errors import NetworkArchivedError, NetworkNameTakenError
from service.modes import resolve_method
from service.vocabulary import SolveMode
from solver import NetworkSpec, SizeLimits
from solver.result import CRITERIA

__all__ = [
    "Network",
    "NetworkSolves",
    "NetworkVersion",
    "Written",
    "add_network_version",
    "archive_network",
    "create_network",
    "import_network",
    "network_state",
    "network_states",
    "tenant_network",
    "versions_of",
]

# What the use cases return: the rows of a network and of one of its versions, and a network
# with its current version and the solve state of each criterion.
NetworkSolves = reporting.NetworkSolves


@dataclass(frozen=True)
class Written:
    """A network after a write: its new version and the solve jobs that version queued (none
    when every criterion is solved or being solved for the same specification already).
    `unchanged`: an import that wrote nothing, `version` being the current one."""

    network: Network
    version: NetworkVersion
    jobs: list[SolveJob]
    unchanged: bool = False


def create_network(
    session: Session,
    tenant_id: int,
    spec: NetworkSpec,
    criteria: Sequence[str],
    *,
    mode: str | None,
    limits: SizeLimits,
    closing_cutoff: time | None = None,
) -> Written:
    """A new network of the tenant as version 1 of `spec` (mode default: auto).

    Raises ModelTooLargeError beyond the mode's limits, NetworkNameTakenError when the tenant
    has a network of that name."""
    mode = mode or SolveMode.AUTO.value
    method = resolve_method(spec, mode, limits)
    if network_by_name(session, tenant_id, spec.name) is not None:
        raise NetworkNameTakenError(
            f"a network named {spec.name!r} exists already; PUT /v1/networks/{{id}} adds a version"
        )
    tenant = get_tenant(session, tenant_id)
    network, version, jobs = store_network(
        session, tenant, spec, criteria, mode=mode, method=method
    )
    network.closing_cutoff = closing_cutoff
    return Written(network, version, jobs)


def add_network_version(
    session: Session,
    network: Network,
    spec: NetworkSpec,
    *,
    limits: SizeLimits,
    criteria: Sequence[str] | None = None,
    mode: str | None = None,
    closing_cutoff: time | None = None,
    calibrated_at: datetime | None = None,
    check_current: Callable[[NetworkVersion], None] | None = None,
    current: NetworkVersion | None = None,
) -> Written:
    """The next version of `network`: `spec` solved in `mode` (absent: the network's), for
    `criteria` (absent: those the current version is solved or being solved for, else
    discounted). The current version is read once; `check_current` sees it before anything is
    written (e.g. an If-Match check); `current`: the current version when the caller has read
    it already.

    `calibrated_at` marks estimates from sales history; without it, the new version keeps the
    current version's calibration time when every location's demand and replenishment are
    those of the current version (only, e.g., a capacity changed).

    Raises ModelTooLargeError beyond the mode's limits, NetworkNameTakenError when `spec`
    renames the network to the name of another of the tenant's."""
    if current is None:
        current = latest_version(session, network.id)
    assert current is not None, "a network always has a version"
    if check_current is not None:
        check_current(current)
    mode = mode or network.mode
    return _next_version(
        session,
        network,
        current,
        spec,
        mode=mode,
        method=resolve_method(spec, mode, limits),
        criteria=criteria,
        closing_cutoff=closing_cutoff,
        calibrated_at=calibrated_at,
    )


def _next_version(
    session: Session,
    network: Network,
    current: NetworkVersion,
    spec: NetworkSpec,
    *,
    mode: str,
    method: str,
    criteria: Sequence[str] | None,
    closing_cutoff: time | None = None,
    calibrated_at: datetime | None = None,
) -> Written:
    if spec.name != network.name:
        other = network_by_name(session, network.tenant_id, spec.name)
        if other is not None and other.id != network.id:
            raise NetworkNameTakenError(f"another network is named {spec.name!r}")
        network.name = spec.name
    # Absent criteria carry over: an exported specification sent back as the next version
    # keeps every criterion it was solved for.
    criteria = (
        list(criteria or ())
        or criteria_requested(session, network.tenant_id, current.spec_hash)
        or [CRITERIA[0]]
    )
    network.mode = SolveMode(mode)
    version, jobs = add_version(session, network, spec, criteria, method=method, previous=current)
    if closing_cutoff is not None:
        network.closing_cutoff = closing_cutoff
    if calibrated_at is not None:
        version.calibrated_at = calibrated_at
    elif current.calibrated_at is not None and _same_laws(
        NetworkSpec.model_validate_json(current.spec_json), spec
    ):
        # The estimated numbers were sent back unchanged: they are still the estimates of
        # that calibration.
        version.calibrated_at = current.calibrated_at
    return Written(network, version, jobs)


def _same_laws(before: NetworkSpec, after: NetworkSpec) -> bool:
    """Whether every location of `after` has the demand and replenishment it had in `before`."""
    laws = {loc.id: (loc.demand, loc.replenishment) for loc in before.locations}
    return all(laws.get(loc.id) == (loc.demand, loc.replenishment) for loc in after.locations)


def archive_network(network: Network) -> None:
    """Keep the network, but serve and accept nothing more for it."""
    network.archived = True


def import_network(
    session: Session,
    tenant: str,
    spec: NetworkSpec,
    criteria: Sequence[str],
    *,
    mode: str | None,
    limits: SizeLimits,
    skip_unchanged: bool = False,
) -> Written:
    """The command line's import: a new network of the tenant (created when missing) named
    after `spec`, or the next version of the one of that name. An absent `mode` keeps an
    existing network's; a new one defaults to auto. With `skip_unchanged`, nothing is written
    when the current version has the same specification and method (`unchanged`).

    Raises ModelTooLargeError beyond the mode's limits (nothing written), NetworkArchivedError
    when the network of that name is archived."""
    owner = get_or_create_tenant(session, tenant)
    network = network_by_name(session, owner.id, spec.name)
    if network is None:
        return create_network(session, owner.id, spec, criteria, mode=mode, limits=limits)
    if network.archived:
        raise NetworkArchivedError(f"network {network.id} ({spec.name!r}) is archived")
    mode = mode or network.mode
    method = resolve_method(spec, mode, limits)
    current = latest_version(session, network.id)
    assert current is not None, "a network always has a version"
    if skip_unchanged and current.spec_hash == canonical_spec(spec)[1] and current.method == method:
        return Written(network, current, [], unchanged=True)
    return _next_version(
        session, network, current, spec, mode=mode, method=method, criteria=criteria
    )


def tenant_network(session: Session, tenant_id: int, network_id: int) -> Network | None:
    """The tenant's network of that id, archived or not; None when there is none (another
    tenant's network is none of the caller's)."""
    network = session.get(Network, network_id)
    if network is None or network.tenant_id != tenant_id:
        return None
    return network


def network_state(session: Session, network: Network) -> NetworkSolves:
    """`network` with its current version and the solve state of each criterion (archived or
    not)."""
    [solves] = reporting.solve_states(
        session, tenant_id=network.tenant_id, network_id=network.id, include_archived=True
    )
    return solves


def network_states(
    session: Session, tenant_id: int, *, include_archived: bool = False
) -> list[NetworkSolves]:
    """Each of the tenant's networks with its current version and the solve state of each
    criterion, in three statements whatever the number of networks (service.db.reporting).
    Items of assortments are left out: their assortment lists them."""
    return reporting.solve_states(
        session, tenant_id=tenant_id, include_archived=include_archived, include_items=False
    )


def versions_of(session: Session, network: Network) -> list[NetworkVersion]:
    """The network's versions, newest first."""
    return list(versions_newest_first(session, network.id))
