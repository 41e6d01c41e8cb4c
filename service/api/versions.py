"""Network versions over HTTP: the ETag that names a version, and the If-Match a change of a
network must send with its current version (a PUT, a calibration apply)."""

from __future__ import annotations

from typing import Annotated

from fastapi import Header

from service.problems import PreconditionFailed, PreconditionRequired

__all__ = ["IfMatch", "check_if_match", "etag"]

IfMatch = Annotated[str | None, Header(description="The current version number, as given in ETag.")]


def etag(version: int) -> str:
    return f'"{version}"'


def check_if_match(
    network_id: int, current: int, if_match: str | None, *, what: str = "network"
) -> None:
    """428 without If-Match, 412 when it does not name the current version (or *); `what` is
    the kind of thing being changed (a network, an assortment's layout), for the messages."""
    if if_match is None:
        raise PreconditionRequired(
            f"send If-Match: {etag(current)} (the current version) to change {what} {network_id}"
        )
    wanted = {tag.strip().removeprefix("W/").strip('"') for tag in if_match.split(",")}
    if str(current) not in wanted and "*" not in wanted:
        raise PreconditionFailed(
            f"{what} {network_id} is at version {current}, not {if_match}",
            current_version=current,
        )
