"""Errors raised by the solver. Every message names what is wrong in the planner's terms."""

from __future__ import annotations

__all__ = [
    "InvalidModelError",
    "InvalidStockError",
    "ModelTooLargeError",
    "NotUnichainError",
    "SolverError",
]


class SolverError(Exception):
    """Base class of every error the solver raises on purpose."""


class InvalidModelError(SolverError):
    """The arrays of a transfer model are inconsistent (shapes, probabilities, rewards)."""


class InvalidStockError(SolverError, ValueError):
    """A stock vector does not fit the network (wrong length, negative, over capacity)."""


class ModelTooLargeError(SolverError):
    """The network has more states or state-action pairs than the configured limits allow."""

    def __init__(self, message: str, *, states: int, pairs: int | None) -> None:
        super().__init__(message)
        self.states = states
        self.pairs = pairs


class NotUnichainError(SolverError):
    """A policy splits the network into separate recurrent classes, so the long-run profit per
    day depends on the starting stock and the average criterion has no single answer."""
