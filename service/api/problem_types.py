"""What each problem `type` means: the URIs `/problems/<slug>` that problem details name."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path

from service.api.schemas.problem_types import ProblemTypeOut
from service.problems import PROBLEM_RESPONSES, PROBLEM_TYPES, TYPE_BASE, NotFound

__all__ = ["router"]

router = APIRouter(prefix="/problems", tags=["problems"])


def _out(slug: str) -> ProblemTypeOut:
    title, description = PROBLEM_TYPES[slug]
    return ProblemTypeOut(type=TYPE_BASE + slug, title=title, description=description)


@router.get("", response_model=list[ProblemTypeOut])
def list_problem_types() -> list[ProblemTypeOut]:
    """Every problem type this service answers with. No key needed."""
    return [_out(slug) for slug in sorted(PROBLEM_TYPES)]


@router.get(
    "/{slug}",
    response_model=ProblemTypeOut,
    responses={
        404: {**PROBLEM_RESPONSES[404], "description": "No such problem type"},
        422: {**PROBLEM_RESPONSES[422], "description": "Not a problem type's slug"},
    },
)
def get_problem_type(
    slug: Annotated[
        str, Path(pattern="^[a-z0-9-]{1,100}$", description="The last part of a problem's type.")
    ],
) -> ProblemTypeOut:
    """What one problem type means and what to do about it. No key needed."""
    if slug not in PROBLEM_TYPES:
        raise NotFound(f"no problem type {slug!r}; GET /problems lists them")
    return _out(slug)
