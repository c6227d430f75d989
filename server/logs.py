"""Structured logs: one JSON object per line on stderr.

Every line has ``ts`` (UTC, ISO 8601, milliseconds), ``level``, ``logger`` and ``msg``; call
sites add fields with ``log.info(msg, extra={"fields": {...}})``. Access lines (``event:
"rpc"``) carry the method, status code, latency in milliseconds and, where it applies, the model
and version and the offending field name - never request contents, level values or error texts,
so no account identifier a caller might misplace into a request can reach the log.

Access lines are written once per call, so :func:`info_line` writes them without the
``logging`` record machinery (about 5 us instead of 30-40 us a line) when the lines go to the
handler :func:`setup` installed; the text is the same as :class:`JsonFormatter` would write.
"""

from __future__ import annotations

import json
import logging
import sys
import time
from typing import Any, Mapping

_HANDLER: logging.StreamHandler | None = None
_ROOT = "stateworth"


def _ts(created: float) -> str:
    sec = int(created)
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(sec)) + f".{int((created - sec) * 1000):03d}Z"


def _line(created: float, level: str, logger: str, msg: str, fields: Mapping[str, Any] | None) -> str:
    doc = {"ts": _ts(created), "level": level, "logger": logger, "msg": msg}
    if fields:
        doc.update(fields)
    return json.dumps(doc, default=str, separators=(",", ":"))


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        fields = dict(getattr(record, "fields", {}) or {})
        if record.exc_info and record.exc_info[0] is not None:
            fields["exception"] = record.exc_info[0].__name__
        return _line(record.created, record.levelname.lower(), record.name, record.getMessage(), fields)


def setup(level: str = "info") -> None:
    """Route the ``stateworth`` loggers to stderr as JSON lines."""
    global _HANDLER
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    root = logging.getLogger(_ROOT)
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False
    _HANDLER = handler


def info_line(logger: logging.Logger, msg: str, fields: Mapping[str, Any]) -> None:
    """``logger.info(msg, extra={"fields": fields})``, written straight to the stream when
    ``logger`` is a child of ``stateworth`` without handlers of its own and :func:`setup`'s
    handler is the one in place (otherwise through ``logging``, to whatever is configured)."""
    if not logger.isEnabledFor(logging.INFO):
        return
    h = _HANDLER
    if h is None or logger.handlers or not logger.propagate or logging.getLogger(_ROOT).handlers != [h]:
        logger.info(msg, extra={"fields": dict(fields)})
        return
    text = _line(time.time(), "info", logger.name, msg, fields) + "\n"
    h.acquire()
    try:  # the handler's lock: a line never interleaves with one written through logging
        h.stream.write(text)
        h.stream.flush()
    except Exception:  # noqa: BLE001 - like logging: a broken log stream must not fail the call
        pass
    finally:
        h.release()
