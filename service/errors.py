"""Errors of the service layer that are the user's to fix."""

from __future__ import annotations

__all__ = ["UsageError"]


class UsageError(Exception):
    """Bad input from the user: the CLI reports it as one line and exits with code 2."""
