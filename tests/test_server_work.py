"""The bounded solve pool: admission limit, deadlines, cancellation of jobs not started, cache."""

from __future__ import annotations

import threading
import time

import pytest

from stateworth.server.errors import DeadlineError, LimitError
from stateworth.server.work import WorkPool


class Ctx:
    """The two ServicerContext methods the pool uses."""

    def __init__(self, remaining: float | None) -> None:
        self.remaining = remaining
        self.callbacks = []

    def time_remaining(self):
        return self.remaining

    def add_callback(self, fn):
        self.callbacks.append(fn)


def test_cache_shares_results_and_drops_errors():
    pool = WorkPool(workers=1, queue=1)
    calls = []
    assert pool.run("k", lambda: calls.append(1) or 42) == 42
    assert pool.run("k", lambda: calls.append(1) or 0) == 42
    assert calls == [1] and pool.hits == 1

    def boom():
        raise ValueError("no")

    with pytest.raises(ValueError):
        pool.run("bad", boom)
    assert pool.run("bad", lambda: 7) == 7  # the failure was not cached
    pool.shutdown()


def test_limit_deadline_and_cancel_of_a_waiting_job():
    pool = WorkPool(workers=1, queue=1)
    gate = threading.Event()
    ran = []
    first = pool.submit("busy", lambda: gate.wait(10))
    with pytest.raises(DeadlineError):
        pool.run("waiting", lambda: ran.append(1), Ctx(0.05))  # queued behind "busy", caller gives up
    with pytest.raises(LimitError):
        pool.submit("a", lambda: None)
        pool.submit("b", lambda: None)
    gate.set()
    first.result(10)
    time.sleep(0.1)
    assert ran == []  # the abandoned job never ran
    assert pool.run("after", lambda: 5, Ctx(5.0)) == 5
    pool.shutdown()


def test_cache_is_bounded_in_bytes_least_recently_used_first():
    import numpy as np

    mib = 2**20
    pool = WorkPool(workers=1, queue=1, cache_bytes=3 * mib + 4096)  # room for three arrays and their headers
    for k in ("a", "b", "c"):
        assert pool.run(k, lambda: np.zeros(mib // 8)).nbytes == mib  # 1 MiB each
    assert pool.cached_entries == 3 and 3 * mib < pool.cached_bytes <= pool.cache_bytes
    pool.run("a", lambda: None)  # a hit: "a" becomes the most recently used
    pool.run("d", lambda: np.zeros(mib // 8))
    assert pool.evictions >= 1 and pool.cached_bytes <= pool.cache_bytes
    calls = []
    pool.run("a", lambda: calls.append("a"))  # still cached
    pool.run("b", lambda: calls.append("b") or np.zeros(1))  # evicted: computed again
    assert calls == ["b"]
    # a result larger than the whole bound is answered but never kept
    big = pool.run("huge", lambda: np.zeros(4 * mib // 8))
    assert big.nbytes == 4 * mib and pool.cached_bytes <= pool.cache_bytes
    assert pool.run("huge", lambda: "again") == "again"
    pool.shutdown()
