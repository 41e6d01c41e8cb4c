"""JSON pointers (RFC 6901) into request bodies, as problem details name the fields at fault."""

from __future__ import annotations

__all__ = ["json_pointer"]


def json_pointer(*tokens: str | int) -> str:
    """The pointer to the member reached by `tokens` from the document's root: each token with
    "~" escaped as "~0" and "/" as "~1" (RFC 6901, section 3); "" for the root itself."""
    return "".join("/" + str(token).replace("~", "~0").replace("/", "~1") for token in tokens)
