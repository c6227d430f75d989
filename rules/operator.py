"""The structured transition operator of a compiled model.

``(P x)(s) = E[x(s') | s]`` is applied backwards through the draw order, never forming P:

1. start from ``x`` viewed on the grid, with every axis at its *next* value (fixed axes are the
   same now and next, so they are batch dimensions throughout);
2. for each random axis in reverse draw order, multiply by its factor table and sum out the
   axis's next value; the table brings in the current axes it is given;
3. counters and cycles are index maps: ``c' = g(c, status, status')`` is a gather, done at the
   latest point that still has ``status'`` (before the status factor is summed out) or when a
   table needs the current counter;
4. transpose to the grid order.

Each contraction is one einsum over named dimensions (XLA emits a batched matrix product, no
explicit transposes), each counter a gather along one axis, all inside one jitted function, so
an apply costs about (grid size) x (sum of the sizes of the contracted axes), and memory is a
few grid-sized arrays (times the status size where a frame holds status and status'). The
transpose comes from :func:`jax.linear_transpose` (the gather becomes a scatter-add).

Shapes: ``mv`` takes ``(n,)`` or ``(n, k)`` and returns the same shape (k right-hand sides).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import scipy.sparse as sp

from stateworth.rules.factors import Factor
from stateworth.rules.grid import Grid


@dataclass(frozen=True)
class Step:
    kind: str  # "contract" | "counter" | "cycle" | "finish"
    key: str  # array name ("table.<axis>" or "index.<axis>")
    perm: tuple[int, ...]  # finish: transpose to the grid order
    shape_in: tuple[int, ...] = ()  # finish: frame shape before it
    extra: tuple = ()  # step-specific static data (einsum string, axis positions)


@dataclass(frozen=True)
class Plan:
    """The static part of an operator: shapes and the sequence of steps (hashable)."""

    grid_shape: tuple[int, ...]
    steps: tuple[Step, ...]

    @property
    def size(self) -> int:
        return int(np.prod(self.grid_shape, dtype=np.int64))


def counter_flags(spec, axis: str) -> tuple[np.ndarray, np.ndarray]:
    """``(reset[st, st'], adv[st'])`` of counter ``axis`` over status codes: the move
    ``st -> st'`` resets it (events join: non-member -> member, lapse: member -> non-member,
    change: any status change), and it advances while the *next* status is ``st'``
    (``advance_while``; default always)."""
    ax = spec.axes[axis]
    st_levels = spec.axis_levels(spec.status_axis)
    member = np.array([lv in spec.members for lv in st_levels])
    aw = ax.advance_while if ax.advance_while is not None else "always"
    if aw == "member":
        adv = member
    elif aw == "non_member":
        adv = ~member
    elif aw == "always":
        adv = np.ones(len(st_levels), dtype=bool)
    else:
        adv = np.array([lv in aw for lv in st_levels])
    S = len(st_levels)
    reset = np.zeros((S, S), dtype=bool)
    for ev in ax.reset_on or []:
        if ev == "join":
            reset |= (~member)[:, None] & member[None, :]
        elif ev == "lapse":
            reset |= member[:, None] & (~member)[None, :]
        elif ev == "change":
            reset |= ~np.eye(S, dtype=bool)
    return reset, adv


def counter_index(spec, axis: str) -> np.ndarray:
    """``idx[c, st, st']``: the next level of counter ``axis`` from level ``c`` when the status
    moves ``st -> st'``: 0 on a reset (:func:`counter_flags`); otherwise +1 (capped at the last
    level) while the next status advances it, else unchanged."""
    size = len(spec.axis_levels(axis))
    reset, adv = counter_flags(spec, axis)
    S = len(adv)
    c = np.arange(size)[:, None, None]
    nxt = np.where(adv[None, None, :], np.minimum(c + 1, size - 1), c)
    nxt = np.broadcast_to(nxt, (size, S, S)).astype(np.int32)
    nxt[:, reset] = 0
    return nxt


def build_plan(spec, grid: Grid, factors: list[Factor]) -> Plan:
    """Work out the step sequence symbolically (named dimensions) for a checked spec.

    The frame's dimension order is whatever the steps leave; contractions are einsums over named
    dimensions (no explicit transposes), counters shift in place, and the last step transposes
    to the grid order."""
    kinds = {a.name: a.kind for a in grid.axes}
    sizes = {a.name: a.size for a in grid.axes}
    status = spec.status_axis

    def size_of(d: str) -> int:
        return sizes[d.rstrip("'")]

    dims = [a.name if a.kind == "fixed" else a.name + "'" for a in grid.axes]
    pending = [a.name for a in grid.axes if a.kind in ("counter", "cycle")]
    steps: list[Step] = []
    letters: dict[str, str] = {}

    def letter(d: str) -> str:
        if d not in letters:
            letters[d] = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"[len(letters)]
        return letters[d]

    def resolve(d: str) -> None:
        nonlocal dims
        pos = dims.index(d + "'")
        if kinds[d] == "cycle":
            steps.append(Step("cycle", "", (), (), (pos,)))
            dims = dims[:pos] + [d] + dims[pos + 1:]
        else:
            new = [d if x == d + "'" else x for x in dims]
            if status not in new:
                new.insert(new.index(status + "'"), status)
            steps.append(Step("counter", f"index.{d}", (), (), (
                pos, tuple(new.index(x) for x in [status, status + "'"]), status in dims,
                new.index(status))))
            dims = new
        pending.remove(d)

    for f in reversed(factors):
        tdims = [g[5:] + "'" if g.startswith("next.") else g for g in f.given] + [f.axis + "'"]
        for d in list(pending):
            if d in tdims or (f.axis == status and kinds[d] == "counter"):
                resolve(d)
        nxt = f.axis + "'"
        out = [x for x in dims if x != nxt] + [x for x in tdims[:-1] if x not in dims]
        expr = "".join(letter(x) for x in dims) + "," + "".join(letter(x) for x in tdims) + "->" + \
            "".join(letter(x) for x in out)
        steps.append(Step("contract", f"table.{f.axis}", (), (), (expr,)))
        dims = out
    for d in list(pending):
        resolve(d)
    # missing current dims: the value does not depend on them -> broadcast
    target = list(grid.names)
    missing = [x for x in target if x not in dims]
    dims_full = dims + missing
    perm = tuple(dims_full.index(x) for x in target)
    steps.append(Step("finish", "", perm, tuple(size_of(x) for x in dims), (len(missing),)))
    return Plan(grid.shape, tuple(steps))


def _apply_single(plan: Plan, arrays: dict, x: jax.Array) -> jax.Array:
    """``x`` is ``(n,)``: one apply of P."""
    frame = x.reshape(plan.grid_shape)
    for st in plan.steps:
        if st.kind == "contract":
            frame = jnp.einsum(st.extra[0], frame, arrays[st.key])
        elif st.kind == "cycle":
            (pos,) = st.extra
            frame = jnp.roll(frame, -1, axis=pos)
        elif st.kind == "counter":
            pos, (ps, psp), has_cur, insert_at = st.extra
            if not has_cur:
                frame = jnp.expand_dims(frame, insert_at)
            idx = arrays[st.key]  # (C, S, S'): next level from (level, status, next status)
            shape = [1] * frame.ndim
            shape[pos], shape[ps], shape[psp] = idx.shape
            order = np.argsort([pos, ps, psp])
            idx = jnp.transpose(idx, tuple(order)).reshape(shape)
            # a gather along one axis; its transpose (for P^T) is a scatter-add, measured as fast
            # as the forward apply (a select on shifted views was as fast forward, 8x slower back)
            frame = jnp.take_along_axis(frame, idx, axis=pos, mode="clip")
        elif st.kind == "finish":
            (n_missing,) = st.extra
            if n_missing:
                frame = frame.reshape(frame.shape + (1,) * n_missing)
            frame = jnp.transpose(frame, st.perm)
            frame = jnp.broadcast_to(frame, plan.grid_shape)
    return frame.reshape(-1)


def _columns(f, x: jax.Array) -> jax.Array:
    """Apply a single-vector map to each column of ``(n, k)``; sequential columns measured
    faster on CPU than a batched frame (the batch dimension defeats XLA's fusion)."""
    if x.ndim == 1:
        return f(x)
    return jax.lax.map(f, x.T).T


def _apply(plan: Plan, arrays: dict, x: jax.Array) -> jax.Array:
    return _columns(partial(_apply_single, plan, arrays), x)


def _apply_transpose(plan: Plan, arrays: dict, y: jax.Array) -> jax.Array:
    n = plan.size
    tr = jax.linear_transpose(partial(_apply_single, plan, arrays), jax.ShapeDtypeStruct((n,), y.dtype))
    return _columns(lambda v: tr(v)[0], y)


@jax.tree_util.register_pytree_node_class
class GridOperator:
    """The transition operator P of a compiled model (or its transpose).

    ``arrays`` holds the factor tables (``table.<axis>``) and counter index maps
    (``index.<axis>``): the pytree leaves, so a stack of operators from posterior draws can be
    ``vmap``-ed. ``plan`` is static."""

    def __init__(self, plan: Plan, arrays: dict, transposed: bool = False) -> None:
        self.plan = plan
        self.arrays = arrays
        self.transposed = transposed
        self.shape = (plan.size, plan.size)

    def mv(self, x: jax.Array) -> jax.Array:
        if self.transposed:
            return _apply_transpose(self.plan, self.arrays, x)
        return _apply(self.plan, self.arrays, x)

    def transpose(self) -> "GridOperator":
        return GridOperator(self.plan, self.arrays, not self.transposed)

    def astype(self, dtype) -> "GridOperator":
        """The same operator with its factor tables in ``dtype`` (float32 for the inner solves of
        mixed precision); applies then take and return vectors of that type."""
        arrays = {k: (v.astype(dtype) if jnp.issubdtype(v.dtype, jnp.floating) else v) for k, v in self.arrays.items()}
        return GridOperator(self.plan, arrays, self.transposed)

    def with_tables(self, tables: dict) -> "GridOperator":
        """The same structure with other factor tables (a changed or drawn model)."""
        arrays = dict(self.arrays)
        for k, v in tables.items():
            arrays[f"table.{k}"] = jnp.asarray(v, dtype=jnp.float64)
        return GridOperator(self.plan, arrays, self.transposed)

    def tree_flatten(self):
        keys = tuple(sorted(self.arrays))
        return tuple(self.arrays[k] for k in keys), (self.plan, keys, self.transposed)

    @classmethod
    def tree_unflatten(cls, aux, children):
        plan, keys, transposed = aux
        return cls(plan, dict(zip(keys, children)), transposed)


def make_operator(spec, grid: Grid, factors: list[Factor], tables: dict[str, np.ndarray]) -> GridOperator:
    plan = build_plan(spec, grid, factors)
    arrays = {f"table.{k}": jnp.asarray(v, dtype=jnp.float64) for k, v in tables.items()}
    for a in grid.axes:
        if a.kind == "counter":
            arrays[f"index.{a.name}"] = jnp.asarray(counter_index(spec, a.name))
    return GridOperator(plan, arrays)


def explicit_csr(spec, grid: Grid, factors: list[Factor], tables: dict[str, np.ndarray],
                 max_states: int = 3_000_000, chunk_entries: int = 4_000_000) -> sp.csr_matrix:
    """P as a scipy CSR matrix, built by enumerating every (state, next random levels) pair.

    Independent of the structured apply (it walks the draws forward), so it doubles as a
    cross-check. Memory grows with the number of non-zeros; refused above ``max_states``."""
    n = grid.size
    if n > max_states:
        from stateworth.errors import GridTooLargeError
        raise GridTooLargeError(f"explicit matrix export is for grids up to {max_states:,} states; this one has {n:,}")
    names = list(grid.names)
    pos = {nm: i for i, nm in enumerate(names)}
    kinds = {a.name: a.kind for a in grid.axes}
    status = spec.status_axis
    rnd = [f.axis for f in factors]
    rsizes = [grid.axis(r).size for r in rnd]
    K = int(np.prod(rsizes))
    combos = [c.reshape(-1) for c in np.indices(rsizes)]  # next levels of random axes, (K,)
    nxt = {r: combos[i][None, :] for i, r in enumerate(rnd)}
    counters = {a.name: counter_index(spec, a.name) for a in grid.axes if a.kind == "counter"}
    B = max(1, chunk_entries // K)
    rows_all, cols_all, vals_all = [], [], []
    for start in range(0, n, B):
        flat = np.arange(start, min(n, start + B))
        cur_codes = np.unravel_index(flat, grid.shape)
        cur = {nm: cur_codes[i][:, None] for i, nm in enumerate(names)}
        prob = np.ones((len(flat), K))
        for f in factors:
            idx = []
            for g in f.given:
                idx.append(nxt[g[5:]] if g.startswith("next.") else cur[g])
            idx.append(nxt[f.axis])
            prob = prob * tables[f.axis][tuple(np.broadcast_arrays(*idx))]
        next_codes = []
        for nm in names:
            k = kinds[nm]
            if k == "fixed":
                next_codes.append(np.broadcast_to(cur[nm], prob.shape))
            elif k == "cycle":
                size = grid.axis(nm).size
                next_codes.append(np.broadcast_to((cur[nm] + 1) % size, prob.shape))
            elif k == "counter":
                next_codes.append(counters[nm][cur[nm], cur[status], nxt[status]])
            else:
                next_codes.append(np.broadcast_to(nxt[nm], prob.shape))
        col = np.ravel_multi_index([np.broadcast_to(c, prob.shape) for c in next_codes], grid.shape)
        keep = prob > 0
        rows_all.append(np.broadcast_to(flat[:, None], prob.shape)[keep])
        cols_all.append(col[keep])
        vals_all.append(prob[keep])
    rows = np.concatenate(rows_all)
    cols = np.concatenate(cols_all)
    vals = np.concatenate(vals_all)
    m = sp.csr_matrix((vals, (rows, cols)), shape=(n, n))
    m.sum_duplicates()
    return m
