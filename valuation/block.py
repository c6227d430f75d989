"""The part of a model that a factor change touches: its fixed cells, as a smaller model.

Fixed axes never change, so P is block-diagonal over fixed cells and a change to a factor
entry that is conditioned on fixed-axis levels (``when = {"market": "m03", ...}``, on a factor
``given`` that axis) leaves every other block's values exactly as they were. Re-solving only the
touched blocks is exact and costs their share of the grid. :func:`restrict` builds that
sub-model: the same spec, a grid whose fixed axes keep only the touched levels, factor tables
sliced along their fixed dims, and rewards sliced from the full model's (money per period).
"""

from __future__ import annotations

import dataclasses
from typing import Mapping

import numpy as np

from stateworth.rules.factors import Factor
from stateworth.rules.grid import Axis, Grid


@dataclasses.dataclass(frozen=True)
class Block:
    """``levels``: per fixed axis the kept level codes; ``states``: their flat indices in the
    full grid ``(m,)``, in the sub-grid's order; ``full``: True when nothing was cut."""

    levels: dict[str, np.ndarray]
    states: np.ndarray
    full: bool


def touched(model, axis: str, when: Mapping[str, object]) -> Block:
    """The fixed cells whose transitions a change to ``axis``'s factor at ``when`` alters."""
    grid = model.grid
    factor = next(f for f in model.factors if f.axis == axis)
    levels = {}
    for ax in grid.axes:
        if ax.kind != "fixed":
            continue
        if ax.name in factor.given and ax.name in when:
            val = when[ax.name]
            vals = [val] if isinstance(val, str) else list(val)
            levels[ax.name] = np.array(sorted({ax.levels.index(v) for v in vals}), dtype=np.int64)
        else:
            levels[ax.name] = np.arange(ax.size, dtype=np.int64)
    full = all(len(levels[a]) == grid.axis(a).size for a in levels)
    sel = [levels[a.name] if a.kind == "fixed" else np.arange(a.size) for a in grid.axes]
    states = np.arange(grid.size, dtype=np.int64).reshape(grid.shape)[np.ix_(*sel)].reshape(-1)
    return Block(levels, states, full)


def slice_table(model, factor: Factor, table: np.ndarray, block: Block, lead: int = 0) -> np.ndarray:
    """A factor table (with ``lead`` leading batch dims) cut to the block's fixed levels."""
    t = table
    for d, g in enumerate(factor.given):
        if g in block.levels:
            t = np.take(t, block.levels[g], axis=lead + d)
    return t


def restrict(model, block: Block, tables: Mapping[str, np.ndarray], rewards: Mapping[str, np.ndarray]):
    """A CompiledModel over the block only, with ``tables`` (full-shape) sliced to it and the
    given full-grid ``rewards`` vectors sliced to its states. Spec, beta and metadata are the
    full model's; the hash is left as the full model's (the block is a computational device)."""
    if block.full:
        return model.replace(tables=dict(tables), rewards=dict(rewards) or None, draws={}, reuse_plan=True)
    grid = Grid(tuple(Axis(a.name, a.kind, tuple(a.levels[i] for i in block.levels[a.name]))
                      if a.kind == "fixed" else a for a in model.grid.axes))
    factors, sub = [], {}
    for f in model.factors:
        shape = tuple(len(block.levels[g]) if g in block.levels else s for g, s in zip(f.given, f.shape[:-1]))
        nf = Factor(f.axis, f.given, shape + (f.shape[-1],))
        factors.append(nf)
        sub[f.axis] = slice_table(model, f, np.asarray(tables[f.axis]), block)
    return model.replace(grid=grid, factors=factors, tables=sub,
                         rewards={k: np.asarray(v)[block.states] for k, v in rewards.items()} or None, draws={},
                         reuse_plan=True)
