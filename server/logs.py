"""Structured logs: one JSON object per line on stderr.

Every line has ``ts`` (UTC, ISO 8601, milliseconds), ``level``, ``logger`` and ``msg``; call
sites add fields with ``log.info(msg, extra={"fields": {...}})``. Access lines (``event:
"rpc"``) carry the method, status code, latency in milliseconds and, where it applies, the model
and version and the offending field name - never request contents, level values or error texts,
so no account identifier a caller might misplace into a request can reach the log.

Access lines are written once per call, so :func:`info_line` writes them without the
``logging`` record machinery (about 5 us instead of 30-40 us a line) when the lines go to the
handler :func:`setup` installed; the text is the same as :class:`JsonFormatter` would write.

With ``setup(..., flush_seconds=t)`` (``stateworth serve`` uses 0.05 s) those lines are not
written by the call that made them: the call queues its fields, and one writer thread formats
everything queued and writes it in one write every ``t`` seconds. A write to stderr is a system
call that lets go of the interpreter lock; on a small machine, one per call was about a fifth of
a single-value call's server time and most of its latency tail. Lines therefore appear up to
``t`` seconds after the call (each keeps the time of its call in ``ts``); :func:`flush` writes
what is queued at once (the server calls it when it stops, and at exit). Past 10,000 queued
lines the caller writes them itself, so a stalled writer cannot grow the queue without bound.
"""

from __future__ import annotations

import atexit
import collections
import json
import logging
import sys
import threading
import time
from typing import Any, Mapping

_HANDLER: logging.StreamHandler | None = None
_ROOT = "stateworth"
_QUEUE_LIMIT = 10_000
# (time, logger name, message, fields) of lines not yet written; None: write each line at once
_PENDING: collections.deque | None = None
_WRITER: threading.Thread | None = None
_STOP = threading.Event()
# fields every line carries (a worker process of ``stateworth serve --workers N`` adds its index)
_STATIC: dict[str, Any] = {}


def _ts(created: float) -> str:
    sec = int(created)
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(sec)) + f".{int((created - sec) * 1000):03d}Z"


def _line(created: float, level: str, logger: str, msg: str, fields: Mapping[str, Any] | None) -> str:
    doc = {"ts": _ts(created), "level": level, "logger": logger, "msg": msg}
    if _STATIC:
        doc.update(_STATIC)
    if fields:
        doc.update(fields)
    return json.dumps(doc, default=str, separators=(",", ":"))


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        fields = dict(getattr(record, "fields", {}) or {})
        if record.exc_info and record.exc_info[0] is not None:
            fields["exception"] = record.exc_info[0].__name__
        return _line(record.created, record.levelname.lower(), record.name, record.getMessage(), fields)


def setup(level: str = "info", flush_seconds: float = 0.0, static: Mapping[str, Any] | None = None) -> None:
    """Route the ``stateworth`` loggers to stderr as JSON lines.

    ``flush_seconds`` > 0: :func:`info_line` lines are queued and written by a writer thread
    every ``flush_seconds`` (module docstring); 0 writes each as it is made. ``static``: fields
    put on every line (e.g. ``{"worker": 1}``)."""
    global _HANDLER
    if flush_seconds < 0:
        raise ValueError(f"flush_seconds must be 0 or more (got {flush_seconds})")
    _stop_writer()
    _STATIC.clear()
    _STATIC.update(static or {})
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    root = logging.getLogger(_ROOT)
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False
    _HANDLER = handler
    if flush_seconds > 0:
        _start_writer(flush_seconds)


def _start_writer(interval: float) -> None:
    global _PENDING, _WRITER
    _PENDING = collections.deque()
    _STOP.clear()

    def loop() -> None:
        while not _STOP.wait(interval):
            flush()
        flush()

    _WRITER = threading.Thread(target=loop, name="stateworth-log-writer", daemon=True)
    _WRITER.start()


def _stop_writer() -> None:
    global _PENDING, _WRITER
    if _WRITER is not None:
        _STOP.set()
        _WRITER.join(5)
        _WRITER = None
    flush()
    _PENDING = None


def flush() -> None:
    """Write every queued line now (no-op when nothing is queued or lines are not queued)."""
    pending, h = _PENDING, _HANDLER
    if not pending or h is None:
        return
    docs = []
    try:
        while True:
            docs.append(_line(*pending.popleft()))
    except IndexError:
        pass
    _write(h, "\n".join(docs) + "\n")


def _write(h: logging.StreamHandler, text: str) -> None:
    h.acquire()
    try:  # the handler's lock: a line never interleaves with one written through logging
        h.stream.write(text)
        h.stream.flush()
    except Exception:  # noqa: BLE001 - like logging: a broken log stream must not fail the call
        pass
    finally:
        h.release()


atexit.register(_stop_writer)


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
    pending = _PENDING
    if pending is not None:
        pending.append((time.time(), "info", logger.name, msg, dict(fields)))
        if len(pending) >= _QUEUE_LIMIT:
            flush()
        return
    _write(h, _line(time.time(), "info", logger.name, msg, fields) + "\n")
