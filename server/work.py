"""A bounded pool for the calls that must solve (transition changes, marginal values, read-outs,
finite horizons), with a cache keyed by request content.

* Bounded: at most ``workers`` jobs run at once and at most ``queue`` more wait; past that a
  call is refused with RESOURCE_EXHAUSTED at once rather than queued without end.
* Deadlines and cancellation: a caller waits at most until its deadline (DEADLINE_EXCEEDED) or
  ``max_seconds``; when the last caller waiting for a job that has not started yet cancels or
  times out, the job is dropped. A solve that has started runs to the end (a JAX computation
  cannot be interrupted) and its result is cached for the next caller.
* Cache: results are kept by key (model version + the request's canonical bytes), least
  recently used evicted first, within ``cache_size`` entries and ``cache_bytes`` bytes (a
  result's size is the bytes of its arrays and numbers, :func:`result_bytes`); identical calls
  in flight share one job. Errors are not cached, nor a result larger than ``cache_bytes``.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from concurrent.futures import CancelledError as FutureCancelled
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from typing import Any, Callable, Hashable

import numpy as np

from stateworth.server.errors import CancelledError, DeadlineError, LimitError


def result_bytes(x: Any, _depth: int = 0) -> int:
    """Approximate bytes held by a result: numpy arrays by ``nbytes``, containers and objects
    with ``__dict__`` or ``__slots__`` summed over their parts, 64 bytes for anything else."""
    if isinstance(x, np.ndarray):
        return int(x.nbytes) + 112
    if _depth > 6:
        return 64
    if isinstance(x, dict):
        return 64 + sum(result_bytes(k, _depth + 1) + result_bytes(v, _depth + 1) for k, v in x.items())
    if isinstance(x, (list, tuple, set, frozenset)):
        return 56 + sum(result_bytes(v, _depth + 1) for v in x)
    if isinstance(x, (str, bytes)):
        return 49 + len(x)
    if hasattr(x, "__dict__"):
        return 64 + result_bytes(vars(x), _depth + 1)
    slots = getattr(type(x), "__slots__", None)
    if slots:
        return 64 + sum(result_bytes(getattr(x, n, None), _depth + 1) for n in slots)
    return 64


class WorkPool:
    """Run ``fn`` for ``key`` in the pool, at most once per key while cached (see module doc)."""

    def __init__(self, workers: int = 2, queue: int = 8, cache_size: int = 256, max_seconds: float = 300.0,
                 cache_bytes: int = 256 * 1024**2) -> None:
        self.workers = int(workers)
        self.queue = int(queue)
        self.cache_size = int(cache_size)
        self.cache_bytes = int(cache_bytes)
        self.max_seconds = float(max_seconds)
        self._pool = ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="stateworth-work")
        self._lock = threading.RLock()  # re-entrant: a cancel runs done-callbacks at once
        self._cache: OrderedDict[Hashable, Future] = OrderedDict()
        self._sizes: dict[Hashable, int] = {}
        self._bytes = 0
        self._waiters: dict[Hashable, int] = {}
        self._pending = 0
        self.hits = 0
        self.misses = 0
        self.evictions = 0

    @property
    def cached_bytes(self) -> int:
        """Bytes of the finished results in the cache."""
        return self._bytes

    @property
    def cached_entries(self) -> int:
        return len(self._cache)

    def _drop(self, key: Hashable) -> None:
        del self._cache[key]
        self._bytes -= self._sizes.pop(key, 0)

    def _done(self, key: Hashable, fut: Future) -> None:
        with self._lock:
            self._pending -= 1
            failed = fut.cancelled() or fut.exception() is not None
            if self._cache.get(key) is fut:
                if failed:
                    self._drop(key)
                else:
                    size = result_bytes(fut.result())
                    if size > self.cache_bytes:
                        self._drop(key)  # answered to its callers, never kept
                    else:
                        self._sizes[key] = size
                        self._bytes += size
            # least recently used first; a job still running is passed over, not evicted
            for old_key in list(self._cache):
                if len(self._cache) <= self.cache_size and self._bytes <= self.cache_bytes:
                    break
                if self._cache[old_key].done():
                    self._drop(old_key)
                    self.evictions += 1

    def submit(self, key: Hashable, fn: Callable[[], Any]) -> Future:
        with self._lock:
            fut = self._cache.get(key)
            if fut is not None and not fut.cancelled():
                self._cache.move_to_end(key)
                self.hits += 1
                return fut
            if self._pending >= self.workers + self.queue:
                raise LimitError(f"the server is busy with {self._pending} solves (limit {self.workers} running + "
                                 f"{self.queue} waiting); retry later")
            self.misses += 1
            self._pending += 1
            fut = self._pool.submit(fn)
            self._cache[key] = fut
        fut.add_done_callback(lambda f, k=key: self._done(k, f))
        return fut

    def run(self, key: Hashable, fn: Callable[[], Any], context=None) -> Any:
        """The result of ``fn`` for ``key``, waiting within the caller's deadline."""
        fut = self.submit(key, fn)
        if fut.done():
            return fut.result()
        with self._lock:
            self._waiters[key] = self._waiters.get(key, 0) + 1

        def leave() -> None:
            with self._lock:
                n = self._waiters.get(key, 1) - 1
                last = n <= 0
                if last:
                    self._waiters.pop(key, None)
                else:
                    self._waiters[key] = n
            if last:
                fut.cancel()  # only succeeds if the job has not started; outside the lock (callbacks)

        left = False
        if context is not None:
            def on_done() -> None:
                nonlocal left
                if not fut.done() and not left:
                    left = True
                    leave()
            context.add_callback(on_done)
        remaining = None if context is None else context.time_remaining()
        timeout = self.max_seconds if remaining is None else min(remaining, self.max_seconds)
        try:
            return fut.result(timeout=max(timeout, 0.0))
        except FutureTimeout:
            if not left:
                left = True
                leave()
            if remaining is not None and remaining <= self.max_seconds:
                raise DeadlineError("the deadline passed before the solve finished; the result will be cached if "
                                    "the solve completes, so a retry with a longer deadline may be quick") from None
            raise LimitError(f"the solve took longer than the server's limit of {self.max_seconds:g} s") from None
        except FutureCancelled:
            raise CancelledError("the call was cancelled") from None
        finally:
            if not left and fut.done():
                with self._lock:
                    n = self._waiters.get(key, 1) - 1
                    if n <= 0:
                        self._waiters.pop(key, None)
                    else:
                        self._waiters[key] = n
                left = True

    def shutdown(self) -> None:
        self._pool.shutdown(wait=False, cancel_futures=True)
