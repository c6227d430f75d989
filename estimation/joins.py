"""The never-member join hazard, from first joins and the addressable market size.

People who never joined are not in the panel, so the status factor's rows for the never-member
level (``prospect``) come from here. For market m (and band b, see below) and a move from
period t-1 to t:

    at_risk(m, b, t) = size(m, t-1) x share(m, b) - tracked(m, b, t-1)   (never-members at the start)
    joins_k(m, b, t) = accounts whose first panel row is period t, in plan k

where ``tracked`` counts every account seen in the panel up to t-1 (members and former
members). Accounts already present in the panel's first period are left-censored: they count
as tracked, not as joins. Without a population sample there is one band (share 1); with one
(:mod:`.population`) ``share(m, b)`` is the sample's band mix and an account's band is its band
at its first row. The hazard is ``sum_t joins / sum_t at_risk``, pooled over the periods of one
cell: the market, the band and, when the status factor is given a cycle axis (calendar month),
the cycle level of t-1. As counts, (stay = at_risk - joins, join plan k = joins_k) enter the
same hierarchical Dirichlet posterior as every other cell (:mod:`.estimate`), so the rates the
model uses are shrunk towards the pooled rate: :func:`used_hazard` reports them beside the raw
ones. Re-running with the ``low`` and ``high`` sizes gives the sensitivity of the figures to the
market-size range. Periods are the spec's (months, ISO weeks, quarters or years), so the
hazard is per period of the spec.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stateworth.errors import PanelError
from stateworth.estimation.panel import Panel


@dataclass(frozen=True)
class JoinCounts:
    """Never-member moves by cell: ``counts[m, b, c, k]`` over market levels, band levels (1
    without a population sample), cycle levels (1 when the status factor has no cycle axis) and
    status levels (k = the never-member level: stays)."""

    counts: np.ndarray
    cycle_axis: str | None
    joins: np.ndarray  # (M, B, T-1) first joins by market, band and period
    at_risk: np.ndarray  # (M, B, T-1)


def first_row_table(panel: Panel, rows, bands: int = 1) -> np.ndarray:
    """``F[m, b, t, s]``: accounts first seen in period t (index from p_min) in status s, by
    band ``b`` at that first row; ``rows`` are ``(m, fp, s, n)`` or ``(m, fp, s, b, n)``."""
    spec = panel.layout.spec
    M = len(spec.axis_levels(panel.layout.market))
    S = len(spec.axis_levels(spec.status_axis))
    T = panel.p_max - panel.p_min + 1
    F = np.zeros((M, bands, T, S))
    for r in rows:
        m, fp, s, *b, n = r
        F[int(m), int(b[0]) if b else 0, int(fp) - panel.p_min, int(s)] += n
    return F


def join_counts(panel: Panel, first: np.ndarray, sizes: np.ndarray, which: str = "size",
                shares: np.ndarray | None = None, population: str | None = None) -> JoinCounts:
    """Never-member stays and joins per (market, band, cycle) cell from the first-row table
    ``(M, B, T, S)`` and a size array ``(M, T)`` (``MarketSizes.size``, ``.low`` or ``.high``),
    the sizes split by the band ``shares`` ``(M, B)`` when given (``population`` names their
    file in errors)."""
    lay = panel.layout
    spec = lay.spec
    status = spec.status_axis
    nm = lay.code(status, lay.never_member)
    M, B, T, S = first.shape
    shares = np.ones((M, 1)) if shares is None else np.asarray(shares, dtype=np.float64)
    tracked = np.cumsum(first.sum(axis=3), axis=2)  # (M, B, T) accounts seen by the end of period t
    joins_k = first[:, :, 1:, :]  # first rows after the first panel period are joins
    people = sizes[:, None, :] * shares[:, :, None]  # (M, B, T)
    at_risk = people[:, :, :-1] - tracked[:, :, :-1]
    nonmem = [int(i) for i in np.flatnonzero(~spec.member_flags())]
    if joins_k[..., nonmem].sum() > 0:
        m, _, t = np.argwhere(joins_k[..., nonmem].sum(axis=3) > 0)[0]
        raise PanelError(f"accounts whose first row (period index {t + 1} of the panel, market "
                         f"{spec.axis_levels(lay.market)[m]}) is a non-member level: an account enters a panel in the "
                         f"{panel.period} it first joins", where=f"{panel.path}: column {status}")
    short = np.concatenate([at_risk < joins_k.sum(axis=3), (people - tracked)[:, :, -1:] < 0], axis=2)
    if short.any():
        m, b, t = np.argwhere(short)[0]
        mk = spec.axis_levels(lay.market)[m]
        if B > 1:
            band = spec.axis_levels(lay.band)[b]
            have = people[m, b, t]
            raise PanelError(f"market '{mk}', band {band}: the {which} x the sample's band share ({shares[m, b]:.4f}) "
                             f"is {have:,.0f} people, fewer than the {tracked[m, b, min(t + 1, T - 1)]:,.0f} accounts the "
                             f"panel tracks in that band by {_label(panel, min(t + 1, T - 1))}; the sample under-represents "
                             f"the band or the {which} is too small", where=f"{population}: column market")
        raise PanelError(f"market '{mk}': the {which} leaves fewer never-members "
                         f"({at_risk[m, 0, min(t, T - 2)]:g}) than first joins ({joins_k[m, 0, min(t, T - 2)].sum():g}); "
                         f"raise the {which}", where=f"market-size table, column {which}")
    given = spec.axes[status].given or []
    cyc = next((g for g in given if g in spec.axes and spec.axes[g].kind == "cycle"), None)
    C = len(spec.axis_levels(cyc)) if cyc else 1
    counts = np.zeros((M, B, C, S))
    for t in range(T - 1):
        c = ((panel.p_min + t) % C) if cyc else 0  # cycle level of the period the move starts in
        counts[:, :, c, :] += joins_k[:, :, t, :]
        counts[:, :, c, nm] += at_risk[:, :, t] - joins_k[:, :, t, :].sum(axis=2)
    return JoinCounts(counts=counts, cycle_axis=cyc, joins=joins_k.sum(axis=3), at_risk=at_risk)


def _label(panel: Panel, t: int) -> str:
    from stateworth.estimation.panel import period_label

    return period_label(panel.p_min + t)


def hazard_summary(jc: JoinCounts, levels: list[str]) -> dict[str, float]:
    """Raw join hazard per market level: first joins / never-members at risk, pooled over the
    periods and bands (dimensionless, per period of the spec)."""
    out = {}
    for i, lv in enumerate(levels):
        risk = jc.at_risk[i].sum()
        out[lv] = float(jc.joins[i].sum() / risk) if risk > 0 else float("nan")
    return out


def used_hazard(jc: JoinCounts, rows: np.ndarray, never_member: int, levels: list[str],
                band: int | None = None) -> dict[str, float]:
    """The join hazard per market level that the model's never-member rows ``rows`` ``(M or 1,
    B or 1, C, S)`` imply: 1 - P(stay a never-member), averaged over the cells of the market
    (bands, cycle levels) with the never-members at risk in each as weights, so that it reads
    like :func:`hazard_summary`'s raw figure; ``band`` restricts it to one band."""
    risk = jc.counts.sum(axis=-1)  # (M, B, C) never-member months at risk per cell
    join = 1.0 - np.broadcast_to(rows[..., never_member], risk.shape)
    if band is not None:
        risk, join = risk[:, band:band + 1], join[:, band:band + 1]
    out = {}
    for i, lv in enumerate(levels):
        r = risk[i].sum()
        out[lv] = float((risk[i] * join[i]).sum() / r) if r > 0 else float(join[i].mean())
    return out


def raw_hazard_by_band(jc: JoinCounts, levels: list[str], bands: list[str]) -> dict[str, dict[str, float]]:
    """First joins / never-members at risk per market and band."""
    return {lv: {b: float(jc.joins[i, j].sum() / jc.at_risk[i, j].sum()) if jc.at_risk[i, j].sum() > 0
                 else float("nan") for j, b in enumerate(bands)} for i, lv in enumerate(levels)}


def prospect_rows(dims: list[str | None], rows: np.ndarray, factor) -> np.ndarray:
    """Broadcast never-member rows ``(lead..., *dim sizes, S)`` to ``(lead..., *factor.shape)``:
    the rows used where the current status is the never-member level. ``dims`` names the axis of
    each of the rows' dimensions (market, band, cycle); a dimension whose axis the status factor
    is not given (or named None) must have size 1. Every other given axis (engagement, tenure,
    ...) is broadcast: a never-member's join hazard is taken to depend only on the named axes."""
    given = list(factor.given)
    lead = rows.ndim - len(dims) - 1
    arr = rows
    present = []
    for i, d in enumerate(dims):
        if d is not None and d in given:
            present.append((given.index(d), i))
        elif arr.shape[lead + i] != 1:
            raise ValueError(f"pool the rows over {d} (size 1) when the status factor is not given it")
    present.sort()
    # the present dimensions in the order the factor lists them, then the absent (size 1) ones dropped
    src = [lead + i for _, i in present]
    arr = np.moveaxis(arr, src, list(range(lead, lead + len(src))))
    arr = arr.reshape(arr.shape[:lead] + tuple(arr.shape[lead:lead + len(src)]) + (arr.shape[-1],))
    view = [1] * len(given)
    for pos, _ in present:
        view[pos] = factor.shape[pos]
    arr = arr.reshape(arr.shape[:lead] + tuple(view) + (factor.shape[-1],))
    return np.broadcast_to(arr, arr.shape[:lead] + tuple(factor.shape))
