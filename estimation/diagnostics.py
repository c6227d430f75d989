"""Overlap and prior-dominance diagnostics of a fit, and the readable summary.

Overlap: a causal reading of "member vs non-member" at a conditioning cell needs the data to
show moves into a member *and* into a non-member next status from that cell. Cells of the
status factor that show moves but lack one of the two are listed (at most ``MAX_LISTED``, those
holding the most moves first) with the share of all observed moves (the population share) that
sits in them. Prior-dominated cells: cells with fewer observed
moves than the prior strength, so the fitted row is mostly the parent's.
"""

from __future__ import annotations

import numpy as np

from stateworth.caution import CAUTION_LINE
from stateworth.estimation.estimate import FactorFit
from stateworth.rules.factors import Factor

MAX_LISTED = 20


def _cell_name(spec, factor: Factor, idx) -> dict[str, str]:
    out = {}
    for g, i in zip(factor.given, idx):
        base = g[5:] if g.startswith("next.") else g
        out[g] = spec.axis_levels(base)[int(i)]
    return out


def overlap_report(spec, factor: Factor, fit: FactorFit, skip: np.ndarray | None = None) -> dict:
    """Status-factor cells with observed moves but none into a member or none into a non-member
    next status. ``skip`` (bool over the given cells) leaves out cells not fitted from moves."""
    mem = spec.member_flags()
    c = fit.counts
    n = c.sum(axis=-1)
    total = n.sum()
    into_m = c[..., mem].sum(axis=-1)
    into_n = c[..., ~mem].sum(axis=-1)
    bad = (n > 0) & ((into_m == 0) | (into_n == 0))
    if skip is not None:
        bad &= ~skip
    cells = []
    # the cells holding the most moves first: those are where a weak overlap matters most
    order = np.argsort(-n[bad], kind="stable")
    for idx in np.argwhere(bad)[order][:MAX_LISTED]:
        t = tuple(idx)
        cells.append({"cell": _cell_name(spec, factor, t), "moves": int(n[t]),
                      "share": float(n[t] / total) if total else 0.0,
                      "missing": "member" if into_m[t] == 0 else "non-member"})
    return {"factor": factor.axis, "cells_failing": int(bad.sum()),
            "share_failing": float(n[bad].sum() / total) if total else 0.0,
            "cells_without_moves": int(((n == 0) & (~skip if skip is not None else True)).sum()),
            "listed": cells}


def prior_report(spec, factor: Factor, fit: FactorFit, skip: np.ndarray | None = None) -> dict:
    """Cells where the prior outweighed the data (n < strength), with their share of moves."""
    n = fit.cell_moves
    dom = fit.prior_dominated
    if skip is not None:
        dom = dom & ~skip
    total = n.sum()
    listed = [{"cell": _cell_name(spec, factor, tuple(i)), "moves": int(n[tuple(i)])}
              for i in np.argwhere(dom & (n > 0))[:MAX_LISTED]]
    return {"factor": factor.axis, "strength": fit.strength, "cells": int(n.size),
            "pooling": [factor.given[i] for i in fit.pooling], "strengths_by_level": list(fit.strengths),
            "strength_ranges_by_level": [None if r is None else list(r) for r in fit.strength_ranges],
            "cells_with_moves": int((n > 0).sum()), "prior_dominated": int(dom.sum()),
            "share_prior_dominated": float(n[dom].sum() / total) if total else 0.0,
            "listed_with_some_moves": listed}


def summary_text(diag: dict) -> str:
    """A readable summary of the fit diagnostics (no account identifiers)."""
    period = diag["panel"].get("period", "month")
    L = [f"fit of '{diag['model']}' from {diag['panel']['rows']:,} panel rows, {diag['panel']['accounts']:,} "
         f"accounts, {diag['panel']['first_period']}..{diag['panel']['last_period']}; "
         f"{diag['panel']['moves']:,} consecutive-{period} moves counted"]
    if diag["panel"].get("gap_rows_filled"):
        L.append(f"  {diag['panel']['gap_rows_filled']:,} gap {period}s filled as former-member periods")
    if diag.get("forbidden_dropped"):
        L.append(f"  {diag['forbidden_dropped']:,} moves the spec forbids were dropped (--drop-forbidden)")
    L.append("factors (prior strength alpha = pseudo-moves pulling a cell towards its parent; parents pool the "
             "given axes in the order shown, chosen by marginal likelihood; each parent cell has its own alpha):")
    for p in diag["prior"]:
        L.append(f"  {p['factor']}: alpha {p['strength']:.3g}, {p['cells_with_moves']}/{p['cells']} cells with moves, "
                 f"{p['prior_dominated']} cells prior-dominated, i.e. mostly their parent's (fewer moves than "
                 f"alpha; {100 * p['share_prior_dominated']:.2f} % of moves)")
        if p.get("pooling"):
            rng = p.get("strength_ranges_by_level") or [None] * len(p["strengths_by_level"])
            lv = ", ".join(f"{a} {s:.3g}" + (f" ({r[0]:.3g}..{r[1]:.3g})" if r and r[0] != r[1] else "")
                           for a, s, r in zip(p["pooling"], p["strengths_by_level"], rng))
            L.append(f"    pooled over, in order (median alpha of the parent cells, 5..95 % over them): {lv}; "
                     f"then the even spread {p['strengths_by_level'][-1]:.3g}")
    o = diag["overlap"]
    L.append(f"overlap: {o['cells_failing']} status cells lack moves into a member or a non-member status "
             f"({100 * o['share_failing']:.2f} % of moves); {o['cells_without_moves']} cells have no moves at all")
    j = diag["joins"]
    pooled = ", ".join(f"{a} {s:.3g}" for a, s in zip(j.get("pooling", []), j.get("strengths", [])))
    L.append(f"never-member join hazard per {period}: raw = first joins / never-members at risk; used = what the model "
             "uses, shrunk towards the pooled rate" + (f" (alpha by pooled axis: {pooled})" if pooled else "")
             + "; in brackets: used at the high .. low size")
    for m, h in j["hazard"].items():
        lo, hi = j["hazard_high_size"][m], j["hazard_low_size"][m]
        raw = (j.get("hazard_raw") or {}).get(m)
        L.append(f"  {m}: raw {raw:.5f}, used {h:.5f} ({lo:.5f}..{hi:.5f})" if raw is not None
                 else f"  {m}: {h:.5f} ({lo:.5f}..{hi:.5f})")
    if j.get("by_band"):
        bb = j["by_band"]
        L.append(f"  by band, never-members placed by the population sample {bb['population']} ({bb['rows']:,} rows): "
                 "market band: share of the addressable population, raw, used")
        for m, row in bb["hazard"].items():
            L.append("    " + m + ": " + "; ".join(f"{b} {bb['shares'][m][b]:.3f}, {bb['hazard_raw'][m][b]:.5f}, {h:.5f}"
                                                 for b, h in row.items()))
    if j.get("band_assumption"):
        L.append(f"  NOTE: {j['band_assumption']}")
    if diag.get("propensity"):
        pr = diag["propensity"]
        L.append(f"propensity band '{pr['axis']}': logistic on {', '.join(pr['covariates'])} "
                 f"({pr['rows_used']:,} rows, {pr['iterations']} Newton steps)")
        for b, row in enumerate(pr["smd_by_band"]):
            vals = ", ".join(f"{c} {v:+.3f}" if v is not None else f"{c} n/a" for c, v in zip(pr.get("terms", pr["covariates"]), row))
            L.append(f"  band {pr['bands'][b]}: standardised mean difference {vals}")
        L.append(f"  covariates with |SMD| >= {pr['smd_rule']} within some band: {', '.join(pr['unbalanced']) or 'none'}")
    for w in diag.get("warnings") or []:
        L.append(f"warning: {w}")
    L.append(CAUTION_LINE)
    return "\n".join(L)
