"""Posterior draws of the factor tables solved as one batched JAX computation (large grids).

``model.draws`` maps a random axis to ``(D, *table shape)``: D draws of that factor's table
(e.g. from its Dirichlet posterior). Draw d is the model with every drawn axis's table replaced
by its d-th draw. Its value functions solve ``(I - beta P_d) V_d = r_d``; ``r_d`` depends on the
draw too where a stream has one-off amounts on status moves (their expectation uses P_d).

The D systems are solved by one jitted computation, ``lax.map`` over the draws (``batch`` draws
vectorised at a time: one on CPU, more on accelerators), each a restarted GMRES on the draw's operator (``op.with_tables(tables_d)``),
warm-started from the point model's values and right-preconditioned with the point model's
two-level preconditioner, whose frozen-cluster correction (:mod:`stateworth.solver.frozen`) is
rebuilt from each draw's tables inside the computation (a few block inverses). Shared by all draws: the compiled operator structure and solver code
(compiled once), the preconditioner (a draw's own was measured to need the same number of
iterations on the reference grids, at extra cost), the start. Not repeated per draw: compiling
a model, re-validating its tables, building a preconditioner, dispatching a solve. For small grids
(``n <= DENSE_MAX``) each draw is a dense LU solve instead.
"""

from __future__ import annotations

import collections
import threading
import time
from functools import partial
from typing import Any, Callable, Mapping, Sequence

import jax
import jax.numpy as jnp
import numpy as np

from stateworth import config
from stateworth.errors import ConvergenceError
from stateworth.solver.frozen import frozen_coarse
from stateworth.solver.gmres import gmres
from stateworth.solver.horizon import horizon_values
from stateworth.solver.preconditioner import low_precision, two_level
from stateworth.valuation.parts import RewardParts, reward_parts

#: grids up to this many states solve each draw densely
DENSE_MAX = 800
#: smoothing applies per preconditioner call for draws: deeper than a single solve's (10) since a
#: draw's tables are rough along the counters where the point model's are smooth; measured at
#: 3.6 x 10^5 states, 1e-8: 10, 16, 24, 32 applies took 20, 14, 11, 9 iterations and 0.44, 0.35,
#: 0.32, 0.36 s a draw
DRAW_SMOOTH = 24
#: GMRES restart length for draws: with that smoothing a draw takes ~11 iterations, and a shorter
#: basis is less fresh memory per draw (20 against 40: 0.29-0.37 against 0.35-0.48 s a draw at
#: 3.6 x 10^5 states, same iterations)
DRAW_RESTART = 20
#: bytes of Krylov bases in flight per batch (restart + 1 vectors per draw and column)
BATCH_BYTES = 1 << 30
#: draws per compiled call (at least one batch): the drawn tables of one chunk are on the
#: device at a time (at 3.6 x 10^5 states a status table is 14 MB a draw, 2.9 GB for 200), and
#: every chunk reuses the one compiled computation (the last chunk is padded with its last draw)
DRAW_CHUNK = 8


@jax.jit
def _reward_jit(op, base, cols, masks, scale):
    if cols.shape[1] == 0:
        return base
    return base + scale * jnp.sum(masks * op.mv(cols), axis=1)


def rewards_on(op, parts: Sequence[RewardParts]) -> jax.Array:
    """``(n, k)`` rewards of the streams ``parts`` under operator ``op``."""
    config.use_jax()
    return jnp.stack([_reward_jit(op, config.device(p.base), config.device(p.cols), config.device(p.masks), p.scale)
                      for p in parts], axis=1)


def point_preconditioner(model, transpose: bool = False):
    """The solver's two-level preconditioner for the point model (None for dense-sized grids).

    Built once and shared by every draw: a draw's operator differs from the point model's by
    sampling noise, so the point model's coarse inverse still captures its slow modes."""
    config.use_jax()
    if model.grid.size <= DENSE_MAX:
        return None
    return two_level(model, model.beta, transpose=transpose, dtype=jnp.float32, frozen=True, smooth=DRAW_SMOOTH)


def _batch_size(n: int, k: int, restart: int, D: int) -> int:
    """Draws vectorised at a time. On CPU one (sequential inside the one computation): a batch
    dimension defeats XLA's fusion of the operator apply, measured 4x slower per draw at 10^4
    states with 16 draws vectorised; on accelerators as many as ``BATCH_BYTES`` allow."""
    if jax.default_backend() == "cpu":
        return 1
    per = 8 * n * k * (2 * restart + 8)
    return int(max(1, min(D, BATCH_BYTES // max(per, 1))))


@partial(jax.jit, static_argnames=("tol", "restart", "max_iter", "batch", "transpose", "has_pc"))
def _gmres_draws(op, pc, stacked, rhs, x0, beta, base, *, tol, restart, max_iter, batch, transpose, has_pc):
    """lax.map over draws of GMRES on (I - beta P_d) x = rhs_d; rhs ``(D, n, k)``. ``base``: the
    point model's tables, for the axes a draw leaves as they are."""

    def one(args):
        tables, b = args
        opd = op.with_tables(tables)
        A = opd.transpose() if transpose else opd

        def matvec(v):
            return v - beta * A.mv(v)

        pcd = pc
        if has_pc and pc.frozen is not None:
            # the frozen clusters' stay probabilities are what a draw changes most along the
            # counters, so each draw gets its own (cheap, block-diagonal) cluster correction
            pcd = pc.with_frozen(frozen_coarse(pc.frozen.layout, {**base, **tables}, beta, transpose=transpose,
                                               dtype=jnp.float32))
        if has_pc:
            # the solver's float32 preconditioner under flexible GMRES, as in a single solve
            return gmres(matvec, b, x0, tol=tol, restart=restart, max_iter=max_iter,
                         precond=low_precision(pcd, A, A.astype(jnp.float32), beta), precond_cost=pcd.cost,
                         flexible=True, z_dtype=jnp.float32)[:5]
        x, it, ap, res, st, _ = gmres(matvec, b, x0, tol=tol, restart=restart, max_iter=max_iter)
        return x, it, ap, res, st

    return jax.lax.map(one, (stacked, rhs), batch_size=batch)


@partial(jax.jit, static_argnames=("transpose",))
def _dense_draws(op, stacked, rhs, beta, *, transpose):
    n = rhs.shape[1]

    def one(args):
        tables, b = args
        P = op.with_tables(tables).mv(jnp.eye(n))
        A = jnp.eye(n) - beta * (P.T if transpose else P)
        x = jnp.linalg.solve(A, b)
        res = jnp.max(jnp.abs(A @ x - b)) / jnp.maximum(jnp.max(jnp.abs(b)), 1e-300)
        return x, res

    return jax.lax.map(one, (stacked, rhs), batch_size=min(rhs.shape[0], max(1, (1 << 27) // (8 * n * n))))


@jax.jit
def _rhs_draws(op, stacked, parts_arrays):
    """Rewards of every draw ``(D, n, k)``; parts_arrays: (base, cols, masks, scale) per stream."""

    def one(tables):
        opd = op.with_tables(tables)
        out = []
        for base, cols, masks, scale in parts_arrays:
            r = base
            if cols.shape[1]:
                r = r + scale * jnp.sum(masks * opd.mv(cols), axis=1)
            out.append(r)
        return jnp.stack(out, axis=1)

    return jax.lax.map(one, stacked)


def rewards_for_draws(op, stacked: Mapping[str, np.ndarray], parts: Sequence[RewardParts]) -> jax.Array:
    """Rewards ``(D, n, k)`` of the streams ``parts`` under each draw's operator."""
    config.use_jax()
    arrays = tuple((config.device(p.base), config.device(p.cols), config.device(p.masks), p.scale) for p in parts)
    return _rhs_draws(op, {k: config.device(v) for k, v in stacked.items()}, arrays)


def draw_rewards(model, stacked: Mapping[str, np.ndarray], streams: Sequence[str]) -> jax.Array:
    """Rewards ``(D, n, k)`` of the model's ``streams`` under each draw."""
    config.use_jax()
    return rewards_for_draws(model.operator, stacked, [reward_parts(model, s) for s in streams])


_COMPILED: "collections.OrderedDict[tuple, Any]" = collections.OrderedDict()
_COMPILED_MAX = 8
_COMPILED_LOCK = threading.Lock()  # the server's solve pool calls from several threads


def compiled(fn: Callable, args: tuple, static: Mapping[str, Any]) -> tuple[Callable, float]:
    """``fn`` (a jitted function) compiled ahead of time for ``args``' shapes and the static
    arguments, kept in a small cache; returns (executable taking ``args``, seconds spent
    compiling now: 0 on a cache hit). Lets a caller run many same-shaped chunks on one compile
    and report the compile time apart from the solve time."""
    leaves, tree = jax.tree_util.tree_flatten(args)
    key = (fn, tree, tuple((np.shape(x), str(getattr(x, "dtype", type(x).__name__)), getattr(x, "weak_type", None))
                           for x in leaves), tuple(sorted(static.items())))
    with _COMPILED_LOCK:
        exe = _COMPILED.get(key)
        if exe is not None:
            _COMPILED.move_to_end(key)
            return exe, 0.0
    t0 = time.perf_counter()
    exe = fn.lower(*args, **static).compile()
    seconds = time.perf_counter() - t0
    with _COMPILED_LOCK:
        _COMPILED[key] = exe
        while len(_COMPILED) > _COMPILED_MAX:
            _COMPILED.popitem(last=False)
    return exe, seconds


def solve_draws(model, stacked: Mapping[str, np.ndarray],
                rhs: np.ndarray | jax.Array | Callable[[Mapping[str, jax.Array]], jax.Array], x0: np.ndarray, *,
                tol: float = 1e-10, transpose: bool = False, restart: int = DRAW_RESTART, max_iter: int = 3000,
                batch: int | None = None) -> tuple[np.ndarray, dict]:
    """Solve ``(I - beta P_d) X_d = rhs_d`` (or the transpose) for every draw d.

    ``stacked``: ``{axis: (D, *shape)}``; ``rhs``: ``(D, n, k)``, or a function of a chunk's
    drawn tables ``{axis: (m, *shape)}`` giving its ``(m, n, k)`` right-hand sides (so that only
    one chunk's tables and rewards are in memory at a time); ``x0``: ``(n, k)`` shared start;
    ``batch``: draws vectorised at a time (default: see :func:`_batch_size`). Draws go through
    one compiled computation in chunks of :data:`DRAW_CHUNK` (stats: ``compile_seconds``, the
    one-off compile, and ``solve_seconds``). Returns ``(X (D, n, k), stats)``; raises
    ConvergenceError if any draw failed."""
    config.use_jax()
    D = int(next(iter(stacked.values())).shape[0]) if stacked else 0
    rhs_of = rhs if callable(rhs) else None
    if rhs_of is None:
        rhs = config.device(rhs)
        D = rhs.shape[0]
    n, k = np.shape(x0)
    beta = jnp.float64(model.beta)
    if n <= DENSE_MAX:
        tabs = {a: config.device(v) for a, v in stacked.items()}
        if rhs_of is not None:
            rhs = rhs_of(tabs)
        x, res = _dense_draws(model.operator, tabs, rhs, beta, transpose=transpose)
        res = float(jnp.max(res))
        stats = {"method": "dense", "draws": D, "residual": res}
        if not np.isfinite(res) or res > max(1e3 * tol, 1e-8):
            raise ConvergenceError(f"dense draw solves left relative residual {res:.3g}", stats=stats)
        return np.asarray(x), stats
    if D == 0:
        return np.empty((0, n, k)), {"method": "gmres", "draws": 0, "compile_seconds": 0.0, "solve_seconds": 0.0}
    b = min(batch or _batch_size(n, k, restart, D), D)
    chunks = -(-D // max(DRAW_CHUNK, b))
    size = -(-(-(-D // chunks)) // b) * b  # D spread evenly over the chunks, in whole batches
    pc = point_preconditioner(model, transpose)
    base = {a: config.device(t) for a, t in model.tables.items() if a not in stacked}
    static = dict(tol=tol, restart=restart, max_iter=max_iter, batch=b, transpose=transpose, has_pc=pc is not None)
    x0j, betaj = config.device(x0), beta
    X = np.empty((D, n, k))
    it, ap, res, st = (np.empty(D, dtype=np.int64), np.empty(D, dtype=np.int64), np.empty(D), np.empty(D, dtype=np.int64))
    compile_s, t_start = 0.0, time.perf_counter()
    for s0 in range(0, D, size):
        m = min(size, D - s0)
        idx = np.minimum(np.arange(s0, s0 + size), D - 1)  # the last chunk repeats its last draw
        tabs = {a: config.device(np.asarray(v)[idx]) for a, v in stacked.items()}
        args = (model.operator, pc, tabs, rhs_of(tabs) if rhs_of is not None else rhs[idx], x0j, betaj, base)
        exe, c = compiled(_gmres_draws, args, static)
        compile_s += c
        got = [np.asarray(y) for y in exe(*args)]
        X[s0:s0 + m] = got[0][:m]
        for out, g in zip((it, ap, res, st), got[1:]):
            out[s0:s0 + m] = g[:m]
    stats = {"method": "gmres", "draws": D, "batch": b, "chunk": size, "preconditioned": pc is not None,
             "iterations_total": int(np.sum(it)), "iterations_max": int(np.max(it)),
             "operator_applies": int(np.sum(ap)), "residual": float(np.max(res)), "compile_seconds": compile_s,
             "solve_seconds": time.perf_counter() - t_start - compile_s}
    if np.any(st != 0):
        bad = int(np.argmax(st != 0))
        raise ConvergenceError(f"GMRES failed on posterior draw {bad} (status {int(st[bad])}, relative residual "
                               f"{float(res[bad]):.3g}); loosen tol or check the draws", stats=stats)
    return X, stats


@partial(jax.jit, static_argnames=("horizon",))
def _horizon_draws(op, stacked, rhs, beta, horizon):
    def one(args):
        tables, b = args
        return horizon_values(op.with_tables(tables).mv, b, beta, horizon)

    return jax.lax.map(one, (stacked, rhs))


def horizon_draws(model, stacked: Mapping[str, np.ndarray], rhs, horizon: int) -> np.ndarray:
    """H-period values of every draw: ``(D, n, k)``."""
    config.use_jax()
    tabs = {a: config.device(v) for a, v in stacked.items()}
    return np.asarray(_horizon_draws(model.operator, tabs, config.device(rhs), jnp.float64(model.beta), int(horizon)))
