"""Lookups on solved results: states by name, values and draw values at states, and the one
function every figure goes through (:func:`answer`), which attaches unit, version and interval.

A figure is ``sum over (states, weights) pairs of w . V(states)``: the value of a state (one
state, weight 1), a contrast V(after) - V(before) (weights +1, -1), a cohort-weighted contrast or
a campaign. Its interval is the percentile interval of the same sum over the posterior draws
(Efron & Tibshirani's percentile method; see docs/references.md).
"""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import numpy as np

from stateworth.errors import QueryError
from stateworth.valuation.answer import Answer, percentile_interval
from stateworth.valuation.solved import Solved

Coords = Mapping[str, "str | int"]


def check_level(level: Any) -> float:
    """An interval level strictly between 0 and 1; QueryError otherwise."""
    try:
        x = float(level)
    except (TypeError, ValueError):
        raise QueryError(f"interval level must be a number in (0, 1) (got {level!r})", field="level") from None
    if not 0.0 < x < 1.0:
        raise QueryError(f"interval level must lie strictly between 0 and 1, e.g. 0.9 (got {x})", field="level")
    return x


def draws_needed(level: float) -> int:
    """The fewest draws for which a percentile interval at ``level`` has at least one draw in each
    tail beyond it: ``ceil(2 / (1 - level))`` (20 for 90 %, 40 for 95 %)."""
    return int(np.ceil(2.0 / (1.0 - level) - 1e-9))


def interval_note(solved: Solved, level: float) -> str | None:
    """Why there is no percentile interval at ``level`` although the model has draws (fewer than
    :func:`draws_needed`: queries refuse such a level, a page of figures shows them without
    intervals and says why), or None."""
    need = draws_needed(level)
    if solved.draws is None or solved.n_draws >= need:
        return None
    return (f"no intervals: {solved.n_draws} posterior draws, fewer than the {need} a {level:.0%} interval needs; "
            f"fit with --draws {need} or more")


def index(solved: Solved, coords: Coords, *, reachable: bool = True) -> int:
    """Flat state index of a full coordinate (one level on every axis). With ``reachable`` (the
    default), a state the chain can never be in is refused (:func:`check_reachable`)."""
    if not isinstance(coords, Mapping):
        raise QueryError(f"a state is a mapping axis -> level; got {type(coords).__name__}", field="coords")
    i = solved.model.grid.flat_index(coords)
    if reachable:
        check_reachable(solved, i)
    return i


def check_reachable(solved: Solved, i: int) -> None:
    """QueryError when no customer can ever be in state ``i`` (see :mod:`.reach`), saying why where
    a rule explains it: a plan not sold at the state's fixed levels, or a counter at a level its
    status never shows (tenure counts member periods only)."""
    reach = solved.reachable
    if reach is None or reach[i]:
        return
    from stateworth.rules.counters import counter_start
    from stateworth.rules.spec import not_sold_pairs

    model = solved.model
    spec, grid = model.spec, model.grid
    c = grid.coords(i)
    status = c[spec.status_axis]
    desc = " ".join(f"{k}={v}" for k, v in c.items())
    for plan, fax, flevel in not_sold_pairs(spec):
        if plan == status and c.get(fax) == flevel:
            raise QueryError(f"no customer is ever in state {desc}: plan '{plan}' is not sold in {fax}={flevel}",
                             field=spec.status_axis)
    codes = list(np.unravel_index(i, grid.shape))
    for ax in grid.axes:
        if ax.kind != "counter":
            continue
        for level in sorted({0, counter_start(spec, ax.name)}):
            trial = list(codes)
            trial[grid.position(ax.name)] = level
            if reach[int(np.ravel_multi_index(trial, grid.shape))]:
                raise QueryError(f"no customer is ever in state {desc}: {ax.name}={c[ax.name]} never occurs with "
                                 f"{spec.status_axis}={status} ({_counter_rule(spec, ax.name)})", field=ax.name)
    raise QueryError(f"no customer is ever in state {desc}: no sequence of allowed moves leads there from a "
                     "non-member (the spec's move rules or zero-probability tables rule it out)", field="state")


def _counter_rule(spec, axis: str) -> str:
    ax = spec.axes[axis]
    aw = ax.advance_while if ax.advance_while is not None else "always"
    what = {"member": "member periods", "non_member": "non-member periods", "always": "every period"}.get(
        aw, f"periods on {', '.join(aw)}") if isinstance(aw, str) else f"periods on {', '.join(aw)}"
    resets = ", ".join(ax.reset_on or []) or "nothing"
    return f"{axis} counts {what} and resets on {resets}"


def coords(solved: Solved, state: int) -> dict[str, str]:
    return solved.model.grid.coords(int(state))


def states(solved: Solved, s: Any) -> np.ndarray:
    """Validated flat state indices ``(m,)`` (int64)."""
    a = np.asarray(s)
    if a.size == 0:
        return np.zeros(0, dtype=np.int64)
    if a.dtype.kind not in "iu":
        raise QueryError("states must be integer flat indices (use index_many for level names)", field="states")
    a = a.astype(np.int64, copy=False).reshape(-1)
    n = solved.model.n_states
    if a.min() < 0 or a.max() >= n:
        bad = a[(a < 0) | (a >= n)][0]
        raise QueryError(f"state index {int(bad)} is out of range (0..{n - 1})", field="states")
    return a


def values(solved: Solved, s: Any, stream: str, horizon: int | None = None) -> np.ndarray:
    """V at flat states ``(m,)`` -> ``(m,)`` (money or member-months)."""
    j = solved.col(stream)
    return solved.point(horizon)[states(solved, s), j]


def draw_values(solved: Solved, s: Any, stream: str, horizon: int | None = None) -> np.ndarray | None:
    """V at flat states under each posterior draw, ``(D, m)``; None without draws."""
    j = solved.col(stream)
    idx = states(solved, s)
    d = solved.drawn(horizon)
    return None if d is None else d[:, idx, j]


def answer(solved: Solved, kind: str, parts: Sequence[tuple[np.ndarray, np.ndarray]], stream: str,
           horizon: int | None, level: float, details: dict) -> Answer:
    """``sum over (states, weights) in parts of w . V(states)``, with the same sum per draw for the
    interval (a level that needs more draws than the model has is refused: :func:`draws_needed`)."""
    level = check_level(level)
    val = sum(float(np.dot(w, values(solved, s, stream, horizon))) for s, w in parts)
    interval = None
    if solved.draws is not None:
        d = sum(draw_values(solved, s, stream, horizon) @ w for s, w in parts)
        lo, hi = percentile_interval(d, level)
        interval = (float(lo), float(hi))
    return Answer(kind=kind, value=val, unit=solved.unit(stream), version=solved.version, stream=stream,
                  interval=interval, level=level, horizon=None if horizon is None else int(horizon),
                  details=details)


def value(solved: Solved, state: Coords, stream: str = "revenue", horizon: int | None = None,
          level: float = 0.9) -> Answer:
    """V(s) of one state, with a percentile interval at ``level`` when the model has draws."""
    i = index(solved, state)
    return answer(solved, "value", [(np.array([i]), np.ones(1))], stream, horizon, level,
                  {"state": coords(solved, i)})
