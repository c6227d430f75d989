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
    logs._STATIC.clear()


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


def test_static_fields_go_on_every_line(stream, monkeypatch):
    monkeypatch.setattr("sys.stderr", stream)  # pytest's capture swaps stderr between fixture and test
    logs.setup("info", static={"worker": 3})
    log = logging.getLogger("stateworth.server")
    logs.info_line(logging.getLogger("stateworth.server.access"), "rpc", {"event": "rpc"})
    log.info("serving", extra={"fields": {"event": "serving"}})
    assert [d["worker"] for d in _docs(stream)] == [3, 3]
    logs.setup("info")
    logs.info_line(logging.getLogger("stateworth.server.access"), "rpc", {"event": "rpc"})
    assert "worker" not in _docs(stream)[-1]


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


@pytest.fixture
def queued(monkeypatch):
    """``setup`` with a queue flushed every 30 ms; writer stopped and loggers restored after."""
    root = logging.getLogger("stateworth")
    saved = (root.handlers[:], root.level, root.propagate, logs._HANDLER)
    buf = io.StringIO()
    monkeypatch.setattr("sys.stderr", buf)
    logs.setup("info", flush_seconds=0.03)
    yield buf
    logs._stop_writer()
    root.handlers[:], root.level, root.propagate = saved[:3]
    logs._HANDLER = saved[3]


def test_queued_lines_keep_their_order_and_the_time_of_their_call(queued):
    import time

    log = logging.getLogger("stateworth.server.access")
    t0 = time.time()
    for k in range(50):
        logs.info_line(log, "rpc", {"event": "rpc", "k": k})
    end = time.monotonic() + 5
    while queued.getvalue().count("\n") < 50 and time.monotonic() < end:
        time.sleep(0.01)  # the writer thread, not this call, writes them
    docs = _docs(queued)
    assert [d["k"] for d in docs] == list(range(50))
    # ts is the time of the call (formatted later by the writer), within a second of t0
    assert all(abs(time.mktime(time.strptime(d["ts"][:19], "%Y-%m-%dT%H:%M:%S")) - time.mktime(time.gmtime(t0))) <= 1
               for d in docs)
    assert all(d == {"ts": d["ts"], "level": "info", "logger": "stateworth.server.access", "msg": "rpc",
                     "event": "rpc", "k": d["k"]} for d in docs)


def test_flush_writes_the_queue_at_once_and_the_fields_are_copied(queued):
    log = logging.getLogger("stateworth.server.access")
    fields = {"event": "rpc", "code": "OK"}
    logs.info_line(log, "rpc", fields)
    fields["code"] = "changed after the call"
    logs.flush()
    assert [d["code"] for d in _docs(queued)] == ["OK"]
    logs.flush()  # nothing queued: writes nothing more
    assert queued.getvalue().count("\n") == 1


def test_a_full_queue_is_written_by_the_caller(queued, monkeypatch):
    monkeypatch.setattr(logs, "_QUEUE_LIMIT", 5)
    logs._STOP.set()  # the writer thread stops: only the callers write now
    logs._WRITER.join(5)
    log = logging.getLogger("stateworth.server.access")
    for k in range(5):
        logs.info_line(log, "rpc", {"k": k})
    assert [d["k"] for d in _docs(queued)] == list(range(5))


def test_negative_flush_interval_is_refused():
    with pytest.raises(ValueError, match="flush_seconds"):
        logs.setup("info", flush_seconds=-1)
