"""Structured logging: one JSON object per line, events logged as dicts (never keys, bodies or secrets)."""

from __future__ import annotations

import json
import logging
import sys
import time
from typing import Any

log = logging.getLogger("equitheta.service")


def log_event(level: int, event: str, *, exc_info: bool = False, **fields: Any) -> None:
    """One structured log line: an event name and its fields (never keys, bodies or secrets).

    ``exc_info`` adds the traceback of the exception being handled.
    """
    log.log(level, event, exc_info=exc_info, extra={"fields": fields})


class JsonLogFormatter(logging.Formatter):
    """One JSON object per line: the event (or message), its fields, level, logger and time."""

    def format(self, record: logging.LogRecord) -> str:
        """One JSON line: the event, its fields, level, logger, time and any traceback."""
        fields = getattr(record, "fields", None)
        body: dict[str, Any] = (
            {"event": record.getMessage(), **fields}
            if fields is not None
            else {"event": "log", "message": record.getMessage()}
        )
        body.update(
            {
                "level": record.levelname.lower(),
                "logger": record.name,
                "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)),
            }
        )
        if record.exc_info:
            body["exception"] = self.formatException(record.exc_info)
        return json.dumps(body)


class _StderrHandler(logging.StreamHandler):  # type: ignore[type-arg]
    """Writes to whatever ``sys.stderr`` is when a record is emitted (it may be replaced after start-up)."""

    def emit(self, record: logging.LogRecord) -> None:
        self.stream = sys.stderr
        super().emit(record)


def configure_logging(level: str) -> None:
    """Send the service logger to stderr through the JSON formatter, once, at ``level``."""
    if not any(getattr(h, "_equitheta", False) for h in log.handlers):
        handler = _StderrHandler()
        handler.setFormatter(JsonLogFormatter())
        handler._equitheta = True  # type: ignore[attr-defined]
        log.addHandler(handler)
        log.propagate = False
    log.setLevel(level.upper())
