"""Structured (one JSON object per line) logging for the service."""

from __future__ import annotations

import json
import logging
import time
from typing import Any

ACCESS_LOGGER = "seedbed.access"


class JsonLineFormatter(logging.Formatter):
    """Renders a record as one JSON line; structured fields travel in `extra={"fields": {...}}`."""

    def format(self, record: logging.LogRecord) -> str:
        line: dict[str, Any] = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            line.update(fields)
        if record.exc_info:
            line["exception"] = self.formatException(record.exc_info)
        return json.dumps(line, default=str, ensure_ascii=False)


def logging_config(level: str) -> dict[str, Any]:
    """A dictConfig for uvicorn and our loggers: everything as JSON lines on stderr."""
    upper = level.upper()
    handler = {"class": "logging.StreamHandler", "formatter": "json", "stream": "ext://sys.stderr"}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"json": {"()": JsonLineFormatter}},
        "handlers": {"stderr": handler},
        "loggers": {
            "seedbed": {"handlers": ["stderr"], "level": upper, "propagate": False},
            "uvicorn": {"handlers": ["stderr"], "level": upper, "propagate": False},
            "uvicorn.error": {"level": upper},
            # We write our own access lines with the request id; uvicorn's would duplicate them.
            "uvicorn.access": {"handlers": [], "level": "WARNING", "propagate": False},
        },
    }
