"""Reading network specifications and writing results: whole files or nothing."""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from service.errors import UsageError
from service.timezones import known_timezone
from solver import NetworkSpec

__all__ = ["describe_validation_error", "load_network", "write_json_atomically"]


def load_network(path: Path) -> NetworkSpec:
    """Read and validate a network specification; UsageError with one line when it is bad."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise UsageError(f"cannot read {path}: {exc.strerror or exc}") from exc
    try:
        document = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UsageError(f"{path}: not valid JSON: {exc.msg} at line {exc.lineno}") from exc
    try:
        spec = NetworkSpec.model_validate(document)
    except ValidationError as exc:
        raise UsageError(f"{path}: {describe_validation_error(exc)}") from exc
    try:
        known_timezone(spec.timezone)
    except ValueError as exc:
        raise UsageError(f"{path}: timezone: {exc}") from exc
    return spec


def describe_validation_error(exc: ValidationError) -> str:
    """All problems of a specification on one line: `where: what; where: what`."""
    parts = []
    for error in exc.errors(include_url=False):
        where = ".".join(str(part) for part in error["loc"]) or "network"
        parts.append(f"{where}: {error['msg']}")
    return "; ".join(parts)


def write_json_atomically(path: Path, document: dict[str, Any]) -> None:
    """Write all of `document` or nothing: a temporary file beside `path`, then a rename."""
    try:
        descriptor, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    except OSError as exc:
        raise UsageError(f"cannot write {path}: {exc.strerror or exc}") from exc
    temporary = Path(name)
    try:
        with os.fdopen(descriptor, "w", encoding="utf-8") as handle:
            json.dump(document, handle, allow_nan=False, separators=(",", ":"))
            handle.write("\n")
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
