"""Structured logs: one JSON object per line on stderr.

Every line has ``ts`` (UTC, ISO 8601), ``level``, ``logger`` and ``msg``; call sites add fields
with ``log.info(msg, extra={"fields": {...}})``. Access lines (``event: "rpc"``) carry the
method, status code, latency in milliseconds and, where it applies, the model and version and
the offending field name - never request contents, level values or error texts, so no account
identifier a caller might misplace into a request can reach the log.
"""

from __future__ import annotations

import json
import logging
import sys
import time


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        doc = {"ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + f".{int(record.msecs):03d}Z",
               "level": record.levelname.lower(), "logger": record.name, "msg": record.getMessage()}
        doc.update(getattr(record, "fields", {}) or {})
        if record.exc_info and record.exc_info[0] is not None:
            doc["exception"] = record.exc_info[0].__name__
        return json.dumps(doc, default=str, separators=(",", ":"))


def setup(level: str = "info") -> None:
    """Route the ``stateworth`` loggers to stderr as JSON lines."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    root = logging.getLogger("stateworth")
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False
