"""Whether the API can serve: the use case behind the readiness probe (/readyz)."""

from __future__ import annotations

from sqlalchemy import Engine
from sqlalchemy.exc import SQLAlchemyError

from service.db.migrate import require_migrated
from service.errors import DatabaseNotMigratedError

__all__ = ["not_ready_reason"]


def not_ready_reason(engine: Engine) -> str | None:
    """Why requests cannot be served yet: the database is unreachable, or not at the schema
    revision this code needs (the message says which and what to run); None when ready."""
    try:
        require_migrated(engine)
    except DatabaseNotMigratedError as exc:
        return str(exc)
    except SQLAlchemyError:
        return "database unreachable"
    return None
