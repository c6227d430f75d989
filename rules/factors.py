"""Factors: the kernel of each random axis, and the move rules that constrain it.

A factor for random axis ``a`` is a table ``T[g_1, ..., g_k, a']`` = P(a' | g_1..g_k) over the
levels of the axes it is ``given`` (current values ``x`` or next values ``next.x`` of axes drawn
before it). The transition probability of the chain is the product of the factors times the
deterministic moves of fixed axes (none), counters and cycles.

Move rules compile to boolean masks over (the axes the rule mentions, a'): ``moves`` (allowed next
levels from each current level) and, on the status axis, ``not_sold`` (a plan unavailable in some
levels of a fixed axis). A table with positive mass on a forbidden move is refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.errors import SpecError
from stateworth.rules.spec import ROW_SUM_TOLERANCE, Spec, not_sold_pairs


@dataclass(frozen=True)
class Factor:
    """Static description of one factor: the axis it draws and what it is given."""

    axis: str
    given: tuple[str, ...]  # spec names: "x" (current) or "next.x"
    shape: tuple[int, ...]  # sizes of given..., size of axis

    @property
    def given_axes(self) -> tuple[str, ...]:
        return tuple(g[5:] if g.startswith("next.") else g for g in self.given)


def factors_of(spec: Spec) -> list[Factor]:
    """The factors of a checked spec, in draw order."""
    out = []
    for name in spec.draw_order:
        given = tuple(spec.axes[name].given or [])
        shape = tuple(len(spec.axis_levels(g[5:] if g.startswith("next.") else g)) for g in given)
        out.append(Factor(name, given, shape + (len(spec.axis_levels(name)),)))
    return out


def move_mask(spec: Spec, axis: str) -> tuple[tuple[str, ...], np.ndarray]:
    """The allowed-move mask of a random axis.

    Returns ``(dims, mask)``: ``dims`` are current-axis names the rules mention (the axis itself
    for ``moves``, fixed axes for ``not_sold``), then the axis's next value; ``mask[..., a']`` is
    True where the move is allowed."""
    ax = spec.axes[axis]
    lv = spec.axis_levels(axis)
    dims: list[str] = []
    if ax.moves:
        dims.append(axis)
    ns = not_sold_pairs(spec) if ax.kind == "status" else []
    for fax in dict.fromkeys(f for _, f, _ in ns):
        dims.append(fax)
    shape = tuple(len(spec.axis_levels(d)) for d in dims) + (len(lv),)
    mask = np.ones(shape, dtype=bool)
    if ax.moves:
        for frm, tos in ax.moves.items():
            i = lv.index(frm)
            allowed = np.zeros(len(lv), dtype=bool)
            allowed[[lv.index(t) for t in tos]] = True
            mask[i] &= allowed  # first dim is the axis itself
    for plan, fax, flevel in ns:
        d = dims.index(fax)
        sl = [slice(None)] * len(shape)
        sl[d] = spec.axis_levels(fax).index(flevel)
        sl[-1] = lv.index(plan)
        mask[tuple(sl)] = False
    return tuple(dims) + (f"{axis}'",), mask


def plans_without_way_in(spec: Spec) -> list[str]:
    """Member levels (plans) that no allowed move leads into from another status level (a
    non-member or another plan) in any level of the fixed axes ``not_sold`` names: nobody can
    join them or change into them, so only customers already in them (data) can hold them."""
    dims, mask = move_mask(spec, spec.status_axis)
    lv = spec.axis_levels(spec.status_axis)
    out = []
    for plan in spec.members:
        k = lv.index(plan)
        into = mask[..., k]  # over the rule's current axes
        if spec.status_axis in dims:
            into = np.delete(into, k, axis=0)  # staying in the plan is no way in
        elif len(lv) < 2:
            continue
        if not into.any():
            out.append(plan)
    return out


def unreachable_plan_warning(spec: Spec, plan: str, data: str) -> str:
    """The warning line for a plan nobody can move into (``data`` says what the data shows)."""
    st = spec.status_axis
    return (f"axes.{st}: plan '{plan}' has no way in (no move rule leads into it from a non-member or another "
            f"plan) {data}; its values are those of states nobody reaches: allow a move into it in "
            f"axes.{st}.moves or not_sold, or remove the plan")


def table_from_rows(spec: Spec, factor: Factor, source: str = "<spec>") -> np.ndarray:
    """Build a factor table from the spec's written ``table`` rows (later rows override)."""
    ax = spec.axes[factor.axis]
    where = f"{source}: axes.{factor.axis}.table"
    if not ax.table:
        raise SpecError("no probabilities for this factor; write a table or fit the model from a panel "
                        "(`stateworth fit`)", where=where)
    lv = spec.axis_levels(factor.axis)
    t = np.full(factor.shape, np.nan)
    given_levels = [spec.axis_levels(g) for g in factor.given_axes]
    for row in ax.table:
        probs = np.zeros(len(lv))
        for k, pr in row.probs.items():
            probs[lv.index(k)] = pr
        t[np.ix_(*_row_cells(spec, factor, row), np.arange(len(lv)))] = probs
    if np.isnan(t).any():
        cell = np.argwhere(np.isnan(t[..., 0]))[0] if t.ndim > 1 else []
        desc = ", ".join(f"{g}={given_levels[i][c]}" for i, (g, c) in enumerate(zip(factor.given, cell)))
        raise SpecError(f"no row covers the cell ({desc}); add a row whose 'when' matches it, or a "
                        "first row with no 'when' as a default", where=where)
    return t


def _row_cells(spec: Spec, factor: Factor, row) -> list[np.ndarray]:
    """Per given axis, the level indices a written row's ``when`` covers (all if omitted)."""
    sel = []
    for g, base in zip(factor.given, factor.given_axes):
        levels = spec.axis_levels(base)
        val = row.when.get(g)
        vals = levels if val is None else ([val] if isinstance(val, str) else val)
        sel.append(np.array([levels.index(v) for v in vals], dtype=np.int64))
    return sel


def row_of_cells(spec: Spec, factor: Factor) -> np.ndarray:
    """Index of the written row that sets each cell (the last one covering it; -1 for none),
    shape = the factor's given sizes."""
    owner = np.full(factor.shape[:-1], -1, dtype=np.int64)
    for i, row in enumerate(spec.axes[factor.axis].table or []):
        owner[np.ix_(*_row_cells(spec, factor, row))] = i
    return owner


def check_table(spec: Spec, factor: Factor, table: np.ndarray, where: str,
                rows: np.ndarray | None = None) -> np.ndarray:
    """Validate a factor table: shape, finite, non-negative, rows sum to 1, no forbidden mass.

    ``rows`` (from :func:`row_of_cells`) names the written row behind a cell with forbidden mass."""
    t = np.asarray(table, dtype=np.float64)
    if t.shape != factor.shape:
        raise SpecError(f"table has shape {t.shape}; expected {factor.shape} "
                        f"(given {', '.join(factor.given) or 'nothing'}, then {factor.axis})", where=where)
    bad = ~np.isfinite(t)
    if bad.any():
        raise SpecError(f"table has a non-finite entry at {_cell(spec, factor, np.argwhere(bad)[0])}", where=where)
    if (t < 0).any():
        i = np.argwhere(t < 0)[0]
        raise SpecError(f"table has a negative probability {t[tuple(i)]:.3g} at {_cell(spec, factor, i)}", where=where)
    sums = t.sum(axis=-1)
    off = np.abs(sums - 1.0) > ROW_SUM_TOLERANCE
    if off.any():
        i = np.argwhere(off)[0]
        raise SpecError(f"row {_cell(spec, factor, tuple(i) + (None,))} sums to {sums[tuple(i)]:.12g}; "
                        f"rows must sum to 1 within {ROW_SUM_TOLERANCE:g}", where=where)
    dims, mask = move_mask(spec, factor.axis)
    if not mask.all():
        # broadcast table and mask over the union of their dims, current ones first and the next value last (for the message)
        tdims = [_dimname(g) for g in factor.given] + [f"{factor.axis}'"]
        union = list(dict.fromkeys(tdims[:-1] + list(dims[:-1]))) + [tdims[-1]]
        tb = _align(t, tdims, union, spec)
        mb = _align(mask, list(dims), union, spec)
        viol = (tb > 0) & ~mb
        if viol.any():
            i = tuple(np.argwhere(viol)[0])
            val = np.broadcast_to(tb, viol.shape)[i]
            desc = _union_cell(spec, union, i)
            if rows is not None:
                cell = tuple(i[union.index(d)] for d in tdims[:-1])
                if rows[cell] >= 0:
                    where = f"{where}[{rows[cell]}].probs"
            raise SpecError(f"probability {val:.3g} on a move the rules forbid ({desc}); set it to 0 or "
                            f"allow the move in axes.{factor.axis}.moves / not_sold", where=where)
    return t


def _dimname(g: str) -> str:
    return g[5:] + "'" if g.startswith("next.") else g


def _levels_of_dim(spec: Spec, d: str) -> list[str]:
    return spec.axis_levels(d.rstrip("'"))


def _align(arr: np.ndarray, dims: list[str], union: list[str], spec: Spec) -> np.ndarray:
    """Transpose/expand ``arr`` (dims ``dims``) to broadcast against ``union``."""
    order = [dims.index(d) for d in union if d in dims]
    a = np.transpose(arr, order)
    shape = [len(_levels_of_dim(spec, d)) if d in dims else 1 for d in union]
    return a.reshape(shape)


def _union_cell(spec: Spec, union: list[str], idx) -> str:
    parts = []
    for d, i in zip(union, idx):
        lv = _levels_of_dim(spec, d)
        name = d.rstrip("'")
        parts.append(f"next {name}={lv[i]}" if d.endswith("'") else f"{name}={lv[i]}")
    return ", ".join(parts)


def _cell(spec: Spec, factor: Factor, idx) -> str:
    parts = []
    names = list(factor.given) + [f"next {factor.axis}"]
    for n, i in zip(names, idx):
        if i is None:
            continue
        base = n.split(" ")[-1]
        base = base[5:] if base.startswith("next.") else base
        parts.append(f"{n}={spec.axis_levels(base)[int(i)]}")
    return "(" + ", ".join(parts) + ")"


def masked_uniform(spec: Spec, factor: Factor) -> np.ndarray:
    """A table spreading mass evenly over the allowed moves of each cell (for tests and priors)."""
    dims, mask = move_mask(spec, factor.axis)
    tdims = [_dimname(g) for g in factor.given] + [f"{factor.axis}'"]
    union = list(dict.fromkeys(tdims + list(dims)))
    mb = np.broadcast_to(_align(mask, list(dims), union, spec),
                         [len(_levels_of_dim(spec, d)) for d in union]).astype(float)
    # reduce dims not in the table by taking the AND (a shared row must respect every case)
    extra = [i for i, d in enumerate(union) if d not in tdims]
    if extra:
        mb = mb.min(axis=tuple(extra))
    kept = [d for d in union if d in tdims]
    mb = np.transpose(mb, [kept.index(d) for d in tdims])
    rows = mb.sum(axis=-1, keepdims=True)
    if (rows == 0).any():
        raise SpecError("the move rules leave a cell with no allowed next level", where=f"axes.{factor.axis}")
    return mb / rows
