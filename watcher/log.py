"""Logging to stderr, as plain text or as JSON lines."""

from __future__ import annotations

import json
import logging
import sys
from datetime import datetime, timezone

LOGGER = "linewatch"


class _JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        out = {
            "time": datetime.fromtimestamp(record.created, tz=timezone.utc).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "event": getattr(record, "event", "message"),
            "message": record.getMessage(),
        }
        out.update(getattr(record, "fields", {}) or {})
        return json.dumps(out, default=str)


def setup_logging(fmt: str = "plain", level: int = logging.INFO) -> logging.Logger:
    log = logging.getLogger(LOGGER)
    log.handlers.clear()
    h = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        h.setFormatter(_JsonFormatter())
    else:
        h.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%dT%H:%M:%S"))
    log.addHandler(h)
    log.setLevel(level)
    log.propagate = False
    return log


def event(log: logging.Logger, kind: str, message: str, level: int = logging.INFO, **fields: object) -> None:
    """One log line for one event (start, stop, file opened, bad line, finding...)."""
    log.log(level, message, extra={"event": kind, "fields": fields})
