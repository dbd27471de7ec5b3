"""Structured logs: one JSON object per line, shared by the API and the workers.

Every line carries ``time`` (UTC, ISO 8601), ``level``, ``logger`` and
``message``; a record adds any of ``FIELDS`` it was given through ``extra``::

    log.info("chunk finished", extra={"batch_id": b, "chunk": 3, "outcome": "done"})

so that ``jq 'select(.batch_id == "b-...")'`` finds everything about a batch.
The level comes from SORBRANK_LOG_LEVEL (default INFO). Nothing here knows
about HTTP: callers decide what goes into a line, and request headers (with
their tokens) are never among the fields.
"""
from __future__ import annotations

import json
import logging
import os
import sys
from collections.abc import Mapping
from datetime import datetime, timezone
from typing import TextIO

LEVELS = ("DEBUG", "INFO", "WARNING", "ERROR")
DEFAULT_LEVEL = "INFO"
FIELDS = ("batch_id", "chunk", "isotherm_count", "duration_s", "outcome", "state",
          "method", "path", "status", "client", "attempt")


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry = {
            "time": datetime.fromtimestamp(record.created, timezone.utc)
            .isoformat(timespec="milliseconds").replace("+00:00", "Z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        for name in FIELDS:
            value = getattr(record, name, None)
            if value is not None:
                entry[name] = value
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        return json.dumps(entry, default=str)


def level_from_env(env: Mapping[str, str] | None = None) -> str:
    raw = (os.environ if env is None else env).get("SORBRANK_LOG_LEVEL", "").strip().upper()
    return raw if raw in LEVELS else DEFAULT_LEVEL


def configure(level: str | None = None, stream: TextIO | None = None) -> None:
    """Send every log record of this process to ``stream`` (stderr) as JSON lines."""
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter())
    root = logging.getLogger()
    for old in list(root.handlers):
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(level or level_from_env())
    logging.captureWarnings(True)  # warnings too become JSON lines (logger py.warnings)


def configure_from_env() -> None:
    """For process-pool initializers: spawned children start unconfigured."""
    configure(level_from_env())
