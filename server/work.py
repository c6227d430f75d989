"""A bounded pool for the calls that must solve (transition changes, marginal values, read-outs,
finite horizons), with a cache keyed by request content.

* Bounded: at most ``workers`` jobs run at once and at most ``queue`` more wait; past that a
  call is refused with RESOURCE_EXHAUSTED at once rather than queued without end.
* Deadlines and cancellation: a caller waits at most until its deadline (DEADLINE_EXCEEDED) or
  ``max_seconds``; when the last caller waiting for a job that has not started yet cancels or
  times out, the job is dropped. A solve that has started runs to the end (a JAX computation
  cannot be interrupted) and its result is cached for the next caller.
* Cache: results are kept by key (model version + the request's canonical bytes), most recently
  used first, ``cache_size`` entries; identical calls in flight share one job. Errors are not
  cached.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from concurrent.futures import CancelledError as FutureCancelled
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from typing import Any, Callable, Hashable

from stateworth.server.errors import CancelledError, DeadlineError, LimitError


class WorkPool:
    """Run ``fn`` for ``key`` in the pool, at most once per key while cached (see module doc)."""

    def __init__(self, workers: int = 2, queue: int = 8, cache_size: int = 256, max_seconds: float = 300.0) -> None:
        self.workers = int(workers)
        self.queue = int(queue)
        self.cache_size = int(cache_size)
        self.max_seconds = float(max_seconds)
        self._pool = ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="stateworth-work")
        self._lock = threading.RLock()  # re-entrant: a cancel runs done-callbacks at once
        self._cache: OrderedDict[Hashable, Future] = OrderedDict()
        self._waiters: dict[Hashable, int] = {}
        self._pending = 0
        self.hits = 0
        self.misses = 0

    def _done(self, key: Hashable, fut: Future) -> None:
        with self._lock:
            self._pending -= 1
            failed = fut.cancelled() or fut.exception() is not None
            if failed and self._cache.get(key) is fut:
                del self._cache[key]
            while len(self._cache) > self.cache_size:
                old_key, old = next(iter(self._cache.items()))
                if not old.done():
                    break
                del self._cache[old_key]

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
