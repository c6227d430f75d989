"""A second coarse space for the states whose counters cannot move: the frozen clusters.

Why: a counter that advances only for some statuses (tenure ``advance_while = "member"``)
stands still for the others. Non-members at a given tenure level then form a cluster that
only they re-enter: they stay (a prospect stays a prospect with probability ~0.99 a month),
leave by joining, and nothing else flows in. Each cluster has its own slow mode, ``~1 / (1 -
beta * stay)``, and the main coarse space (:mod:`.preconditioner`) averages over counters, so it
sees one mode where there is one per counter level. In a point model fitted from pooled data
the clusters are alike and the average is right; in a posterior draw each cluster's stay
probability is drawn on its own (cells that no account visits are drawn from their prior), and
GMRES needed 37-46 iterations against 11-15 (measured on the 10^5 and 3.6 x 10^5-state
reference grids; with this space, 17).

Coarse space: for the *frozen statuses* (those no counter advances on arrival, see
:func:`rules.counters.counter_flags`) one aggregate per fixed cell, counter levels (all
counters, kept whole), frozen status and the most persistent chance axes (up to
:data:`MAX_BLOCK` per block), averaging over the other axes. The Galerkin matrix keeps only moves
that stay in the cluster (frozen status to frozen status with every counter unchanged); moves
out of it (joining) are outflow. So it is block-diagonal over (fixed cell, counter levels),
with small blocks, and it is a product of the factor tables (one einsum, traceable, so a draw's
matrix is built inside the batched draw solve from that draw's tables).

Prolongation ``Q2`` copies an aggregate's value to its states (zero on the other statuses);
restriction ``R2`` averages. The correction is applied after the main coarse one (see
:meth:`.preconditioner.TwoLevel.apply`): ``y <- y + Q2 (I - beta R2 P Q2)^{-1} R2 (r - A y)``.
Memory: the inverse blocks, ``nb x K2 x K2`` floats (nb = fixed cells x counter levels), or
``nb x S x (K2/S)^2`` where the move rules keep the S frozen statuses apart (``split``).
"""

from __future__ import annotations

import string
from dataclasses import dataclass
from functools import partial
from typing import Mapping

import jax
import jax.numpy as jnp
import numpy as np
from stateworth import config

#: largest block (frozen statuses x kept chance levels); blocks number fixed cells x counter levels
MAX_BLOCK = 64


@dataclass(frozen=True)
class FrozenLayout:
    """Static structure of the frozen-cluster coarse space (hashable: a jit static argument).

    ``factor_subs``: per factor (model order) its einsum subscripts; ``masks``: per counter the
    stay mask ``[c, st, st']`` (1 where the move keeps the counter at c) as nested tuples;
    ``expr``: the einsum over (factor tables, masks, status one-hots, ones) giving the blocks;
    ``restrict_expr`` / ``prolong_expr``: grid vector <-> aggregates."""

    grid_shape: tuple[int, ...]
    status_pos: int
    frozen: tuple[int, ...]
    axes: tuple[str, ...]
    kept: tuple[str, ...]  # chance axes kept whole in the aggregates
    factor_axes: tuple[str, ...]
    factor_subs: tuple[str, ...]
    masks: tuple[tuple[str, tuple], ...]
    ones: tuple[tuple[str, int], ...]
    expr: str
    denom: float
    restrict_expr: str
    restrict_denom: float
    prolong_expr: str
    prolong_shape: tuple[int, ...]
    blocks: int
    block: int
    span: tuple[int, int] | None  # frozen statuses as one run of codes [lo, hi), else None
    averaged_pos: tuple[int, ...]  # grid dims averaged within an aggregate
    perm: tuple[int, ...]  # kept dims (grid order) -> block dims then key dims
    #: diagonal sub-blocks of a block: the number of frozen statuses where the move rules allow
    #: no move between two of them and the status leads the key (then the Galerkin matrix is
    #: block-diagonal by status and each status's part is inverted alone), else 1
    split: int = 1
    #: per kept cycle: einsum subscripts (current, next) and its size; its operand is the
    #: one-period rotation ``S[c, (c + 1) mod size] = 1``
    shifts: tuple[tuple[str, int], ...] = ()


def frozen_layout(model, max_block: int = MAX_BLOCK) -> FrozenLayout | None:
    """The layout for ``model``, or None where there is nothing to freeze (no counter, no status
    that every counter stands still on, or no cluster smaller than the grid)."""
    from stateworth.rules.counters import counter_flags, counter_index

    spec, grid = model.spec, model.grid
    counters = [a.name for a in grid.axes if a.kind == "counter"]
    if not counters:
        return None
    st = spec.status_axis
    S = grid.axis(st).size
    still = np.ones(S, dtype=bool)
    for c in counters:
        still &= ~counter_flags(spec, c)[1]
    frozen = tuple(int(i) for i in np.flatnonzero(still))
    if not frozen:
        return None
    from stateworth.solver.preconditioner import persistence

    # cycles first, for the reason the main coarse key keeps them (a rotation's modes are slow):
    # a frozen cluster averaged over the calendar cannot follow a seasonal joining rate
    cycles = [a.name for a in grid.axes if a.kind == "cycle"]
    chance = sorted((a.name for a in grid.axes if a.kind == "chance"), key=lambda a: -persistence(model, a))
    kept, size = [], len(frozen)
    for a in cycles + chance:
        if size * grid.axis(a).size <= max_block:
            kept.append(a)
            size *= grid.axis(a).size
    letters = iter(string.ascii_letters)
    cur = {a.name: next(letters) for a in grid.axes}
    nxt = {a.name: next(letters) for a in grid.axes if a.kind in ("status", "chance") or a.name in kept}
    for c in counters:  # a counter that stays keeps its letter
        nxt[c] = cur[c]
    st_f, st_nf = next(letters), next(letters)
    subs, faxes = [], []
    for f in model.factors:
        subs.append("".join(nxt[g[5:]] if g.startswith("next.") else cur[g] for g in f.given) + nxt[f.axis])
        faxes.append(f.axis)
    masks = []
    for c in counters:
        idx = counter_index(spec, c)
        stay = (idx == np.arange(idx.shape[0])[:, None, None]).astype(np.float64)
        masks.append((cur[c] + cur[st] + nxt[st], tuple(map(tuple, stay.reshape(stay.shape[0], -1)))))
    shifts = tuple((cur[a] + nxt[a], grid.axis(a).size) for a in kept if grid.axis(a).kind == "cycle")
    block_axes = [a.name for a in grid.axes if a.kind in ("fixed", "counter")]  # grid order
    # the status leads the key (then the kept axes in grid order), so that blocks split by status
    key_axes = [st] + [a.name for a in grid.axes if a.name in kept]
    key_cur = [st_f if a == st else cur[a] for a in key_axes]
    key_nxt = [st_nf if a == st else nxt[a] for a in key_axes]
    out = "".join(cur[a] for a in block_axes) + "".join(key_cur) + "".join(key_nxt)
    mentioned = set("".join(subs) + "".join(m[0] for m in masks) + "".join(s for s, _ in shifts))
    ones = tuple((cur[a], grid.axis(a).size) for a in block_axes + [k for k in kept]
                 if cur[a] not in mentioned)
    mentioned |= {o[0] for o in ones}
    # the status one-hots pick the frozen levels of the current and next status
    parts = list(subs) + [m[0] for m in masks] + [s for s, _ in shifts] + [cur[st] + st_f, nxt[st] + st_nf] + \
        [o[0] for o in ones]
    expr = ",".join(parts) + "->" + out
    denom = 1.0
    for a in grid.axes:  # averaged current axes that the operands mention
        if a.kind not in ("fixed", "counter") and a.name != st and a.name not in kept and cur[a.name] in mentioned:
            denom *= a.size
    g = "".join(cur[a.name] for a in grid.axes)
    r_out = "".join(cur[a] for a in block_axes) + "".join(key_cur)
    averaged = [a for a in grid.axes if a.kind not in ("fixed", "counter") and a.name != st and a.name not in kept]
    restrict_denom = float(np.prod([a.size for a in averaged])) if averaged else 1.0
    p_out = "".join(cur[a.name] for a in grid.axes if a not in averaged)
    # prolong receives the aggregates back in grid order (see FrozenCoarse.prolong)
    p_in = "".join(st_f if a.name == st else cur[a.name] for a in grid.axes if a not in averaged)
    prolong_shape = tuple(1 if a in averaged else a.size for a in grid.axes)
    blocks = int(np.prod([grid.axis(a).size for a in block_axes], dtype=np.int64))
    if blocks <= 1:
        return None
    span = (frozen[0], frozen[-1] + 1) if frozen == tuple(range(frozen[0], frozen[-1] + 1)) else None
    kept_dims = [a.name for a in grid.axes if a not in averaged]
    order = [a for a in kept_dims if a in block_axes] + key_axes
    perm = tuple(kept_dims.index(a) for a in order)
    averaged_pos = tuple(grid.position(a.name) for a in averaged)
    levels = spec.axis_levels(st)
    moves = spec.axes[st].moves or {}
    apart = all(levels[j] not in moves.get(levels[i], levels) for i in frozen for j in frozen if i != j)
    split = len(frozen) if apart and len(frozen) > 1 else 1
    return FrozenLayout(grid.shape, grid.position(st), frozen, tuple(a.name for a in grid.axes), tuple(kept),
                        tuple(faxes), tuple(subs), tuple(masks), ones, expr, denom,
                        f"{g},{cur[st]}{st_f}->{r_out}", restrict_denom, f"{p_in},{cur[st]}{st_f}->{p_out}",
                        prolong_shape, blocks, size, span, averaged_pos, perm, split, shifts)


def _onehot(layout: FrozenLayout, dtype) -> jax.Array:
    S = layout.grid_shape[layout.status_pos]
    h = np.zeros((S, len(layout.frozen)))
    h[list(layout.frozen), np.arange(len(layout.frozen))] = 1.0
    return h.astype(np.dtype(dtype))  # a constant: numpy inside a trace, no conversion kernel


def frozen_matrix(layout: FrozenLayout, tables: Mapping[str, jax.Array]) -> jax.Array:
    """``R2 P Q2`` restricted to moves that stay in the cluster: ``(blocks, K2, K2)`` (traceable:
    ``tables`` may be tracers, e.g. one posterior draw inside the batched draw solve)."""
    config.use_jax()
    ops = [jnp.asarray(tables[a], dtype=jnp.float64) for a in layout.factor_axes]
    S = layout.grid_shape[layout.status_pos]
    ops += [jnp.asarray(np.array(m, dtype=np.float64).reshape(len(m), S, S)) for _, m in layout.masks]
    ops += [jnp.asarray(np.roll(np.eye(n), 1, axis=1)) for _, n in layout.shifts]
    h = _onehot(layout, jnp.float64)
    ops += [h, h]
    ops += [jnp.ones(n) for _, n in layout.ones]
    c = jnp.einsum(layout.expr, *ops, optimize="auto") / layout.denom
    return c.reshape(layout.blocks, layout.block, layout.block)


def frozen_matrix_np(layout: FrozenLayout, tables: Mapping[str, np.ndarray]) -> np.ndarray:
    """:func:`frozen_matrix` in numpy, for tables known now (no compile)."""
    ops = [np.asarray(tables[a], dtype=np.float64) for a in layout.factor_axes]
    S = layout.grid_shape[layout.status_pos]
    ops += [np.array(m, dtype=np.float64).reshape(len(m), S, S) for _, m in layout.masks]
    ops += [np.roll(np.eye(n), 1, axis=1) for _, n in layout.shifts]
    h = np.asarray(_onehot(layout, jnp.float64))
    ops += [h, h]
    ops += [np.ones(n) for _, n in layout.ones]
    c = np.einsum(layout.expr, *ops, optimize="greedy") / layout.denom
    return c.reshape(layout.blocks, layout.block, layout.block)


# jitted once per layout: called op by op, the einsum re-searched its contraction path and
# dispatched each pairwise product on every call (~9 ms of a ~60 ms one-market change)
_frozen_matrix_jit = jax.jit(frozen_matrix, static_argnums=0)


@partial(jax.tree_util.register_dataclass, data_fields=["inv"], meta_fields=["layout"])
@dataclass(frozen=True, eq=False)
class FrozenCoarse:
    """The frozen-cluster correction as a pytree: ``inv`` ``(blocks, K2, K2)`` is its leaf."""

    layout: FrozenLayout
    inv: jax.Array

    def astype(self, dtype) -> "FrozenCoarse":
        return FrozenCoarse(self.layout, self.inv.astype(dtype))

    def restrict(self, r: jax.Array) -> jax.Array:
        """``R2 r``: the mean of ``r`` ``(n,)`` over each aggregate -> ``(blocks, K2)``."""
        lay = self.layout
        x = r.reshape(lay.grid_shape)
        if lay.span is not None:  # slices, not a one-hot product: one pass over the vector
            x = jax.lax.slice_in_dim(x, lay.span[0], lay.span[1], axis=lay.status_pos)
            x = jnp.mean(x, axis=lay.averaged_pos) if lay.averaged_pos else x
            x = jnp.transpose(x, lay.perm)
        else:
            x = jnp.einsum(lay.restrict_expr, x, _onehot(lay, r.dtype)) / lay.restrict_denom
        return x.reshape(lay.blocks, lay.block)

    def prolong(self, y: jax.Array) -> jax.Array:
        """``Q2 y``: each aggregate's value ``(blocks, K2)`` copied to its states, 0 elsewhere."""
        lay = self.layout
        nf = len(lay.frozen)
        kept_shape = [n for i, n in enumerate(lay.grid_shape) if i not in lay.averaged_pos]
        kept_shape[lay.status_pos - sum(1 for p in lay.averaged_pos if p < lay.status_pos)] = nf
        z = jnp.transpose(y.reshape([kept_shape[i] for i in lay.perm]), np.argsort(lay.perm))
        if lay.span is not None:
            shape = list(lay.prolong_shape)
            shape[lay.status_pos] = nf
            z = jnp.broadcast_to(z.reshape(shape), [nf if i == lay.status_pos else n
                                                    for i, n in enumerate(lay.grid_shape)])
            pad = [(0, 0)] * len(lay.grid_shape)
            pad[lay.status_pos] = (lay.span[0], lay.grid_shape[lay.status_pos] - lay.span[1])
            return jnp.pad(z, pad).reshape(-1)
        z = jnp.einsum(lay.prolong_expr, z, _onehot(lay, y.dtype)).reshape(lay.prolong_shape)
        return jnp.broadcast_to(z, lay.grid_shape).reshape(-1)

    def solve(self, r: jax.Array) -> jax.Array:
        """``Q2 (I - beta R2 P Q2)^{-1} R2 r`` for one vector ``(n,)``."""
        x = self.restrict(r).astype(self.inv.dtype)
        if self.inv.ndim == 4:  # split by status: (blocks, statuses, k, k)
            y = jnp.einsum("bsij,bsj->bsi", self.inv, x.reshape(self.inv.shape[:3])).reshape(x.shape)
        else:
            y = jnp.einsum("bij,bj->bi", self.inv, x)
        return self.prolong(y.astype(r.dtype))


def frozen_coarse(layout: FrozenLayout, tables: Mapping[str, jax.Array], beta, *, transpose: bool = False,
                  dtype=jnp.float64) -> FrozenCoarse:
    """The correction for ``I - beta P`` (or its transpose) with P's factor ``tables``."""
    config.use_jax()
    from stateworth.solver.preconditioner import _coarse_inverse, coarse_inverse_np

    if not any(isinstance(t, jax.core.Tracer) for t in tables.values()) and \
            not isinstance(beta, jax.core.Tracer):
        # built eagerly (a point solve): numpy, no compile
        C = frozen_matrix_np(layout, tables)
        if layout.split > 1:
            S, k = layout.split, layout.block // layout.split
            C = C.reshape(layout.blocks, S, k, S, k)
            C = np.stack([C[:, s, :, s, :] for s in range(S)], axis=1).reshape(layout.blocks * S, k, k)
            inv = coarse_inverse_np(C, beta, transpose).reshape(layout.blocks, S, k, k)
        else:
            inv = coarse_inverse_np(C, beta, transpose)
        return FrozenCoarse(layout, config.device(inv, dtype))
    C = _frozen_matrix_jit(layout, dict(tables))
    b = jnp.asarray(beta, dtype=jnp.float64)
    if layout.split > 1:
        # the blocks are block-diagonal by status (no move between frozen statuses): invert
        # each status's part alone, S times fewer flops (and 2x faster than the whole block
        # measured with 2 statuses of 20 levels)
        S, k = layout.split, layout.block // layout.split
        C = C.reshape(layout.blocks, S, k, S, k)
        C = jnp.stack([C[:, s, :, s, :] for s in range(S)], axis=1).reshape(layout.blocks * S, k, k)
        return FrozenCoarse(layout, _coarse_inverse(C, b, transpose, dtype).reshape(layout.blocks, S, k, k))
    return FrozenCoarse(layout, _coarse_inverse(C, b, transpose, dtype))
