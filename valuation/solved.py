"""Solved results: a model's value functions, its posterior draws' value functions and its
long-run mix, computed once and kept (in memory, and with the model: :mod:`.stored`).

``values[:, j]`` is V for stream j: ``(I - beta P) V = r_j``, the expected discounted sum of the
stream from each state (money per period in, money out; member-months for ``member_months``).
``draws[d, :, j]`` is the same under posterior draw d of the factor tables. ``longrun`` is the
stationary distribution pi (pi P = pi) with equal mass on each fixed cell, the default weights of
cohorts. Everything a lookup needs is here, in numpy: answering from a :class:`Solved` imports no
JAX. Finite-horizon values are solved on first use and kept in a bounded cache
(:class:`HorizonCache`).
"""

from __future__ import annotations

import collections
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from stateworth.errors import QueryError

#: the solver settings a stored solution is keyed by (see :mod:`.stored`)
DEFAULT_TOL = 1e-10
DEFAULT_DRAW_TOL = 1e-8
#: bytes of finite-horizon values (point and draws) kept per model; least recently used go first
HORIZON_CACHE_BYTES = 256 * 1024**2
#: the longest finite horizon a query may ask for, in periods (each costs H operator applies)
MAX_HORIZON = 1200


@dataclass(frozen=True)
class Settings:
    """How the values were solved: the relative residual of the point solve (``tol``) and of each
    draw (``draw_tol``: an interval is a percentile over draws whose spread is many orders of
    magnitude above it)."""

    tol: float = DEFAULT_TOL
    draw_tol: float = DEFAULT_DRAW_TOL

    def to_dict(self) -> dict[str, float]:
        return {"tol": float(self.tol), "draw_tol": float(self.draw_tol)}


class HorizonCache:
    """Finite-horizon values by horizon, least recently used evicted beyond ``max_bytes``
    (thread-safe). ``stats()`` reports entries, bytes, hits, misses and evictions."""

    def __init__(self, max_bytes: int = HORIZON_CACHE_BYTES) -> None:
        self.max_bytes = int(max_bytes)
        self._items: collections.OrderedDict[Any, Any] = collections.OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = self.misses = self.evictions = 0

    @staticmethod
    def _size(value: Any) -> int:
        return int(sum(np.asarray(v).nbytes for v in value if v is not None)) if isinstance(value, tuple) \
            else int(np.asarray(value).nbytes)

    def get(self, key: Any, compute) -> Any:
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                self.hits += 1
                return self._items[key]
            self.misses += 1
        value = compute()
        size = self._size(value)
        with self._lock:
            if key not in self._items and size <= self.max_bytes:
                self._items[key] = value
                self._bytes += size
                while self._bytes > self.max_bytes and self._items:
                    _, old = self._items.popitem(last=False)
                    self._bytes -= self._size(old)
                    self.evictions += 1
        return value

    def stats(self) -> dict[str, int]:
        with self._lock:
            return {"entries": len(self._items), "bytes": self._bytes, "max_bytes": self.max_bytes,
                    "hits": self.hits, "misses": self.misses, "evictions": self.evictions}

    def scoped(self, scope: Any) -> "ScopedHorizonCache":
        """A view of this cache whose keys are prefixed by ``scope`` (a model's content hash): a
        server gives every model one, so all of them share this cache's byte bound."""
        return ScopedHorizonCache(self, scope)


@dataclass(frozen=True)
class ScopedHorizonCache:
    """Part of a shared :class:`HorizonCache` (see :meth:`HorizonCache.scoped`)."""

    parent: HorizonCache
    scope: Any

    def get(self, key: Any, compute) -> Any:
        return self.parent.get((self.scope, key), compute)

    def stats(self) -> dict[str, int]:
        return self.parent.stats()


@dataclass
class Solved:
    """A compiled model with its solved value functions (see the module doc).

    ``values`` ``(n, k)`` over ``streams``; ``draws`` ``(D, n, k)`` or None; ``longrun`` ``(n,)``
    or None (the chain has no unique long-run mix); ``stats``: the solves' statistics
    (``point``, ``draws``, ``longrun``); ``settings``: how they were solved; ``source``: where
    they came from (``"solved"`` now, or ``"stored"`` with the stored file's time);
    ``reachable``: the states the chain can ever be in."""

    model: Any
    streams: tuple[str, ...]
    values: np.ndarray
    draws: np.ndarray | None
    longrun: np.ndarray | None
    stats: dict[str, Any]
    settings: Settings = Settings()
    #: ``(n,)`` bool: states the chain can be in (:mod:`.reach`); None = not computed (all allowed)
    reachable: np.ndarray | None = None
    source: str = "solved"
    horizons: HorizonCache | ScopedHorizonCache = field(default_factory=HorizonCache, repr=False, compare=False)

    @property
    def version(self) -> str:
        return self.model.version

    @property
    def n_draws(self) -> int:
        return 0 if self.draws is None else int(self.draws.shape[0])

    def col(self, stream: str) -> int:
        """Column of ``stream``; QueryError names the streams."""
        if stream in self.streams:
            return self.streams.index(stream)
        raise QueryError(f"unknown reward stream '{stream}'; streams are {', '.join(self.streams)}", field="stream")

    def unit(self, stream: str) -> str:
        self.col(stream)
        return self.model.unit(stream)

    def point(self, horizon: int | None = None) -> np.ndarray:
        """Values ``(n, k)``: infinite horizon, or the next ``horizon`` periods (solved once, cached)."""
        if horizon is None:
            return self.values
        h = check_horizon(horizon)
        return self.horizons.get(("point", h), lambda: _horizon_point(self, h))

    def drawn(self, horizon: int | None = None) -> np.ndarray | None:
        """Values of every draw ``(D, n, k)`` (None without draws), over ``horizon`` when given."""
        if self.draws is None or horizon is None:
            return self.draws
        h = check_horizon(horizon)
        return self.horizons.get(("draws", h), lambda: _horizon_draws(self, h))


def check_horizon(horizon: Any) -> int:
    """A horizon in periods, 0..:data:`MAX_HORIZON`; QueryError otherwise."""
    try:
        h = int(horizon)
    except (TypeError, ValueError):
        raise QueryError(f"horizon must be a whole number of periods (got {horizon!r})", field="horizon") from None
    if h < 0 or h > MAX_HORIZON:
        raise QueryError(f"horizon must lie in 0..{MAX_HORIZON} periods (got {h}); for longer horizons use the "
                         "infinite-horizon value", field="horizon")
    return h


def _horizon_point(solved: Solved, h: int) -> np.ndarray:
    from stateworth.solver import solve

    return np.asarray(solve(solved.model, list(solved.streams), horizon=h).values)


def _horizon_draws(solved: Solved, h: int) -> np.ndarray:
    from stateworth.valuation.draws import horizon_draw_values, stacked_tables
    from stateworth.valuation.parts import reward_parts

    tabs, _ = stacked_tables(solved.model)
    parts = [reward_parts(solved.model, s) for s in solved.streams]
    return horizon_draw_values(solved.model, tabs, parts, h)


def solve_model(model, *, settings: Settings = Settings(), streams: Sequence[str] | None = None,
                draws: bool = True, longrun: bool = True, method: str = "auto",
                devices: int | None = None, reach: bool = True) -> Solved:
    """Solve ``model``: every reward stream (or ``streams``) to ``settings.tol``; with ``draws``
    and posterior draws in the model, every draw to ``settings.draw_tol`` (same method as the
    point solve, warm-started from it); with ``longrun``, the long-run mix. Raises QueryError on an
    unknown stream, ConvergenceError when a solve fails."""
    from stateworth.solver import solve
    from stateworth.valuation.draws import solve_draw_values, stacked_tables
    from stateworth.valuation.parts import reward_parts
    from stateworth.valuation.reach import reachable
    from stateworth.valuation.stationary import long_run_mix

    names = tuple(model.streams) if streams is None else tuple(streams)
    if not names:
        raise QueryError("no reward stream to solve", field="streams")
    for s in names:
        model.reward(s)  # QueryError naming the streams
    sol = solve(model, list(names), tol=settings.tol, method=method, devices=devices)
    stats: dict[str, Any] = {"point": sol.stats(), "draws": None, "longrun": None}
    dv = None
    if draws and model.draws:
        tabs, D = stacked_tables(model)
        if D:
            t0 = time.perf_counter()
            parts = [reward_parts(model, s) for s in names]
            dv, dstats = solve_draw_values(model, tabs, parts, sol.values, tol=max(settings.tol, settings.draw_tol))
            dstats["seconds"] = time.perf_counter() - t0
            stats["draws"] = dstats
    pi = None
    if longrun:
        t0 = time.perf_counter()
        try:
            pi = long_run_mix(model)
            stats["longrun"] = {"seconds": time.perf_counter() - t0}
        except QueryError as e:
            stats["longrun"] = {"seconds": time.perf_counter() - t0, "error": e.message}
    mask = None
    if reach:
        t0 = time.perf_counter()
        mask = reachable(model)
        stats["reachable"] = {"seconds": time.perf_counter() - t0, "states": int(mask.sum())}
    return Solved(model=model, streams=names, values=np.asarray(sol.values, dtype=np.float64), draws=dv,
                  longrun=pi, stats=stats, settings=settings, reachable=mask)
