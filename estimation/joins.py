"""The never-member join hazard, from first joins and the addressable market size.

People who never joined are not in the panel, so the status factor's rows for the never-member
level (``prospect``) come from here. For market m and a move from period t-1 to t:

    at_risk(m, t) = size(m, t-1) - tracked(m, t-1)        (never-members at the start)
    joins_k(m, t) = accounts whose first panel row is period t, in plan k

where ``tracked`` counts every account seen in the panel up to t-1 (members and former
members). Accounts already present in the panel's first period are left-censored: they count
as tracked, not as joins. The hazard is ``sum_t joins / sum_t at_risk``, pooled over the
periods of one cell: the market and, when the status factor is given a cycle axis (calendar
month), the cycle level of t-1. Periods are the spec's (months, ISO weeks, quarters or years),
so the hazard is per period of the spec. As counts, (stay = at_risk - joins, join plan k = joins_k)
enter the same Dirichlet posterior as every other cell. Re-running with the ``low`` and
``high`` sizes gives the sensitivity of the figures to the market-size range.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.errors import PanelError
from stateworth.estimation.panel import Panel


@dataclass(frozen=True)
class JoinCounts:
    """Never-member moves by cell: ``counts[m, c, k]`` over market levels, cycle levels (1 when
    the status factor has no cycle axis) and status levels (k = the never-member level: stays)."""

    counts: np.ndarray
    cycle_axis: str | None
    joins: np.ndarray  # (M, T) first joins by market and period
    at_risk: np.ndarray  # (M, T)


def first_row_table(panel: Panel, rows) -> np.ndarray:
    """``F[m, t, s]``: accounts first seen in period t (index from p_min) in status s."""
    spec = panel.layout.spec
    M = len(spec.axis_levels(panel.layout.market))
    S = len(spec.axis_levels(spec.status_axis))
    T = panel.p_max - panel.p_min + 1
    F = np.zeros((M, T, S))
    for m, fp, s, n in rows:
        F[int(m), int(fp) - panel.p_min, int(s)] += n
    return F


def join_counts(panel: Panel, first: np.ndarray, sizes: np.ndarray, which: str = "size") -> JoinCounts:
    """Never-member stays and joins per (market, cycle) cell from the first-row table and a
    size array ``(M, T)`` (``MarketSizes.size``, ``.low`` or ``.high``)."""
    lay = panel.layout
    spec = lay.spec
    status = spec.status_axis
    st = spec.axis_levels(status)
    nm = lay.code(status, lay.never_member)
    M, T, S = first.shape
    tracked = np.cumsum(first.sum(axis=2), axis=1)  # accounts seen by the end of period t
    joins_k = first[:, 1:, :]  # first rows after the first panel period are joins
    at_risk = sizes[:, :-1] - tracked[:, :-1]
    nonmem = [int(i) for i in np.flatnonzero(~spec.member_flags())]
    if joins_k[:, :, nonmem].sum() > 0:
        m, t = np.argwhere(joins_k[:, :, nonmem].sum(axis=2) > 0)[0]
        raise PanelError(f"accounts whose first row (period index {t + 1} of the panel, market "
                         f"{spec.axis_levels(lay.market)[m]}) is a non-member level: an account enters a panel in the "
                         f"{panel.period} it first joins", where=f"{panel.path}: column {status}")
    if (at_risk < joins_k.sum(axis=2)).any():
        m, t = np.argwhere(at_risk < joins_k.sum(axis=2))[0]
        raise PanelError(f"market '{spec.axis_levels(lay.market)[m]}': the {which} leaves fewer never-members "
                         f"({at_risk[m, t]:g}) than first joins ({joins_k[m, t].sum():g}); raise the {which}",
                         where=f"market-size table, column {which}")
    given = spec.axes[status].given or []
    cyc = next((g for g in given if g in spec.axes and spec.axes[g].kind == "cycle"), None)
    C = len(spec.axis_levels(cyc)) if cyc else 1
    counts = np.zeros((M, C, S))
    for t in range(T - 1):
        c = ((panel.p_min + t) % C) if cyc else 0  # cycle level of the period the move starts in
        counts[:, c, :] += joins_k[:, t, :]
        counts[:, c, nm] += at_risk[:, t] - joins_k[:, t, :].sum(axis=1)
    return JoinCounts(counts=counts, cycle_axis=cyc, joins=joins_k.sum(axis=2), at_risk=at_risk)


def hazard_summary(jc: JoinCounts, levels: list[str]) -> dict[str, float]:
    """Pooled join hazard per market level (dimensionless, per period of the spec)."""
    out = {}
    for i, lv in enumerate(levels):
        risk = jc.at_risk[i].sum()
        out[lv] = float(jc.joins[i].sum() / risk) if risk > 0 else float("nan")
    return out


def prospect_rows(spec, market_axis: str, cycle_axis: str | None, rows: np.ndarray, factor) -> np.ndarray:
    """Broadcast never-member rows ``(lead..., M, C, S)`` (M = 1 when the status factor is not
    given the market, C = 1 without a cycle) to ``(lead..., *factor.shape)``: the rows used where
    the current status is the never-member level. Every other given axis (engagement, tenure,
    ...) is broadcast: a never-member's join hazard is taken to depend only on market and cycle."""
    given = list(factor.given)
    lead = rows.ndim - 3
    arr = rows
    present = []
    if market_axis in given:
        present.append((given.index(market_axis), "m"))
    elif arr.shape[-3] != 1:
        raise ValueError("pool the markets (M = 1) when the status factor is not given the market")
    if cycle_axis is not None and cycle_axis in given:
        present.append((given.index(cycle_axis), "c"))
    # drop the absent axes (size 1), then order the present ones as they appear in given
    names = ["m", "c"]
    for nm in ("c", "m"):
        if nm not in [p[1] for p in present]:
            arr = np.take(arr, 0, axis=lead + names.index(nm))
            names.remove(nm)
    present.sort()
    arr = np.moveaxis(arr, [lead + names.index(p[1]) for p in present], list(range(lead, lead + len(present))))
    view = [1] * len(given)
    for pos, nm in present:
        view[pos] = factor.shape[pos]
    arr = arr.reshape(arr.shape[:lead] + tuple(view) + (factor.shape[-1],))
    return np.broadcast_to(arr, arr.shape[:lead] + tuple(factor.shape))
