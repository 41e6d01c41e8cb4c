"""Log output: text for people, or one JSON object per line for log collectors.

`STOCKRELAY_LOG_FORMAT=json` writes every record as one line such as

    {"time": "2026-12-02T01:54:20.911Z", "level": "INFO", "logger": "stockrelay.audit",
     "message": "...", "request_id": "265c19a1bf244e1cb04482fadf656136"}

(on one line), with any `extra=` fields of the record as further members and a formatted
traceback as `exception`. `request_id` is the id of the HTTP request being handled (the one
echoed in X-Request-ID), taken from a context variable that `problems.RequestId` sets for the
whole of the request, so lines logged from the thread pool carry it too. Messages are kept as
they are: an audit line's message is still its JSON document.

`STOCKRELAY_LOG_LEVEL` (default WARNING) is the level of the root logger.
"""

from __future__ import annotations

import json
import logging
import sys
from contextvars import ContextVar
from datetime import UTC, datetime
from typing import Any, Literal

from pydantic import ValidationError

from service.settings import Settings

__all__ = [
    "REQUEST_ID",
    "JsonFormatter",
    "LogFormat",
    "TextFormatter",
    "configure_logging",
    "configure_server_logging",
    "logging_from_environment",
]

LogFormat = Literal["text", "json"]

# The request id of the HTTP request this code runs for; None outside requests.
REQUEST_ID: ContextVar[str | None] = ContextVar("stockrelay_request_id", default=None)

# Attributes every LogRecord has; anything else on a record came from `extra=` (except
# uvicorn's `color_message`, its message again with terminal colour codes).
_STANDARD_ATTRIBUTES = frozenset(
    vars(logging.LogRecord("", logging.INFO, "", 0, "", None, None))
) | {"message", "asctime", "request_id", "request_part", "color_message"}
# uvicorn's own loggers, which it gives handlers of its own (plain text).
_SERVER_LOGGERS = ("uvicorn", "uvicorn.error", "uvicorn.access")
_HANDLER_NAME = "stockrelay"


def _request_id(record: logging.LogRecord) -> str | None:
    explicit = getattr(record, "request_id", None)
    return str(explicit) if explicit is not None else REQUEST_ID.get()


class JsonFormatter(logging.Formatter):
    """One JSON object per record: time (UTC, ISO 8601, milliseconds), level, logger, message,
    request_id when known, the record's extra fields, and exception/stack when present."""

    def format(self, record: logging.LogRecord) -> str:
        stamp = datetime.fromtimestamp(record.created, UTC)
        document: dict[str, Any] = {
            "time": stamp.isoformat(timespec="milliseconds").replace("+00:00", "Z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = _request_id(record)
        if request_id is not None:
            document["request_id"] = request_id
        for name, value in vars(record).items():
            if name not in _STANDARD_ATTRIBUTES and not name.startswith("_"):
                document.setdefault(name, value)
        if record.exc_info:
            document["exception"] = self.formatException(record.exc_info)
        if record.stack_info:
            document["stack"] = self.formatStack(record.stack_info)
        # default=str: an extra field of any type still gives a valid line.
        return json.dumps(document, default=str, ensure_ascii=False)


class TextFormatter(logging.Formatter):
    """`LEVEL logger: message`, with `[request id]` after the logger name during a request."""

    def __init__(self) -> None:
        super().__init__("%(levelname)s %(name)s%(request_part)s: %(message)s")

    def format(self, record: logging.LogRecord) -> str:
        request_id = _request_id(record)
        record.request_part = f" [{request_id}]" if request_id is not None else ""
        return super().format(record)


def configure_logging(log_format: LogFormat, level: str) -> None:
    """Send the root logger's records to standard error, formatted as `log_format`, replacing
    any handlers it had."""
    handler = logging.StreamHandler(sys.stderr)
    handler.set_name(_HANDLER_NAME)
    handler.setFormatter(JsonFormatter() if log_format == "json" else TextFormatter())
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level)


def logging_from_environment() -> None:
    """The command line's set-up, from the STOCKRELAY_LOG_* settings. Invalid settings fall
    back to text at WARNING here: the command that needs the settings reports them itself."""
    try:
        settings = Settings()
    except ValidationError:
        configure_logging("text", "WARNING")
        return
    configure_logging(settings.log_format, settings.log_level)


def configure_server_logging(settings: Settings) -> None:
    """At API start-up. In a process whose logging nobody set up (each process of
    `stockrelay serve --processes N` is spawned afresh by uvicorn), set it up from `settings`.
    When this module's handler writes JSON, uvicorn's own loggers (start-up, access lines) go
    through it too instead of their plain-text handlers. Leaves any other set-up (a test
    runner's, an embedding application's) alone."""
    root = logging.getLogger()
    if not root.handlers:
        configure_logging(settings.log_format, settings.log_level)
    ours = next((h for h in root.handlers if h.get_name() == _HANDLER_NAME), None)
    if ours is None or not isinstance(ours.formatter, JsonFormatter):
        return
    for name in _SERVER_LOGGERS:
        server_logger = logging.getLogger(name)
        for old in list(server_logger.handlers):
            server_logger.removeHandler(old)
        server_logger.propagate = True
