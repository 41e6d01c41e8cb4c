"""RFC 9457 problem details and the problem types the service serves."""

from __future__ import annotations

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
)

__all__ = [
    "Problem",
    "ProblemTypeOut",
]


class Problem(BaseModel):
    """RFC 9457 problem details."""

    model_config = ConfigDict(extra="allow")

    type: str = Field(description="URI of the problem type: /problems/<slug>, served by this API.")
    title: str = Field(description="Short summary of the problem type.")
    status: int = Field(description="The HTTP status code.")
    detail: str = Field(description="What went wrong with this request, in words.")
    instance: str | None = Field(default=None, description="The request path.")


class ProblemTypeOut(BaseModel):
    """One kind of problem: what a problem's `type` URI names."""

    type: str = Field(description="The URI problems of this kind carry, e.g. /problems/not-found.")
    title: str = Field(description="The short summary every problem of this kind carries.")
    description: str = Field(description="What it means and what to do about it.")
