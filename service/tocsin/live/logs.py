"""Structured logs: one JSON object per line on stderr (``ts``, ``level``, ``event``, fields)."""

from __future__ import annotations

import logging
import sys
import time
from typing import Any

import orjson


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        obj: dict[str, Any] = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "event": record.getMessage(),
        }
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            obj.update(fields)
        if record.exc_info:
            obj["exception"] = self.formatException(record.exc_info)
        return orjson.dumps(obj, default=str).decode()


def setup(level: str = "info") -> None:
    """Send every ``tocsin`` logger to stderr as JSON lines."""
    root = logging.getLogger("tocsin")
    root.setLevel(level.upper())
    if not any(isinstance(h.formatter, JsonFormatter) for h in root.handlers):
        h = logging.StreamHandler(sys.stderr)
        h.setFormatter(JsonFormatter())
        root.addHandler(h)


def event(logger: logging.Logger, name: str, level: int = logging.INFO, **fields: Any) -> None:
    """Log one event with fields (``event(log, "site_offline", site="kestrel-ridge")``)."""
    logger.log(level, name, extra={"fields": fields})
