"""States of a model's grid as users name them, and the moves between them.

A coordinate is a mapping axis -> level (name, or integer code) with one level on every axis.
Moves used by the contrasts:

* a status event (join: non-member -> plan; lapse: plan -> non-member; change: plan -> plan)
  leads to the *counterpart* state at the same date: the status replaced, every counter reset to
  0 when the event is in its ``reset_on`` and otherwise unchanged; cycles, fixed and chance axes
  unchanged. (The chain's own counter map also ages counters by a period; a contrast compares two
  states now, so no ageing is applied.)
* former-member levels are the non-member levels that a member can move into under the status
  move rules (``lapsed``); never-member levels are the other non-member levels (``prospect``).
"""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

from stateworth.errors import QueryError
from stateworth.rules.factors import move_mask


def full_coords(grid, coords: Mapping[str, Any]) -> dict[str, str]:
    """Validate a coordinate and return it with level names (QueryError names the axis/level)."""
    if not isinstance(coords, Mapping):
        raise QueryError(f"a state is a mapping axis -> level; got {type(coords).__name__}", field="coords")
    flat = grid.flat_index(coords)
    return grid.coords(flat)


def index_many(grid, columns: Mapping[str, Sequence[Any]]) -> np.ndarray:
    """Per-axis equal-length level columns (names or codes) -> ``(m,)`` flat indices."""
    unknown = [k for k in columns if k not in grid.names]
    if unknown:
        raise QueryError(f"unknown axis '{unknown[0]}'; axes are {', '.join(grid.names)}", field=unknown[0])
    missing = [n for n in grid.names if n not in columns]
    if missing:
        raise QueryError(f"no levels given for axis '{missing[0]}'; every axis needs a column", field=missing[0])
    lengths = {len(columns[n]) for n in grid.names}
    if len(lengths) != 1:
        raise QueryError(f"coordinate columns have different lengths {sorted(lengths)}; give one level per "
                         "state on every axis", field="columns")
    codes = []
    for ax in grid.axes:
        raw = columns[ax.name]
        col = np.asarray(raw, dtype=object) if isinstance(raw, (list, tuple)) else np.asarray(raw)
        if col.dtype.kind == "O" and len(col) and isinstance(col[0], (int, np.integer)):
            col = col.astype(np.int64)
        if col.dtype.kind in "iu":
            bad = (col < 0) | (col >= ax.size)
            if bad.any():
                raise QueryError(f"level code {int(col[bad][0])} is out of range for {ax.name} (0..{ax.size - 1})",
                                 field=ax.name)
            codes.append(col.astype(np.int64))
            continue
        if col.dtype.kind == "O":  # Python strings: one dict lookup each beats converting them
            lookup = {lv: i for i, lv in enumerate(ax.levels)}
            got = np.fromiter((lookup.get(x, -1) for x in col), dtype=np.int64, count=len(col))
            if (got < 0).any():
                raise QueryError(f"'{col[got < 0][0]}' is not a level of {ax.name}; levels are "
                                 f"{', '.join(ax.levels)}", field=ax.name)
            codes.append(got)
            continue
        # fixed-width strings: binary search in the sorted levels, vectorised
        names = np.asarray(ax.levels)
        order = np.argsort(names)
        sorted_names = names[order]
        col = col.astype(sorted_names.dtype if col.dtype.kind == "U" and col.dtype.itemsize <= sorted_names.dtype.itemsize
                         else str)
        pos = np.minimum(np.searchsorted(sorted_names, col), len(names) - 1)
        bad = sorted_names[pos] != col
        if bad.any():
            raise QueryError(f"'{col[bad][0]}' is not a level of {ax.name}; levels are {', '.join(ax.levels)}",
                             field=ax.name)
        codes.append(order[pos].astype(np.int64))
    return np.ravel_multi_index(codes, grid.shape).astype(np.int64)


def member_flags(spec) -> np.ndarray:
    """Boolean over the status levels: True for a plan (see ``Spec.member_flags``)."""
    return spec.member_flags()


def former_member_levels(spec) -> list[str]:
    """Non-member status levels that some member level may move into."""
    lv = spec.axis_levels(spec.status_axis)
    dims, mask = move_mask(spec, spec.status_axis)
    member = member_flags(spec)
    # collapse every current dim except the status itself (not_sold dims): any allowed move counts
    if dims[0] == spec.status_axis:
        m = mask.reshape(mask.shape[0], -1, mask.shape[-1]).any(axis=1)
        reach = m[member].any(axis=0)
    else:  # no move rules on status: every level is reachable from members
        reach = np.ones(len(lv), dtype=bool)
    return [x for x, r, mem in zip(lv, reach, member) if r and not mem]


def never_member_levels(spec) -> list[str]:
    former = set(former_member_levels(spec))
    return [x for x in spec.non_members if x not in former]


def status_event(spec, frm: str, to: str) -> str | None:
    """'join', 'lapse', 'change' or None (same status, or non-member -> non-member)."""
    members = set(spec.members)
    if frm == to:
        return None
    if frm not in members and to in members:
        return "join"
    if frm in members and to not in members:
        return "lapse"
    if frm in members and to in members:
        return "change"
    return None


def reset_counters(spec, grid, codes: np.ndarray, frm: np.ndarray, to: np.ndarray) -> np.ndarray:
    """Vectorised counter update for status moves ``frm -> to`` (level codes, ``(m,)``) applied
    to grid codes ``(m, axes)``: counters reset to 0 where the event is in ``reset_on``."""
    lv = spec.axis_levels(spec.status_axis)
    member = member_flags(spec)
    out = codes.copy()
    mf, mt = member[frm], member[to]
    events = {"join": ~mf & mt, "lapse": mf & ~mt, "change": (frm != to)}
    for i, ax in enumerate(grid.axes):
        if ax.kind != "counter":
            continue
        reset = np.zeros(len(frm), dtype=bool)
        for ev in spec.axes[ax.name].reset_on or []:
            reset |= events[ev]
        out[reset, i] = 0
    del lv
    return out


def moved_states(spec, grid, states: np.ndarray, levels: Mapping[str, str]) -> np.ndarray:
    """Flat indices of ``states`` after setting ``levels`` (axis -> level); a status change moves
    counters as :func:`reset_counters`. Fixed axes cannot be changed."""
    codes = np.stack(np.unravel_index(np.asarray(states, dtype=np.int64), grid.shape), axis=1)
    new = codes.copy()
    for axis, level in levels.items():
        pos = grid.position(axis)
        if grid.axes[pos].kind == "fixed":
            raise QueryError(f"axis '{axis}' is fixed: no move changes it, so a contrast across it has no "
                             "causal meaning; compare states with the same level of it", field=axis)
        new[:, pos] = grid.level_index(axis, level)
    sp = grid.position(spec.status_axis)
    if spec.status_axis in levels:
        new = reset_counters(spec, grid, new, codes[:, sp], new[:, sp])
        # counters named explicitly win over the event's reset
        for axis, level in levels.items():
            pos = grid.position(axis)
            if grid.axes[pos].kind == "counter":
                new[:, pos] = grid.level_index(axis, level)
    return np.ravel_multi_index(tuple(new.T), grid.shape).astype(np.int64)


def check_move(spec, frm: str, to: str, what: str = "plan") -> None:
    """QueryError when the status move rules (``axes.<status>.moves``) forbid ``frm -> to``: a
    contrast across a move no customer can make answers no question."""
    rules = spec.axes[spec.status_axis].moves or {}
    if frm in rules and to not in rules[frm]:
        allowed = [x for x in rules[frm] if x != frm]
        raise QueryError(f"the move {frm} -> {to} is not allowed by axes.{spec.status_axis}.moves.{frm} "
                         f"(from {frm} a customer can move to {', '.join(allowed) or 'nothing else'})", field=what)


def check_sold(spec, coords: Mapping[str, str], plan: str) -> None:
    """QueryError when ``plan`` is not sold at the state's fixed-axis levels."""
    from stateworth.rules.spec import not_sold_pairs
    for p, fax, flevel in not_sold_pairs(spec):
        if p == plan and coords.get(fax) == flevel:
            raise QueryError(f"plan '{plan}' is not sold in {fax}={flevel}; its member state is unreachable there",
                             field="plan")


def check_same_fixed(grid, before: Mapping[str, str], after: Mapping[str, str]) -> None:
    for ax in grid.axes:
        if ax.kind == "fixed" and before[ax.name] != after[ax.name]:
            raise QueryError(f"the states differ on fixed axis '{ax.name}' ({before[ax.name]} vs {after[ax.name]}); "
                             "a fixed axis never changes, so compare states with the same level of it", field=ax.name)


def weights_vector(grid, weights: Any) -> np.ndarray:
    """Cohort weights -> ``(n,)`` non-negative, normalised to sum 1.

    Accepts a dense ``(n,)`` array, a mapping flat index -> weight, or a sequence of
    ``(coords, weight)`` pairs. QueryError names the offending entry."""
    n = grid.size
    if weights is None:
        raise QueryError("cohort weights are required", field="weights")
    if isinstance(weights, Mapping):
        w = np.zeros(n)
        for k, v in weights.items():
            try:
                i = int(k)
            except (TypeError, ValueError):
                raise QueryError(f"weight key {k!r} is not a state index", field="weights") from None
            if not 0 <= i < n:
                raise QueryError(f"weight key {i} is out of range (0..{n - 1})", field="weights")
            w[i] += _check_weight(v, f"state {i}")
    elif isinstance(weights, np.ndarray) and weights.ndim == 1 and weights.dtype.kind in "fiu":
        if weights.shape[0] != n:
            raise QueryError(f"weights have {weights.shape[0]} entries but the grid has {n} states", field="weights")
        w = np.asarray(weights, dtype=np.float64).copy()
        bad = ~np.isfinite(w)
        if bad.any():
            i = int(np.argmax(bad))
            raise QueryError(f"weight of state {i} ({_desc(grid, i)}) is not finite", field="weights")
        neg = w < 0
        if neg.any():
            i = int(np.argmax(neg))
            raise QueryError(f"weight of state {i} ({_desc(grid, i)}) is negative ({w[i]:.4g}); weights are "
                             "population shares or counts, 0 or more", field="weights")
    else:
        w = np.zeros(n)
        for j, item in enumerate(weights):
            try:
                coords, v = item
            except (TypeError, ValueError):
                raise QueryError(f"weights entry {j} is not a (coords, weight) pair", field=f"weights[{j}]") from None
            w[grid.flat_index(coords)] += _check_weight(v, f"entry {j}")
    total = float(w.sum())
    if not total > 0:
        raise QueryError("cohort weights sum to zero; give at least one state a positive weight", field="weights")
    return w / total


def _check_weight(v: Any, what: str) -> float:
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise QueryError(f"weight of {what} is not a number ({v!r})", field="weights") from None
    if not np.isfinite(x):
        raise QueryError(f"weight of {what} is not finite", field="weights")
    if x < 0:
        raise QueryError(f"weight of {what} is negative ({x:.4g}); weights are population shares or counts, "
                         "0 or more", field="weights")
    return x


def _desc(grid, i: int) -> str:
    return ", ".join(f"{k}={v}" for k, v in grid.coords(i).items())
