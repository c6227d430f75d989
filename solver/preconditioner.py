"""Two-level aggregation preconditioner for ``A = I - beta P`` on a grid operator.

Why: power iteration converges at rate beta (0.992 a month) and plain Krylov needs hundreds of
iterations, because the slow modes of P are the member / non-member flows (and other sticky axes):
right eigenvectors with eigenvalues close to 1 that barely vary along counters and fast axes. A
coarse space that is piecewise constant along those directions captures them exactly.

Coarse space: aggregate states that share the *key* levels (fixed axes, the status axis and the
most persistent chance axes, up to a coarse block size) and average over the rest (counters,
cycles, fast chance axes). Prolongation ``Q`` copies a coarse value to its states; restriction
``R`` averages uniformly. Because an aggregate ignores the next value of every non-key axis, the
Galerkin operator ``R P Q`` is exact and cheap: the product of the factor tables with the non-key
next values summed out and the non-key current values averaged (one einsum; deterministic axes
drop out). Fixed axes make it block-diagonal, so ``A_c = I - beta R P Q`` is inverted per block.

Preconditioner (multiplicative two-level, applied on the right of GMRES):

    y1 = Q A_c^{-1} R r
    y  = y1 + S (r - A y1),      S = sum_{i < d} (beta P)^i   (d smoothing applies; d >= 1)

Memory: the inverse blocks, F x K x K floats (F fixed cells, K key combinations per cell).

Smoothing depth ``d`` (default :data:`SMOOTH`): each GMRES iteration also pays for orthogonalising
against the basis, which now costs more than a float32 apply, so deeper smoothing and fewer
iterations win (measured, 1e-8, float32 smoother: d = 4, 6, 8, 10 took 21, 16, 13, 11 iterations
and 0.34, 0.31, 0.26, 0.24 s at 3.6 x 10^5 states; 27, 19, 15, 12 iterations and 3.2, 2.1, 1.6,
1.4 s at 1.4 x 10^6; d = 12 no better on those generator grids). Fitted tables are rough along
the counters (each tenure level estimated on its own, never-visited cells at their parents'
values), as a posterior draw's are, and there deeper smoothing pays: d = 10, 16, 24 took 20, 14,
11 iterations per stream on a fitted 10^4-state generator model (0.038, 0.028, 0.047 s), 19, 14,
11 on a weekly grid with a 104-week tenure (0.112, 0.097, 0.100 s), and 11, 8, 7 on the 10^5
generator grid (0.161, 0.150, 0.146 s): d = 16 is the default.
"""

from __future__ import annotations

import string
from dataclasses import dataclass
from functools import partial
from typing import TYPE_CHECKING

import jax
import jax.numpy as jnp
import numpy as np
from stateworth import config

if TYPE_CHECKING:
    from stateworth.solver.frozen import FrozenCoarse

#: largest coarse block (key combinations per fixed cell); its inverse costs K^3 per cell. With
#: deep smoothing a smaller coarse space loses little (3.6 x 10^5 states: K = 100 took 12
#: iterations, K = 500 took 11, but its inverse took 0.24 s against 0.03 s)
MAX_BLOCK = 256
#: smoothing applies per preconditioner call (see the module doc for the measurements)
SMOOTH = 16
#: counters with at least this many levels get their cap as a coarse bin of its own
CAP_SPLIT_MIN = 24


@dataclass(frozen=True)
class Coarse:
    grid_shape: tuple[int, ...]
    n_fixed: int  # leading fixed dims
    bins: tuple[int, ...]  # per grid dim: coarse levels (size = kept whole, 1 = averaged out)
    block: int  # K
    #: per grid dim: None for equal bins of consecutive levels, else the bin of each level (a
    #: counter with its cap apart, :func:`counter_map`)
    maps: tuple[tuple[int, ...] | None, ...] = ()

    def map_of(self, d: int) -> tuple[int, ...] | None:
        return self.maps[d] if self.maps else None

    @property
    def split_shape(self) -> tuple[int, ...]:
        """Grid shape, dims with a bin map already reduced to their bins, each dim split into
        (bins, size // bins)."""
        out = []
        for d, (s, b) in enumerate(zip(self.grid_shape, self.bins)):
            if self.map_of(d) is not None:
                s = b
            out += [b, s // b]
        return tuple(out)

    def averaging(self, d: int) -> np.ndarray:
        """``(size, bins)``: column j averages the levels of dim d in bin j."""
        m = np.asarray(self.map_of(d))
        W = np.zeros((m.size, self.bins[d]))
        W[np.arange(m.size), m] = 1.0
        return W / W.sum(axis=0, keepdims=True)


def persistence(model, axis: str) -> float:
    """Mean probability that a chance axis keeps its level (higher = slower mode)."""
    t = model.tables[axis]
    f = next(f for f in model.factors if f.axis == axis)
    if axis in f.given:
        i = f.given.index(axis)
        diag = np.diagonal(t, axis1=i, axis2=t.ndim - 1)
        return float(diag.mean())
    return float(np.max(t, axis=-1).mean())


def _bins(levels: int, room: int) -> int:
    """The most equal bins (a divisor of ``levels``) that fit in ``room``; 1 when none does."""
    return max((d for d in range(1, min(levels, room) + 1) if levels % d == 0), default=1)


def counter_map(size: int) -> tuple[int, ...]:
    """The coarse bins of a counter: the levels below its cap, and the cap apart.

    Why: members age through the levels below the cap in a fixed number of periods and then stay
    at the cap (tenure stops counting) until they lapse, so the cap holds a slow mode of its own,
    which an average over all levels hides; averaging the levels below it is the right mean
    behaviour (the aggregate leaves for the cap at rate 1 / (cap levels), the mean time to reach
    it). Equal bins were measured worse: a 104-week tenure took 80 GMRES iterations with two
    equal bins against 38 averaged out."""
    return tuple([0] * (size - 1) + [1])


def choose_key(model, max_block: int = MAX_BLOCK, counter_bins: int = 1) -> dict[str, "int | tuple[int, ...]"]:
    """Coarse levels per axis: the status axis whole, then each cycle (whole, else in the most
    equal bins that fit), then chance axes by persistence, then counters in up to
    ``counter_bins`` equal bins (values vary smoothly along them), each while the block stays
    under ``max_block``. ``counter_bins=-1`` puts each counter's cap in a bin of its own instead
    (:func:`counter_map`), for counters of at least :data:`CAP_SPLIT_MIN` levels.

    Why cycles first: a cycle (calendar month) is a rotation, and a rotation puts eigenvalues of
    P on circles ``|lambda| ~ 1`` around the origin. Those modes are as slow for a Krylov method
    as the member / non-member mode (GMRES's rate on eigenvalues on a circle of radius rho
    around 1 is rho per iteration), and a coarse space that averages over the cycle cannot see
    them. The fitted example (12,480 states, a 12-month cycle) took 159 GMRES iterations to
    1e-8 with the month averaged out and 6 with it kept whole; a weekly grid with a 13-period
    season, 80 and 20. Chance axes come before counters because measured iteration counts on
    the reference grids fell more from a chance axis than from tenure bins."""
    spec = model.spec
    key = {spec.status_axis: model.grid.axis(spec.status_axis).size}
    size = key[spec.status_axis]
    for a in model.grid.axes:
        if a.kind == "cycle":
            nb = _bins(a.size, max_block // size)
            if nb > 1:
                key[a.name] = nb
                size *= nb
    chance = [a.name for a in model.grid.axes if a.kind == "chance"]
    chance.sort(key=lambda a: -persistence(model, a))
    for a in chance:
        s = model.grid.axis(a).size
        if size * s <= max_block:
            key[a] = s
            size *= s
    for a in model.grid.axes:
        if a.kind != "counter":
            continue
        if counter_bins == -1:
            if a.size >= CAP_SPLIT_MIN and size * 2 <= max_block:
                key[a.name] = counter_map(a.size)
                size *= 2
        elif counter_bins > 1:
            nb = max((d for d in range(1, min(a.size, counter_bins, max_block // size) + 1) if a.size % d == 0),
                     default=1)
            if nb > 1:
                key[a.name] = nb
                size *= nb
    return key


def _nbins(v: "int | tuple[int, ...]") -> int:
    return v if isinstance(v, int) else max(v) + 1


def coarse_matrix(model, key: dict[str, int], tables: dict | None = None) -> np.ndarray:
    """``R P Q`` as ``(F, K, K)``: F fixed cells, K key combinations (grid order).

    Counters in the key enter through a one-hot tensor ``H[c, st, st', bin(c')]`` of their
    deterministic move, cycles through ``H[c, bin(c + 1 mod size)]``; their current value is
    averaged within its bin afterwards."""
    config.use_jax()
    from stateworth.rules.counters import counter_index

    tables = model.tables if tables is None else tables
    grid = model.grid
    spec = model.spec
    letters = iter(string.ascii_letters)
    cur = {a.name: next(letters) for a in grid.axes}
    nxt = {a.name: next(letters) for a in grid.axes if a.kind in ("status", "chance", "counter", "cycle")}
    fixed = [a.name for a in grid.axes if a.kind == "fixed"]
    st = spec.status_axis
    ops, subs = [], []
    for f in model.factors:
        s = "".join(nxt[g[5:]] if g.startswith("next.") else cur[g] for g in f.given) + nxt[f.axis]
        ops.append(np.asarray(tables[f.axis]))
        subs.append(s)
    key_axes = [a.name for a in grid.axes if a.name in key]
    for a in key_axes:
        if grid.axis(a).kind == "counter":
            idx = counter_index(spec, a)  # (C, S, S')
            C = grid.axis(a).size
            nb = _nbins(key[a])
            bin_of = np.arange(C) // (C // nb) if isinstance(key[a], int) else np.asarray(key[a])
            H = np.zeros(idx.shape + (nb,))
            np.put_along_axis(H, bin_of[idx][..., None], 1.0, axis=-1)
            ops.append(H)
            subs.append(cur[a] + cur[st] + nxt[st] + nxt[a])
        elif grid.axis(a).kind == "cycle":
            C, nb = grid.axis(a).size, _nbins(key[a])
            H = np.zeros((C, nb))
            H[np.arange(C), ((np.arange(C) + 1) % C) // (C // nb)] = 1.0
            ops.append(H)
            subs.append(cur[a] + nxt[a])
    mentioned = set("".join(subs))
    out_cur = [cur[a] for a in fixed] + [cur[a] for a in key_axes]
    out_nxt = [nxt[a] for a in key_axes]
    for a in fixed + key_axes:
        if cur[a] not in mentioned:
            ops.append(np.ones(grid.axis(a).size))
            subs.append(cur[a])
            mentioned.add(cur[a])
    expr = ",".join(subs) + "->" + "".join(out_cur + out_nxt)
    # numpy, pairwise in a greedy order: 2-17 ms on the example and the 3.6 x 10^5-state grid,
    # where a jitted einsum first paid a compile of 0.3-1.5 s on every cold solve
    c = np.einsum(expr, *[np.asarray(o, dtype=np.float64) for o in ops], optimize="greedy")
    # average over the non-key current axes that the operands mention
    denom = 1.0
    for a in grid.axes:
        if a.kind != "fixed" and a.name not in key and cur[a.name] in mentioned:
            denom *= a.size
    c = c / denom
    # average the current value of binned counters and cycles within their bins
    nf = len(fixed)
    for j, a in enumerate(key_axes):
        if grid.axis(a).kind in ("counter", "cycle"):
            ax = nf + j
            C, nb = grid.axis(a).size, _nbins(key[a])
            if isinstance(key[a], int):
                shp = c.shape[:ax] + (nb, C // nb) + c.shape[ax + 1:]
                c = c.reshape(shp).mean(axis=ax + 1)
            else:
                W = np.zeros((C, nb))
                W[np.arange(C), np.asarray(key[a])] = 1.0
                W /= W.sum(axis=0, keepdims=True)
                c = np.moveaxis(np.tensordot(c, W, axes=([ax], [0])), -1, ax)
    F = int(np.prod([grid.axis(a).size for a in fixed], dtype=np.int64)) if fixed else 1
    K = int(np.prod([_nbins(key[a]) for a in key_axes], dtype=np.int64))
    return c.reshape(F, K, K)


def coarse_inverse_np(C: np.ndarray, beta: float, transpose: bool) -> np.ndarray:
    """``(I - beta C_f)^{-1}`` per fixed cell f in numpy, float64 (the eager build: no compile).

    On one BLAS thread: the blocks are small (at most :data:`MAX_BLOCK`), and OpenBLAS's threads
    spin against each other when the machine is busy (4 blocks of 240 x 240 took 1.3 s with two
    threads on a loaded 2-core machine, 0.04 s with one)."""
    from threadpoolctl import threadpool_limits

    C = np.asarray(C, dtype=np.float64)
    if transpose:
        C = np.swapaxes(C, 1, 2)
    K = C.shape[1]
    with threadpool_limits(limits=1, user_api="blas"):
        return np.linalg.inv(np.eye(K)[None] - float(beta) * C)


@partial(jax.jit, static_argnames=("transpose", "dtype"))
def _coarse_inverse(C: jax.Array, beta: jax.Array, transpose: bool, dtype=jnp.float64) -> jax.Array:
    """``(I - beta C_f)^{-1}`` per fixed cell f; the matrix is formed in float64 and inverted in
    ``dtype`` (float32 halves the set-up, which at 3.6 x 10^5 states was a third of a solve)."""
    if transpose:
        C = jnp.swapaxes(C, 1, 2)
    K = C.shape[1]
    return jnp.linalg.inv((jnp.eye(K)[None] - beta * C).astype(dtype))


@partial(jax.tree_util.register_dataclass, data_fields=["inv", "frozen"], meta_fields=["coarse", "smooth"])
@dataclass(frozen=True, eq=False)
class TwoLevel:
    """The preconditioner as a pytree: ``inv`` blocks ``(F, K, K)`` are leaves, and so is the
    optional frozen-cluster correction (:mod:`.frozen`; None when not used)."""

    coarse: Coarse
    inv: jax.Array
    smooth: int
    frozen: FrozenCoarse | None = None

    def astype(self, dtype) -> "TwoLevel":
        """The same preconditioner with its coarse inverses in ``dtype``."""
        return TwoLevel(self.coarse, self.inv.astype(dtype), self.smooth,
                        None if self.frozen is None else self.frozen.astype(dtype))

    def with_frozen(self, frozen) -> "TwoLevel":
        """The same main coarse space and smoothing with another frozen-cluster correction."""
        return TwoLevel(self.coarse, self.inv, self.smooth, frozen)

    def restrict(self, r: jax.Array) -> jax.Array:
        c = self.coarse
        x = r.reshape(c.grid_shape)
        for d in range(len(c.grid_shape)):
            if c.map_of(d) is not None:  # average within the bins of a bin map
                W = jnp.asarray(c.averaging(d), dtype=x.dtype)
                x = jnp.moveaxis(jnp.tensordot(x, W, axes=([d], [0])), -1, d)
        x = x.reshape(c.split_shape)
        x = jnp.mean(x, axis=tuple(range(1, x.ndim, 2)))
        F = int(np.prod(c.grid_shape[: c.n_fixed], dtype=np.int64)) if c.n_fixed else 1
        return x.reshape(F, c.block)

    def prolong(self, y: jax.Array) -> jax.Array:
        c = self.coarse
        kept = []
        for b in c.bins:
            kept += [b, 1]
        x = jnp.broadcast_to(y.reshape(kept), c.split_shape)
        if not any(c.map_of(d) is not None for d in range(len(c.grid_shape))):
            return x.reshape(-1)
        x = x.reshape([b if c.map_of(d) is not None else s for d, (s, b) in enumerate(zip(c.grid_shape, c.bins))])
        for d in range(len(c.grid_shape)):
            m = c.map_of(d)
            if m is not None:  # each level takes its bin's value
                x = jnp.take(x, jnp.asarray(np.asarray(m)), axis=d)
        return x.reshape(-1)

    @property
    def cost(self) -> int:
        """Operator applies per call."""
        return abs(self.smooth) + (1 if self.smooth < 0 else 0) + (1 if self.frozen is not None else 0)

    def coarse_solve(self, r: jax.Array) -> jax.Array:
        return self.prolong(jnp.einsum("fij,fj->fi", self.inv, self.restrict(r)))

    def apply(self, apply_p, beta, r: jax.Array) -> jax.Array:
        """``M^{-1} r`` for one vector ``(n,)``; ``apply_p(v) = P v``."""
        if self.smooth < 0:  # symmetric: pre-smooth, coarse correction, post-smooth
            y = r
            for _ in range(-self.smooth - 1):
                y = r + beta * apply_p(y)
            y = y + self.coarse_solve(r - (y - beta * apply_p(y)))
            return y + (r - (y - beta * apply_p(y)))
        y = self.coarse_solve(r)
        if self.frozen is not None:  # multiplicative: the clusters see what the main space left
            y = y + self.frozen.solve(r - (y - beta * apply_p(y)))
        res = r - (y - beta * apply_p(y))
        # a loop, not unrolled: one copy of the apply to compile however deep the smoothing
        z = jax.lax.fori_loop(0, self.smooth - 1, lambda _, z: res + beta * apply_p(z), res)
        return y + z


def two_level(model, beta: float, *, transpose: bool = False, smooth: int = SMOOTH,
              max_block: int = MAX_BLOCK, counter_bins: int = 1, tables: dict | None = None,
              dtype=jnp.float64, frozen: bool = False) -> TwoLevel:
    """Build the preconditioner for ``I - beta P`` (or ``I - beta P^T`` with ``transpose``),
    its coarse inverse in ``dtype`` (float32 for :func:`low_precision`). ``frozen``: add the
    frozen-cluster correction (:mod:`.frozen`) where the model has frozen clusters; it costs one
    more apply per call and pays where cluster stay probabilities differ along the counters
    (posterior draws: 37 -> 17 iterations at 10^5 states)."""
    config.use_jax()
    key = choose_key(model, max_block, counter_bins)
    C = coarse_matrix(model, key, tables)
    K = C.shape[1]
    inv = config.device(coarse_inverse_np(C, beta, transpose), dtype)
    bins = tuple(a.size if a.kind == "fixed" else _nbins(key.get(a.name, 1)) for a in model.grid.axes)
    maps = tuple(key[a.name] if isinstance(key.get(a.name), tuple) else None for a in model.grid.axes)
    n_fixed = sum(1 for a in model.grid.axes if a.kind == "fixed")
    coarse = Coarse(model.grid.shape, n_fixed, bins, K, maps if any(m is not None for m in maps) else ())
    fc = None
    if frozen and smooth > 0:
        from stateworth.solver.frozen import frozen_coarse, frozen_layout
        layout = frozen_layout(model)
        if layout is not None:
            fc = frozen_coarse(layout, model.tables if tables is None else tables, beta, transpose=transpose,
                               dtype=dtype)
    return TwoLevel(coarse, inv, smooth, fc)


def low_precision(pc, A, A32, beta):
    """``v -> M^{-1} v``: in float64 when ``A32`` is None, else with the preconditioner's applies
    and coarse inverse in float32 (``A32 = A.astype(float32)``), result back in float64. The
    preconditioner only has to approximate A^{-1}; float32's 1e-7 is far below its own error."""
    if A32 is None:
        return lambda v: pc.apply(A.mv, beta, v)
    pc32 = pc.astype(jnp.float32)
    b32 = jnp.asarray(beta, dtype=jnp.float32)
    return lambda v: pc32.apply(A32.mv, b32, v.astype(jnp.float32)).astype(v.dtype)
