"""The direct access-line writer writes what the JSON formatter writes, and falls back to the
logging machinery whenever the lines would not go to the handler ``setup`` installed."""

from __future__ import annotations

import io
import json
import logging

import pytest

from stateworth.server import logs


@pytest.fixture
def stream(monkeypatch):
    """``setup`` on a StringIO standing in for stderr; the loggers are restored afterwards."""
    root = logging.getLogger("stateworth")
    saved = (root.handlers[:], root.level, root.propagate, logs._HANDLER)
    buf = io.StringIO()
    monkeypatch.setattr("sys.stderr", buf)
    logs.setup("info")
    yield buf
    root.handlers[:], root.level, root.propagate = saved[:3]
    logs._HANDLER = saved[3]


def _docs(buf: io.StringIO) -> list[dict]:
    return [json.loads(line) for line in buf.getvalue().splitlines()]


def test_direct_line_equals_the_formatted_record(stream):
    log = logging.getLogger("stateworth.server.access")
    fields = {"event": "rpc", "method": "/stateworth.v1.ValuationService/GetValue", "code": "OK", "ms": 0.25,
              "model": "fitness-tiny", "version": "abc123", "field": "state"}
    log.info("rpc", extra={"fields": fields})
    logs.info_line(log, "rpc", fields)
    a, b = _docs(stream)
    assert a.pop("ts")[:10] == b.pop("ts")[:10]
    assert a == b == {"level": "info", "logger": "stateworth.server.access", "msg": "rpc", **fields}
    assert stream.getvalue().count("\n") == 2


def test_timestamp_is_utc_iso_with_milliseconds(stream):
    logs.info_line(logging.getLogger("stateworth.server.access"), "rpc", {"event": "rpc"})
    ts = _docs(stream)[0]["ts"]
    assert len(ts) == 24 and ts[10] == "T" and ts[19] == "." and ts.endswith("Z")


def test_disabled_level_writes_nothing(stream):
    log = logging.getLogger("stateworth.server.access")
    log.setLevel(logging.WARNING)  # what --no-access-log does
    try:
        logs.info_line(log, "rpc", {"event": "rpc"})
    finally:
        log.setLevel(logging.NOTSET)
    assert stream.getvalue() == ""


def test_a_handler_of_its_own_gets_the_line_through_logging(stream):
    log = logging.getLogger("stateworth.server.access")
    own = io.StringIO()
    h = logging.StreamHandler(own)
    h.setFormatter(logs.JsonFormatter())
    log.addHandler(h)
    try:
        logs.info_line(log, "rpc", {"event": "rpc", "code": "OK"})
    finally:
        log.removeHandler(h)
    assert json.loads(own.getvalue())["code"] == "OK"
    assert json.loads(stream.getvalue())["code"] == "OK"  # and propagates to the stateworth handler


def test_without_setup_lines_go_through_logging(monkeypatch):
    monkeypatch.setattr(logs, "_HANDLER", None)
    log = logging.getLogger("stateworth.server.access")
    seen = []

    class Catch(logging.Handler):
        def emit(self, record):
            seen.append(record.fields)

    root = logging.getLogger("stateworth")
    saved = (root.handlers[:], root.level, root.propagate)
    root.handlers[:] = [Catch()]
    root.setLevel(logging.INFO)
    try:
        logs.info_line(log, "rpc", {"event": "rpc", "code": "NOT_FOUND"})
    finally:
        root.handlers[:], root.level, root.propagate = saved
    assert seen == [{"event": "rpc", "code": "NOT_FOUND"}]
