"""Time zones: a network's `timezone` must be one the tz database knows (the solver's
specification checks only its form, since the solver reads no files)."""

from __future__ import annotations

from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

__all__ = ["known_timezone"]


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
