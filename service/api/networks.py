"""Networks and their versions."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Header, Response, status

from service.api.deps import NetworkId, Reader, SessionDep, SettingsDep, Writer, get_network
from service.api.views import network_out, network_solves_out
from service.db import networks as db_networks
from service.db import reporting
from service.db.jobs import criteria_requested
from service.db.networks import (
    add_version,
    latest_version,
    network_by_name,
    versions_newest_first,
)
from service.db.tables import SolveMode, Tenant
from service.modes import resolve_method
from service.problems import Conflict, PreconditionFailed, PreconditionRequired
from service.schemas import NetworkCreate, NetworkCreated, NetworkOut, NetworkUpdate, VersionOut
from solver import NetworkSpec

router = APIRouter(prefix="/v1/networks", tags=["networks"])


IfMatch = Annotated[str | None, Header(description="The current version number, as given in ETag.")]


def etag(version: int) -> str:
    return f'"{version}"'


def check_if_match(network_id: int, current: int, if_match: str | None) -> None:
    """428 without If-Match, 412 when it does not name the current version (or *)."""
    if if_match is None:
        raise PreconditionRequired(
            f"send If-Match: {etag(current)} (the current version) to change network {network_id}"
        )
    wanted = {tag.strip().removeprefix("W/").strip('"') for tag in if_match.split(",")}
    if str(current) not in wanted and "*" not in wanted:
        raise PreconditionFailed(
            f"network {network_id} is at version {current}, not {if_match}",
            current_version=current,
        )


@router.post("", status_code=status.HTTP_201_CREATED, response_model=NetworkCreated)
def create_network(
    body: NetworkCreate,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
    response: Response,
) -> NetworkOut:
    """Store a new network as version 1 and queue its solves; 422 with the sizes when it is
    larger than its solving mode accepts."""
    spec = body.spec()
    mode = body.mode or SolveMode.AUTO.value
    method = resolve_method(spec, mode, settings.size_limits)
    if network_by_name(session, caller.tenant_id, spec.name) is not None:
        raise Conflict(
            f"a network named {spec.name!r} exists already; PUT /v1/networks/{{id}} adds a version"
        )
    tenant = session.get_one(Tenant, caller.tenant_id)
    network, version, jobs = db_networks.create_network(
        session, tenant, spec, body.criteria, mode=mode, method=method
    )
    network.closing_cutoff = body.closing_cutoff
    response.headers["Location"] = f"/v1/networks/{network.id}"
    response.headers["ETag"] = etag(version.number)
    return network_out(session, network, jobs)


@router.get("", response_model=list[NetworkOut])
def list_networks(
    session: SessionDep, caller: Reader, include_archived: bool = False
) -> list[NetworkOut]:
    # Three statements whatever the number of networks (service.db.reporting).
    return [
        network_solves_out(solves)
        for solves in reporting.solve_states(
            session, tenant_id=caller.tenant_id, include_archived=include_archived
        )
    ]


@router.get("/{network_id}", response_model=NetworkOut)
def get_network_state(
    network_id: NetworkId, session: SessionDep, caller: Reader, response: Response
) -> NetworkOut:
    """The current version and the solve state of each criterion."""
    network = get_network(session, caller.tenant_id, network_id, archived_ok=True)
    out = network_out(session, network)
    response.headers["ETag"] = etag(out.version)
    return out


@router.put("/{network_id}", response_model=NetworkCreated)
def update_network(
    network_id: NetworkId,
    body: NetworkUpdate,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
    response: Response,
    if_match: IfMatch = None,
) -> NetworkOut:
    """Add the next version; If-Match must name the current version. An absent `mode` keeps the
    network's; a mode that changes the method queues the new method's solves."""
    network = get_network(session, caller.tenant_id, network_id)
    current = latest_version(session, network.id)
    assert current is not None
    check_if_match(network_id, current.number, if_match)
    spec: NetworkSpec = body.spec()
    mode = body.mode or network.mode
    method = resolve_method(spec, mode, settings.size_limits)
    if spec.name != network.name:
        other = network_by_name(session, caller.tenant_id, spec.name)
        if other is not None and other.id != network.id:
            raise Conflict(f"another network is named {spec.name!r}")
        network.name = spec.name
    # Absent criteria carry over, as calibration apply does: an exported specification sent
    # back as the next version keeps every criterion it was solved for.
    criteria = (
        body.criteria
        or criteria_requested(session, network.tenant_id, current.spec_hash)
        or ["discounted"]
    )
    network.mode = mode
    version, jobs = add_version(session, network, spec, criteria, method=method)
    if body.closing_cutoff is not None:
        network.closing_cutoff = body.closing_cutoff
    if current.calibrated_at is not None and _same_laws(
        NetworkSpec.model_validate_json(current.spec_json), spec
    ):
        # The estimated numbers were sent back unchanged (e.g. only a capacity changed): they
        # are still the estimates of that calibration.
        version.calibrated_at = current.calibrated_at
    response.headers["ETag"] = etag(version.number)
    return network_out(session, network, jobs)


def _same_laws(before: NetworkSpec, after: NetworkSpec) -> bool:
    """Whether every location of `after` has the demand and replenishment it had in `before`."""
    laws = {loc.id: (loc.demand, loc.replenishment) for loc in before.locations}
    return all(laws.get(loc.id) == (loc.demand, loc.replenishment) for loc in after.locations)


@router.delete("/{network_id}", status_code=status.HTTP_204_NO_CONTENT)
def archive_network(network_id: NetworkId, session: SessionDep, caller: Writer) -> Response:
    """Archive the network: it is kept, but serves no more recommendations."""
    network = get_network(session, caller.tenant_id, network_id)
    network.archived = True
    return Response(status_code=status.HTTP_204_NO_CONTENT)


@router.get("/{network_id}/versions", response_model=list[VersionOut])
def list_versions(network_id: NetworkId, session: SessionDep, caller: Reader) -> list[VersionOut]:
    network = get_network(session, caller.tenant_id, network_id, archived_ok=True)
    return [
        VersionOut(
            number=version.number,
            spec_hash=version.spec_hash,
            created_at=version.created_at,
            spec=NetworkSpec.model_validate_json(version.spec_json),
        )
        for version in versions_newest_first(session, network.id)
    ]
