"""A finite change to one factor table, renormalised within the move rules.

A :class:`TransitionChange` names a random axis, the cells of its factor (``when``: given axis
-> level or levels, spec names such as ``"next.status"``; an omitted given axis means every
level), the next level ``to`` whose probability moves, and ``delta`` (in probability, so 0.03 is
"+3 points"). In every selected cell the entry ``T[cell, to]`` becomes ``p + delta`` and the other
*allowed* entries of the row are scaled by ``(1 - p - delta) / (1 - p)`` so the row still sums to
one and forbidden moves keep probability zero. A change that would leave ``[0, 1]``, that targets
a forbidden move, or that needs mass from a row with none to give is refused with a
:class:`~stateworth.errors.QueryError` naming the cell.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from stateworth.errors import QueryError
from stateworth.rules.factors import move_mask


@dataclass(frozen=True)
class TransitionChange:
    """``+delta`` on ``P(axis' = to | when)`` for the cells ``when`` selects (see module doc)."""

    axis: str
    to: str
    delta: float
    when: Mapping[str, str | Sequence[str]] = field(default_factory=dict)

    def describe(self) -> str:
        cells = ", ".join(f"{k}={v if isinstance(v, str) else '|'.join(v)}" for k, v in self.when.items())
        return f"{self.delta:+.4g} on P({self.axis}'={self.to} | {cells or 'every cell'})"


def _selection(model, change: TransitionChange):
    """-> (factor, index tuple over the table's given dims, index of ``to``)."""
    factor = next((f for f in model.factors if f.axis == change.axis), None)
    if factor is None:
        raise QueryError(f"'{change.axis}' is not a random axis with a factor; random axes are "
                         f"{', '.join(f.axis for f in model.factors)}", field="change.axis")
    if not np.isfinite(change.delta):
        raise QueryError(f"change delta must be a finite probability difference (got {change.delta})",
                         field="change.delta")
    spec = model.spec
    unknown = [k for k in change.when if k not in factor.given]
    if unknown:
        raise QueryError(f"the {change.axis} factor is not given '{unknown[0]}'; a change can select cells by "
                         f"{', '.join(factor.given) or 'nothing (it has no given axes)'}",
                         field=f"change.when.{unknown[0]}")
    sel = []
    for g in factor.given:
        levels = spec.axis_levels(g[5:] if g.startswith("next.") else g)
        val = change.when.get(g)
        if val is None:
            sel.append(np.arange(len(levels)))
            continue
        vals = [val] if isinstance(val, str) else list(val)
        idx = []
        for v in vals:
            if v not in levels:
                raise QueryError(f"'{v}' is not a level of {g}; levels are {', '.join(levels)}",
                                 field=f"change.when.{g}")
            idx.append(levels.index(v))
        sel.append(np.array(idx))
    lv = spec.axis_levels(change.axis)
    if change.to not in lv:
        raise QueryError(f"'{change.to}' is not a level of {change.axis}; levels are {', '.join(lv)}",
                         field="change.to")
    return factor, sel, lv.index(change.to)


def _allowed(model, factor) -> np.ndarray:
    """Move mask aligned to the factor table's shape; a table cell shared by several cases of the
    rule (e.g. markets where a plan is not sold) allows a move only if every case does."""
    from stateworth.rules.factors import _align, _dimname, _levels_of_dim

    spec = model.spec
    dims, mask = move_mask(spec, factor.axis)
    tdims = [_dimname(g) for g in factor.given] + [f"{factor.axis}'"]
    union = list(dict.fromkeys(tdims + list(dims)))
    mb = np.broadcast_to(_align(mask, list(dims), union, spec), [len(_levels_of_dim(spec, d)) for d in union])
    extra = tuple(i for i, d in enumerate(union) if d not in tdims)
    if extra:
        mb = mb.all(axis=extra)
    kept = [d for d in union if d in tdims]
    mb = np.transpose(mb, [kept.index(d) for d in tdims])
    return np.broadcast_to(mb, factor.shape)


def _cell_text(model, factor, idx) -> str:
    spec = model.spec
    parts = []
    for g, i in zip(factor.given, idx):
        parts.append(f"{g}={spec.axis_levels(g[5:] if g.startswith('next.') else g)[int(i)]}")
    return "(" + (", ".join(parts) or "every cell") + ")"


def apply_change(model, change: TransitionChange, tables: Mapping[str, np.ndarray] | None = None,
                 what: str = "") -> np.ndarray:
    """The changed factor table of ``change.axis`` (``tables`` default: the model's).

    Returns the new table (same shape); raises QueryError on an unknown axis, given axis or
    level, a forbidden move, or a probability pushed outside [0, 1]. ``what`` prefixes error
    messages (e.g. "posterior draw 3: ")."""
    factor, sel, j = _selection(model, change)
    t = np.array((model.tables if tables is None else tables)[change.axis], dtype=np.float64)
    allowed = _allowed(model, factor)
    grid_ix = np.ix_(*sel) if sel else ()
    sub_allowed = allowed[grid_ix][..., j] if sel else allowed[..., j]
    if change.delta != 0 and not np.all(sub_allowed):
        bad = np.argwhere(~np.asarray(sub_allowed))[0]
        cell = [s[b] for s, b in zip(sel, bad)]
        raise QueryError(f"{what}the change puts probability on {change.axis}'={change.to} in cell "
                         f"{_cell_text(model, factor, cell)}, a move the rules forbid; choose an allowed next level "
                         f"or narrow 'when'", field="change.to")
    rows = t[grid_ix] if sel else t
    p = rows[..., j]
    new_p = p + change.delta
    tol = 1e-12
    out_of = (new_p < -tol) | (new_p > 1 + tol)
    if out_of.any():
        bad = np.argwhere(out_of)[0]
        cell = [s[b] for s, b in zip(sel, bad)]
        raise QueryError(f"{what}the change would set P({change.axis}'={change.to}) to {float(new_p[tuple(bad)]):.4g} "
                         f"in cell {_cell_text(model, factor, cell)} (now {float(p[tuple(bad)]):.4g}); probabilities "
                         "must stay within [0, 1]", field="change.delta")
    new_p = np.clip(new_p, 0.0, 1.0)
    rest = 1.0 - p
    stuck = (rest <= tol) & (change.delta < 0)
    if stuck.any():
        bad = np.argwhere(stuck)[0]
        cell = [s[b] for s, b in zip(sel, bad)]
        raise QueryError(f"{what}cell {_cell_text(model, factor, cell)} has all its mass on {change.axis}'={change.to}; "
                         "there is no other move to take the removed probability", field="change.delta")
    scale = np.where(rest > tol, (1.0 - new_p) / np.where(rest > tol, rest, 1.0), 0.0)
    new_rows = rows * scale[..., None]
    new_rows[..., j] = new_p
    if sel:
        t[grid_ix] = new_rows
    else:
        t = new_rows
    return t


def describe_change(model, change: TransitionChange) -> dict:
    """JSON-ready description of the change: axis, cells, next level, delta, old probabilities."""
    factor, sel, j = _selection(model, change)
    t = model.tables[change.axis]
    rows = t[np.ix_(*sel)] if sel else t
    p = rows[..., j]
    return {"axis": change.axis, "to": change.to, "delta": float(change.delta),
            "when": {k: (v if isinstance(v, str) else list(v)) for k, v in change.when.items()},
            "cells": int(p.size), "old_min": float(p.min()), "old_max": float(p.max()),
            "text": change.describe()}
