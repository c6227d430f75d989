"""One factor of the grid operator applied level pair by level pair.

The contraction of a random axis ``a`` with ``K`` levels,

    out[..., a=i, ...] = sum_j  T[..., a=i, a'=j] * F[..., a'=j, ...],

is written here as ``K x K`` (or fewer: the pairs the move rules forbid are skipped) slices,
products and sums over named dimensions instead of one ``einsum``. For small ``K`` this is what
XLA on the CPU compiles well: every term is elementwise, so the whole step becomes one loop
over the output, reading each table entry and frame entry once. An ``einsum`` with a small
contracted axis becomes a batched matrix product of tiny blocks, several times slower (measured
at 3.6 x 10^5 states: the status step with its tenure gather 3.9 ms as gather + einsum, 0.7 ms
pair by pair; the engagement step 1.0 ms against 0.5 ms).

When ``a`` is the status axis the counters that move with it are resolved in the same loop:
for the pair ``(s, s')`` a counter's next level is one fixed map of its current level
(:func:`stateworth.rules.counters.counter_index`: unchanged, +1 capped, or reset to 0), so it
is a shifted or broadcast view of the frame, not a gather.

The transpose (for ``P^T``) is written out the same way (a shift becomes a shift the other way,
a reset a sum into level 0), because ``jax.linear_transpose`` of the slices measured 5x slower
than the forward step.

Dimensions are named as in :func:`stateworth.rules.grid_operator.build_plan`: ``"x"`` for the
current level of axis ``x``, ``"x'"`` for its next level.
"""

from __future__ import annotations

from dataclasses import dataclass

import jax.numpy as jnp
from jax import lax
import numpy as np

#: counter maps for one status pair: the next level of every current level
SAME, PLUS, ZERO = "same", "plus", "zero"


@dataclass(frozen=True)
class PairStep:
    """Static description of one pairwise contraction (hashable: part of the plan).

    ``dims_in``: the frame's dimensions; ``dims_out``: the result's; ``tdims``: the stored
    table's (``axis`` if the table has it, ``axis'``, then the others in the result's order); ``pairs``: ``(i, j)`` level pairs to add (``i`` is -1 when the
    result has no current ``axis`` dimension); ``counters``: per resolved counter, its name and
    the map of each pair, in the order of ``pairs`` (:data:`SAME`, :data:`PLUS`, :data:`ZERO`,
    or a tuple of next levels)."""

    axis: str
    size: int
    dims_in: tuple[str, ...]
    dims_out: tuple[str, ...]
    tdims: tuple[str, ...]
    pairs: tuple[tuple[int, int], ...]
    counters: tuple[tuple[str, tuple], ...]
    key: str
    perm: tuple[int, ...] = ()  # the stored table is np.transpose(factor table, perm)

    def apply(self, arrays: dict, frame: jnp.ndarray) -> jnp.ndarray:
        """The step on ``frame`` (a step of the plan, :mod:`stateworth.rules.steps`)."""
        return apply(self, arrays[self.key], frame)

    def transpose(self, arrays: dict, cotangent: jnp.ndarray, before) -> jnp.ndarray:
        """Its transpose, written out (:func:`apply_transpose`); ``before``: the shape and dtype
        of the frame the step was applied to."""
        return apply_transpose(self, arrays[self.key], cotangent, tuple(before.shape))


def classify(col: np.ndarray):
    """The counter map ``c -> col[c]`` as one of the named forms, else the tuple itself."""
    c = np.arange(len(col))
    if np.array_equal(col, c):
        return SAME
    if np.array_equal(col, np.minimum(c + 1, len(col) - 1)):
        return PLUS
    if not col.any():
        return ZERO
    return tuple(int(v) for v in col)


def _take(x: jnp.ndarray, dims: list[str], d: str, i: int) -> tuple[jnp.ndarray, list[str]]:
    p = dims.index(d)
    # a static slice (jnp.take would be a gather, which XLA compiles far more slowly)
    return lax.index_in_dim(x, i, axis=p, keepdims=False), dims[:p] + dims[p + 1:]


def _align(x: jnp.ndarray, dims: list[str], target: list[str]) -> jnp.ndarray:
    """``x`` (named ``dims``, a subset of ``target``) transposed and expanded to broadcast
    against ``target``."""
    order = [dims.index(d) for d in target if d in dims]
    x = jnp.transpose(x, order) if order != list(range(len(order))) else x
    shape = [x.shape[[d for d in target if d in dims].index(t)] if t in dims else 1 for t in target]
    return x.reshape(shape)


def _map(x: jnp.ndarray, p: int, how) -> jnp.ndarray:
    """``y[.., c, ..] = x[.., next(c), ..]`` along axis ``p``."""
    if how == SAME:
        return x
    n = x.shape[p]
    if how == PLUS:
        if n == 1:
            return x
        return jnp.concatenate([lax.slice_in_dim(x, 1, n, axis=p), lax.slice_in_dim(x, n - 1, n, axis=p)], axis=p)
    if how == ZERO:
        return jnp.broadcast_to(lax.slice_in_dim(x, 0, 1, axis=p), x.shape)
    return jnp.concatenate([lax.slice_in_dim(x, c, c + 1, axis=p) for c in how], axis=p)


def _map_transpose(w: jnp.ndarray, p: int, how) -> jnp.ndarray:
    """The transpose of :func:`_map`: ``z[.., c', ..] = sum over c with next(c) = c' of w``."""
    if how == SAME:
        return w
    n = w.shape[p]
    if how == PLUS:
        if n == 1:
            return w
        zero = jnp.zeros_like(lax.slice_in_dim(w, 0, 1, axis=p))
        top = lax.slice_in_dim(w, n - 2, n - 1, axis=p) + lax.slice_in_dim(w, n - 1, n, axis=p)
        return jnp.concatenate([zero, lax.slice_in_dim(w, 0, n - 2, axis=p), top], axis=p)
    if how == ZERO:
        s = jnp.sum(w, axis=p, keepdims=True)
        return jnp.concatenate([s, jnp.zeros_like(lax.slice_in_dim(w, 1, n, axis=p))], axis=p)
    moved = jnp.moveaxis(w, p, 0)
    z = jnp.zeros_like(moved).at[jnp.asarray(how)].add(moved)
    return jnp.moveaxis(z, 0, p)


def _result_dims(st: PairStep) -> list[str]:
    """Names of one pair's term: the result's dimensions without the current ``axis``."""
    return [d for d in st.dims_out if d != st.axis]


def apply(st: PairStep, table: jnp.ndarray, frame: jnp.ndarray) -> jnp.ndarray:
    """The forward step: ``frame`` (dims ``dims_in``) -> result (dims ``dims_out``)."""
    a, an = st.axis, st.axis + "'"
    odims = _result_dims(st)
    has_i = a in st.dims_out
    acc: dict[int, jnp.ndarray] = {}
    for k, (i, j) in enumerate(st.pairs):
        f, dims = _take(frame, list(st.dims_in), an, j)
        if a in dims:
            f, dims = _take(f, dims, a, i)
        for name, maps in st.counters:
            f = _map(f, dims.index(name + "'"), maps[k])
        dims = [d[:-1] if d[:-1] in dict(st.counters) and d.endswith("'") else d for d in dims]
        t, tdl = _take(table, list(st.tdims), an, j)
        if a in tdl:
            t, tdl = _take(t, tdl, a, i)
        term = _align(f, dims, odims) * _align(t, tdl, odims)
        acc[i] = term if i not in acc else acc[i] + term
    def size(d: str) -> int:
        if d in st.dims_in:
            return frame.shape[st.dims_in.index(d)]
        if d + "'" in st.dims_in:  # a counter, now at its current level
            return frame.shape[st.dims_in.index(d + "'")]
        return table.shape[st.tdims.index(d)]

    shape = [size(d) for d in odims]
    zero = jnp.zeros(shape, dtype=jnp.result_type(frame, table))
    if not has_i:
        return jnp.broadcast_to(acc.get(-1, zero), shape)
    parts = [jnp.broadcast_to(acc.get(i, zero), shape) for i in range(st.size)]
    return jnp.stack(parts, axis=st.dims_out.index(a))


def apply_transpose(st: PairStep, table: jnp.ndarray, out: jnp.ndarray, in_shape: tuple[int, ...]) -> jnp.ndarray:
    """The transposed step: a cotangent of the result (dims ``dims_out``) -> one of the frame
    (dims ``dims_in``, shape ``in_shape``)."""
    a, an = st.axis, st.axis + "'"
    odims = _result_dims(st)
    counters = dict(st.counters)
    # the frame slice's own dims (before renaming counters), and with the counters at their current names
    raw = [d for d in st.dims_in if d not in (a, an)]
    cur = [d[:-1] if d.endswith("'") and d[:-1] in counters else d for d in raw]
    has_i_in = a in st.dims_in
    slice_shape = [in_shape[st.dims_in.index(d)] for d in raw]
    acc: dict[tuple[int, int], jnp.ndarray] = {}
    for k, (i, j) in enumerate(st.pairs):
        g = out
        gd = list(st.dims_out)
        if a in gd:
            g, gd = _take(g, gd, a, i)
        t, tdl = _take(table, list(st.tdims), an, j)
        if a in tdl:
            t, tdl = _take(t, tdl, a, i)
        w = _align(g, gd, odims) * _align(t, tdl, odims)
        extra = tuple(p for p, d in enumerate(odims) if d not in cur)
        if extra:
            w = jnp.sum(w, axis=extra)
        kept = [d for d in odims if d in cur]
        w = jnp.transpose(w, [kept.index(d) for d in cur]) if kept != cur else w
        w = jnp.broadcast_to(w, slice_shape)
        for name, maps in st.counters:
            w = _map_transpose(w, cur.index(name), maps[k])
        key = (i if has_i_in else -1, j)
        acc[key] = w if key not in acc else acc[key] + w
    zero = jnp.zeros(slice_shape, dtype=jnp.result_type(out, table))
    nxt = [jnp.stack([acc.get((i, j), zero) for i in range(st.size)], axis=0) if has_i_in else acc.get((-1, j), zero)
           for j in range(st.size)]
    z = jnp.stack(nxt, axis=0)  # (a', [a,] raw...)
    lead = [an] + ([a] if has_i_in else [])
    return jnp.transpose(z, [(lead + raw).index(d) for d in st.dims_in])
