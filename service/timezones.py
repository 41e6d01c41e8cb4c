"""Time zones and local times: a network's `timezone` must be one the tz database knows (the
solver's specification checks only its form, since the solver reads no files), and a closing
cut-off is a local time of day in whole minutes."""

from __future__ import annotations

from datetime import time
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

__all__ = ["known_timezone", "local_cutoff"]


def known_timezone(zone: str) -> str:
    """`zone` when the tz database knows it; ValueError naming it otherwise. (The solver's
    specification checks only the form: it reads no files.)"""
    try:
        ZoneInfo(zone)
    except (ZoneInfoNotFoundError, ValueError) as exc:
        raise ValueError(
            f"unknown time zone {zone!r}; use an IANA name such as Europe/Berlin or UTC"
        ) from exc
    return zone


def local_cutoff(cutoff: time | None) -> time | None:
    """`cutoff` when it is a local time of day in whole minutes (or None); ValueError
    otherwise."""
    if cutoff is not None and (cutoff.tzinfo is not None or cutoff.second or cutoff.microsecond):
        raise ValueError("give a local time of day in whole minutes, e.g. 04:00")
    return cutoff
