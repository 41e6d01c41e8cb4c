"""Networks and their versions."""

from __future__ import annotations

from fastapi import APIRouter, Response, status

from service import networks
from service.api.deps import NetworkId, Reader, SessionDep, SettingsDep, Writer, get_network
from service.api.schemas.networks import (
    NetworkCreate,
    NetworkCreated,
    NetworkOut,
    NetworkUpdate,
    VersionOut,
)
from service.api.versions import IfMatch, check_if_match, etag
from service.api.views import network_out, network_solves_out
from service.problems import Conflict
from solver import NetworkSpec

router = APIRouter(prefix="/v1/networks", tags=["networks"])


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
    written = networks.create_network(
        session,
        caller.tenant_id,
        body.spec(),
        body.criteria,
        mode=body.mode,
        limits=settings.size_limits,
        closing_cutoff=body.closing_cutoff,
    )
    response.headers["Location"] = f"/v1/networks/{written.network.id}"
    response.headers["ETag"] = etag(written.version.number)
    return network_out(session, written.network, written.jobs)


@router.get("", response_model=list[NetworkOut])
def list_networks(
    session: SessionDep, caller: Reader, include_archived: bool = False
) -> list[NetworkOut]:
    # Three statements whatever the number of networks (service.db.reporting).
    return [
        network_solves_out(solves)
        for solves in networks.network_states(
            session, caller.tenant_id, include_archived=include_archived
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
    if network.assortment_id is not None:
        raise Conflict(
            f"network {network_id} is item {network.item_code!r} of assortment "
            f"{network.assortment_id}: change it with POST /v1/assortments/"
            f"{network.assortment_id}/items"
        )
    written = networks.add_network_version(
        session,
        network,
        body.spec(),
        limits=settings.size_limits,
        criteria=body.criteria,
        mode=body.mode,
        closing_cutoff=body.closing_cutoff,
        check_current=lambda current: check_if_match(network_id, current.number, if_match),
    )
    response.headers["ETag"] = etag(written.version.number)
    return network_out(session, network, written.jobs)


@router.delete("/{network_id}", status_code=status.HTTP_204_NO_CONTENT)
def archive_network(network_id: NetworkId, session: SessionDep, caller: Writer) -> Response:
    """Archive the network: it is kept, but serves no more recommendations."""
    networks.archive_network(get_network(session, caller.tenant_id, network_id))
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
        for version in networks.versions_of(session, network)
    ]
