"""The report's answers: what a page about one model shows, computed from its solved results.

Pure functions of a :class:`~stateworth.valuation.solved.Solved` returning JSON-ready dicts
(plain floats, lists and strings; money in the model's currency per customer, discounted to the
start of the current period; member-months for the ``member_months`` stream). Every figure is a
query of this package (:mod:`.lookups`, :mod:`.contrasts`, :mod:`.cohorts`, :mod:`.marginal`,
:mod:`.longrun`); this module picks the states and cohorts a page shows and nothing else.
:func:`report_summary` collects the sections, each its own function:

* :func:`model_facts`, :func:`solve_facts`: the model (grid, discounting, draws) and its solves;
* :func:`value_by_tenure`: for each market, plan and tenure level, the long-run-weighted mean of
  V over the other axes: ``sum_s pi_s V_s / sum_s pi_s`` over the cell's reachable states, with
  the same mean in each posterior draw for the interval; beside it the prospect's value;
* :func:`acquisition_by_market`: the value of an acquisition (into the chain's landing mix,
  :func:`.contrasts.landing`) averaged over a stated prospect profile, beside the naive figures
  ("member value" V(after) alone, one period of cash) and the landing mix;
* :func:`plan_upgrades`: the cohort contrast of moving the members on one plan (long-run mix) to
  a later plan the move rules allow;
* :func:`marginal_ranked`: the adjoint marginal values for the long-run population, entries that
  differ only in cycle axes pooled (:func:`pool_marginal`);
* :func:`long_run_figures`: the long-run member share by plan and expected member-months.

Intervals of averages are percentile intervals of the average taken within each posterior draw
(not averages of interval ends). ``interval_note`` says when the draws are too few for the level.

Cohorts. Members: the long-run state mix pi (:func:`.longrun.stationary`: equal mass on each fixed
cell) restricted to reachable states, so months and engagement bands weigh as often as they
occur. Prospects (never-members) are transient in the chain (nobody becomes one again), so they
have no long-run weight: the page uses a stated profile instead (:func:`prospect_profile`).

States no customer can be in are never asked about (:mod:`.reach`): where a plan is not sold in a
market, or no allowed move leads to it, a section holds a row with ``sold: false`` and a ``note``
instead of a figure, and every average runs over reachable states only.

Extra sections: :data:`EXTRA_SECTIONS` names results computed outside this package that a report
may carry beside these (``backtest``: observed against predicted, from the estimation layer,
which valuation does not import); :func:`report_summary` keeps them under their key as given.
"""

from __future__ import annotations

import itertools
import dataclasses
from typing import Any, Callable, Iterable, Mapping, Sequence

import numpy as np

from stateworth.errors import QueryError
from stateworth.rules.counters import counter_start
from stateworth.rules.spec import not_sold_pairs
from stateworth.valuation import cohorts, contrasts, longrun, lookups
from stateworth.valuation import states as st
from stateworth.valuation.answer import percentile_interval
from stateworth.valuation.solved import Solved

#: the sections :func:`report_summary` computes, in page order
SECTIONS = ("value_by_tenure", "acquisition", "plan_upgrade", "marginal", "long_run")
#: results computed elsewhere that a summary may carry (see the module doc); ``None`` when absent
EXTRA_SECTIONS = ("backtest",)
#: long-run mass below this share of the largest is round-off of the long-run solve, not weight
_ROUNDOFF = 1e-12


# ---------------------------------------------------------------------------------------------
# states and cohorts


def market_axis(solved: Solved) -> str | None:
    """The axis the page groups by: the first fixed axis (None without one)."""
    fixed = [a.name for a in solved.model.grid.axes if a.kind == "fixed"]
    return fixed[0] if fixed else None


def tenure_axis(solved: Solved) -> str | None:
    """The counter the value-by-tenure section runs along: the first counter axis (None without)."""
    counters = [a.name for a in solved.model.grid.axes if a.kind == "counter"]
    return counters[0] if counters else None


def cycle_axes(solved: Solved) -> list[str]:
    return [a.name for a in solved.model.grid.axes if a.kind == "cycle"]


def _reach(solved: Solved) -> np.ndarray:
    return np.ones(solved.model.n_states, dtype=bool) if solved.reachable is None else solved.reachable


def population(solved: Solved) -> tuple[np.ndarray, str]:
    """The member population's weights ``(n,)`` (sum 1) and how they were made: the long-run mix
    on reachable states (round-off of the long-run solve removed), or, when the chain has no
    unique long-run mix, equal weight on every reachable state."""
    reach = _reach(solved)
    try:
        pi = np.where(reach, np.asarray(longrun.stationary(solved), dtype=np.float64), 0.0)
    except QueryError:
        w = reach.astype(np.float64)
        return w / w.sum(), "equal weight on each reachable state (the chain has no unique long-run mix)"
    pi = np.where(pi > _ROUNDOFF * float(pi.max()), pi, 0.0)
    return pi / pi.sum(), "long-run mix (equal weight on each market)"


def plan_availability(solved: Solved, market: str | None, plan: str) -> dict[str, Any]:
    """Whether a customer can be on ``plan`` in ``market`` (a level of :func:`market_axis`):
    ``{"sold": bool, "note": None or why not, "short": a few words for a chart}``. Not sold means
    the spec's ``not_sold`` rule; otherwise a plan no reachable state holds there (no allowed
    move leads to it) is not available either."""
    spec, grid = solved.model.spec, solved.model.grid
    fax = market_axis(solved)
    for p, ax, lv in not_sold_pairs(spec):
        if p == plan and ax == fax and lv == market:
            return {"sold": False, "note": f"plan '{plan}' is not sold in {fax}={market} "
                                           f"(axes.{spec.status_axis}.not_sold)", "short": "not sold"}
    codes = grid.codes()
    mask = _reach(solved) & (codes[grid.position(spec.status_axis)] == grid.level_index(spec.status_axis, plan))
    if fax is not None:
        mask &= codes[grid.position(fax)] == grid.level_index(fax, market)
    if not mask.any():
        where = f" in {fax}={market}" if fax is not None else ""
        return {"sold": False, "note": f"no customer can be on plan '{plan}'{where}: no move the spec allows "
                                       "leads there", "short": "never reached"}
    return {"sold": True, "note": None, "short": None}


def prospect_profile(solved: Solved, market: str | None, weights: np.ndarray | None = None) -> np.ndarray:
    """Flat indices of the prospect states the page averages over with equal weights: status at the
    first never-member level, each counter at its never-member start, each chance axis at its most
    common level among non-members in the market under ``weights`` (default the long-run mix),
    other fixed axes at their first level, and every combination of cycle levels. Only states a
    customer can be in are kept."""
    model = solved.model
    spec, grid = model.spec, model.grid
    fax = market_axis(solved)
    w = population(solved)[0] if weights is None else np.asarray(weights, dtype=np.float64)
    codes = grid.codes()
    status = spec.status_axis
    non = np.isin(codes[grid.position(status)], [grid.level_index(status, x) for x in spec.non_members])
    if fax is not None:
        non &= codes[grid.position(fax)] == grid.level_index(fax, market)
    source = (st.never_member_levels(spec) or list(spec.non_members))[0]
    base: dict[str, int] = {status: grid.level_index(status, source)}
    if fax is not None:
        base[fax] = grid.level_index(fax, market)
    for ax in grid.axes:
        if ax.name in base or ax.kind == "cycle":
            continue
        if ax.kind == "counter":
            base[ax.name] = counter_start(spec, ax.name)
        elif ax.kind in ("chance", "status"):
            mass = np.bincount(codes[grid.position(ax.name)][non], weights=w[non], minlength=ax.size)
            base[ax.name] = int(np.argmax(mass)) if mass.sum() > 0 else 0
        else:
            base[ax.name] = 0
    cycles = [ax for ax in grid.axes if ax.kind == "cycle"]
    out = []
    for combo in itertools.product(*[range(ax.size) for ax in cycles]):
        c = dict(base)
        c.update({ax.name: k for ax, k in zip(cycles, combo)})
        out.append(int(np.ravel_multi_index(tuple(c[n] for n in grid.names), grid.shape)))
    idx = np.asarray(out, dtype=np.int64)
    return idx[_reach(solved)[idx]]


def upgrade_moves(spec) -> list[tuple[str, str]]:
    """(from plan, to plan) pairs of moves the status rules allow to a later plan in ``members``
    order (the spec lists plans from the cheapest up)."""
    rules = spec.axes[spec.status_axis].moves or {}
    members = spec.members
    return [(a, b) for i, a in enumerate(members) for b in members[i + 1:] if a not in rules or b in rules[a]]


def joinable_plans(spec) -> tuple[str, list[str]]:
    """The never-member level acquisitions start from, and the plans its move rules allow it to join."""
    source = (st.never_member_levels(spec) or list(spec.non_members))[0]
    rules = spec.axes[spec.status_axis].moves or {}
    return source, [p for p in spec.members if source not in rules or p in rules[source]]


# ---------------------------------------------------------------------------------------------
# small helpers


def _interval(samples: np.ndarray | None, level: float) -> list[float] | None:
    """The percentile interval of ``samples`` (draws along axis 0), or None without draws or with
    fewer than the level needs (the section's ``interval_note`` then says so)."""
    if samples is None or np.shape(samples)[0] < lookups.draws_needed(level):
        return None
    lo, hi = percentile_interval(samples, level)
    return [float(lo), float(hi)]


def _iv(iv: Iterable[float] | None) -> list[float] | None:
    return None if iv is None else [float(x) for x in iv]


def _levels(grid, name: str | None) -> list[str | None]:
    return [None] if name is None else list(grid.axis(name).levels)


def _mean_figure(solved: Solved, states: np.ndarray, weights: np.ndarray, stream: str, level: float) -> dict[str, Any]:
    """``w . V(states)`` (``w`` normalised) with its interval (the weighted sum within each draw;
    None where the draws are too few for ``level``)."""
    w = weights / weights.sum()
    value = float(np.dot(w, lookups.values(solved, states, stream)))
    d = lookups.draw_values(solved, states, stream)
    return {"value": value, "interval": _interval(None if d is None else d @ w, level)}


# ---------------------------------------------------------------------------------------------
# sections


def model_facts(solved: Solved) -> dict[str, Any]:
    """The model as the page's header and 'The model' section describe it."""
    model = solved.model
    spec = model.spec
    return {"name": model.name, "version": solved.version, "states": int(model.n_states),
            "reachable_states": int(_reach(solved).sum()), "currency": model.currency,
            "period": spec.model.period, "annual_rate": float(spec.model.discount.annual_rate),
            "cash": spec.model.discount.cash, "beta": float(model.beta), "streams": list(solved.streams),
            "axes": model.grid.describe(), "members": list(spec.members), "non_members": list(spec.non_members),
            "draws": int(solved.n_draws), "source": solved.source}


def stream_facts(solved: Solved, stream: str) -> dict[str, Any]:
    """The stream's name, unit and description."""
    spec = solved.model.spec
    desc = (spec.rewards[stream].description if stream in spec.rewards else
            "one per member period (discounted member-months)")
    return {"stream": stream, "unit": solved.unit(stream), "description": desc or ""}


def value_by_tenure(solved: Solved, stream: str, level: float = 0.9,
                    weights: np.ndarray | None = None) -> dict[str, Any]:
    """Per market and plan, V averaged at each level of :func:`tenure_axis` over the other axes
    with the population weights (see the module doc); ``prospect`` per market: the mean value of
    the :func:`prospect_profile` states (the non-member's worth, for the chart's reference line)."""
    model = solved.model
    spec, grid = model.spec, model.grid
    w, basis = population(solved) if weights is None else (np.asarray(weights, dtype=np.float64), "given weights")
    fax, tax = market_axis(solved), tenure_axis(solved)
    codes = grid.codes()
    status = spec.status_axis
    tenure_levels = _levels(grid, tax) if tax is not None else ["all"]
    live = np.flatnonzero(_reach(solved) & (w > 0))
    # one pass groups the weighted states by (market, status, tenure)
    key = codes[grid.position(status)][live].astype(np.int64)
    key = key * (len(tenure_levels)) + (codes[grid.position(tax)][live] if tax else 0)
    if fax is not None:
        key = key + codes[grid.position(fax)][live].astype(np.int64) * grid.axis(status).size * len(tenure_levels)
    order = np.argsort(key, kind="stable")
    keys, starts = np.unique(key[order], return_index=True)
    groups = dict(zip(keys.tolist(), np.split(live[order], starts[1:])))
    series: list[dict[str, Any]] = []
    prospects: list[dict[str, Any]] = []
    note = None
    for mi, market in enumerate(_levels(grid, fax)):
        prof = prospect_profile(solved, market)
        if prof.size:
            fig = _mean_figure(solved, prof, np.ones(prof.size), stream, level)
            prospects.append({"market": market, **fig})
        for plan in spec.members:
            avail = plan_availability(solved, market, plan)
            row: dict[str, Any] = {"market": market, "plan": plan, **avail, "tenure": tenure_levels}
            if not avail["sold"]:
                series.append(row)
                continue
            vals, ivs = [], []
            for ti in range(len(tenure_levels)):
                k = (mi * grid.axis(status).size + grid.level_index(status, plan)) * len(tenure_levels) + ti
                idx = groups.get(k)
                if idx is None:
                    vals.append(None)
                    ivs.append(None)
                    continue
                fig = _mean_figure(solved, idx, w[idx], stream, level)
                vals.append(fig["value"])
                ivs.append(fig["interval"])
            row.update({"value": vals, "interval": ivs})
            series.append(row)
    if solved.draws is not None:
        note = lookups.interval_note(solved, level)
    return {"axis": tax, "market_axis": fax, "weights": basis, "level": level, "series": series,
            "prospect": prospects, "interval_note": note}


def _landing_mix(solved: Solved, pieces: Sequence[tuple[np.ndarray, np.ndarray]], top: int = 6) -> list[dict[str, Any]]:
    """Mean landing mix of several moves (each ``(states, weights)``, equal weight per move) by the
    levels of the random axes other than the status, largest share first (the rest as ``other``)."""
    model = solved.model
    grid = model.grid
    names = [f.axis for f in model.factors if f.axis != model.spec.status_axis]
    mix: dict[tuple[str, ...], float] = {}
    for dst, w in pieces:
        cols = np.unravel_index(dst, grid.shape)
        for k in range(len(dst)):
            lv = tuple(grid.axis(a).levels[int(cols[grid.position(a)][k])] for a in names)
            mix[lv] = mix.get(lv, 0.0) + float(w[k]) / len(pieces)
    ranked = sorted(mix.items(), key=lambda kv: -kv[1])
    out = [{"levels": dict(zip(names, lv)), "share": share} for lv, share in ranked[:top]]
    rest = sum(share for _, share in ranked[top:])
    if rest > 0:
        out.append({"levels": {"other": "other"}, "share": rest})
    return out


def acquisition_by_market(solved: Solved, stream: str, level: float = 0.9,
                          sensitivity: Mapping[str, Solved] | None = None) -> dict[str, Any]:
    """Per market and joinable plan: the acquisition value (into the landing mix) averaged with
    equal weights over the :func:`prospect_profile` states, with its interval (the average within
    each draw), the prospect's value, the naive figures (:func:`.contrasts.naive_comparison`:
    "member value" V(after) alone and one period of the stream's cash) and the landing mix.
    ``sensitivity``: ``{"low": Solved, "high": Solved}``, the model refitted at the ends of the
    market-size range (point values); each row then has ``honest_low_size`` and
    ``honest_high_size``: the market sizes are inputs, not data, so their range is a sensitivity
    shown beside the interval, not carried into it."""
    model = solved.model
    spec, grid = model.spec, model.grid
    fax = market_axis(solved)
    source, joinable = joinable_plans(spec)
    rows: list[dict[str, Any]] = []
    profile_shown: dict[str, str] = {}
    note = None
    for market in _levels(grid, fax):
        prof = prospect_profile(solved, market)
        if prof.size and not profile_shown:
            c = grid.coords(int(prof[0]))
            profile_shown = {k: v for k, v in c.items() if grid.axis(k).kind not in ("cycle", "fixed")}
        for plan in joinable:
            avail = plan_availability(solved, market, plan)
            row: dict[str, Any] = {"market": market, "plan": plan, **avail}
            if not avail["sold"] or not prof.size:
                if avail["sold"]:
                    row.update({"sold": False, "note": f"no prospect state in {fax}={market}", "short": "none"})
                rows.append(row)
                continue
            naive, after, before, draws, pieces = [], [], [], [], []
            for i in prof:
                c = grid.coords(int(i))
                naive.append(contrasts.naive_comparison(solved, c, plan, stream, level=None))
                va, vb, per, dst, w = contrasts.landing_samples(solved, int(i), plan, stream)
                after.append(va)
                before.append(vb)
                draws.append(per)
                pieces.append((dst, w))
            honest = float(np.mean(after) - np.mean(before))
            member_value = float(np.mean([n["member_value"] for n in naive]))
            samples = None if draws[0] is None else np.mean(np.stack(draws), axis=0)
            sens = {f"honest_{k}_size": float(np.mean([contrasts.acquisition(sv, grid.coords(int(i)), plan, stream).value
                                                       for i in prof]))
                    for k, sv in (sensitivity or {}).items()}
            rows.append({**row, **sens, "honest": honest, "interval": _interval(samples, level),
                         "prospect_value": float(np.mean(before)), "member_value": member_value,
                         "one_period": float(np.mean([n["one_period"] for n in naive])),
                         "ratio": member_value / honest if honest > 0 else None,
                         "landing": _landing_mix(solved, pieces)})
    if solved.draws is not None:
        note = lookups.interval_note(solved, level)
    not_joinable = [p for p in spec.members if p not in joinable]
    return {"source_level": source, "profile": profile_shown, "cycles": cycle_axes(solved), "level": level,
            "rows": rows, "not_joinable": not_joinable, "market_axis": fax, "interval_note": note,
            "size_range": bool(sensitivity)}


def plan_upgrades(solved: Solved, stream: str, level: float = 0.9,
                  weights: np.ndarray | None = None) -> dict[str, Any]:
    """Per market and allowed move to a later plan (:func:`upgrade_moves`): the cohort contrast
    (:func:`.cohorts.cohort_contrast`) of the members on the first plan in that market, in their
    population weights, moved to the second (counters reset where the spec resets them on a
    change of plan)."""
    model = solved.model
    spec, grid = model.spec, model.grid
    w, basis = population(solved) if weights is None else (np.asarray(weights, dtype=np.float64), "given weights")
    fax = market_axis(solved)
    codes = grid.codes()
    status = spec.status_axis
    rows: list[dict[str, Any]] = []
    for market in _levels(grid, fax):
        for a, b in upgrade_moves(spec):
            row: dict[str, Any] = {"market": market, "from": a, "to": b}
            blocked = next((x for x in (plan_availability(solved, market, a), plan_availability(solved, market, b))
                            if not x["sold"]), None)
            if blocked is not None:
                rows.append({**row, **blocked})
                continue
            mask = codes[grid.position(status)] == grid.level_index(status, a)
            if fax is not None:
                mask &= codes[grid.position(fax)] == grid.level_index(fax, market)
            cw = np.where(mask & _reach(solved), w, 0.0)
            if not cw.sum() > 0:
                rows.append({**row, "sold": False, "short": "no members",
                             "note": f"no member on '{a}' carries weight in {fax}={market}"})
                continue
            ans = cohorts.cohort_contrast(solved, cw / cw.sum(), {status: b}, stream, None, level)
            rows.append({**row, "sold": True, "note": None, "short": None, "value": float(ans.value),
                         "interval": _iv(ans.interval), "before_value": float(ans.details["before_value"]),
                         "after_value": float(ans.details["after_value"])})
    note = lookups.interval_note(solved, level) if solved.draws is not None else None
    return {"weights": basis, "level": level, "rows": rows, "interval_note": note}


def entry_label(entry: Mapping[str, Any]) -> str:
    """The full formula of a marginal entry: ``P(status'=studio | market=harbor, status=lapsed)``."""
    cell = ", ".join(f"{k}={v}" for k, v in entry["cell"].items())
    return f"P({entry['axis']}'={entry['to']} | {cell})" if cell else f"P({entry['axis']}'={entry['to']})"


def short_label(entry: Mapping[str, Any], fixed: Sequence[str] = (), status: str = "status") -> str:
    """A few words for a chart: ``lapsed -> studio · harbor · engagement none`` (the move of the
    entry's axis from its current level when the cell holds it, ``stays lapsed`` when it is the
    same level, then the other given levels: fixed axes and the status by their level alone,
    ``next.x`` as ``next x``, other axes as ``axis level``)."""
    cell = dict(entry["cell"])
    axis, to = entry["axis"], entry["to"]
    cur = cell.pop(axis, None)
    if cur is None:
        head = f"{axis} \u2192 {to}"
    else:
        head = f"stays {to}" if cur == to else f"{cur} \u2192 {to}"
    parts = []
    for k, v in cell.items():
        if k in fixed or k == status:
            parts.append(str(v))
        elif k.startswith("next."):
            parts.append(f"next {k[5:]} {v}")
        else:
            parts.append(f"{k} {v}")
    return " \u00b7 ".join([head, *parts])


def pool_marginal(entries: Iterable[Any], pool: Sequence[str]) -> list[dict[str, Any]]:
    """Marginal entries (:class:`~stateworth.valuation.MarginalEntry`) that differ only in the
    given axes (of their cells), pooled and ranked by ``|per_point|``.

    Raising a probability by one point in every pooled cell at once changes J, to first order,
    by the sum of the cells' per-point values; ``probability`` is their mean, with
    ``probability_range`` and ``cells`` (how many were pooled)."""
    drop = set(pool)
    groups: dict[tuple, dict[str, Any]] = {}
    for e in entries:
        cell = {k: v for k, v in e.cell.items() if k not in drop}
        key = (e.axis, tuple(sorted(cell.items())), e.to)
        g = groups.setdefault(key, {"axis": e.axis, "cell": cell, "to": e.to, "per_point": 0.0, "probs": []})
        g["per_point"] += float(e.per_point)
        g["probs"].append(float(e.probability))
    out = [{"axis": g["axis"], "cell": g["cell"], "to": g["to"], "probability": float(np.mean(g["probs"])),
            "probability_range": [min(g["probs"]), max(g["probs"])], "cells": len(g["probs"]),
            "per_point": g["per_point"]} for g in groups.values()]
    return sorted(out, key=lambda g: -abs(g["per_point"]))


def status_mix(solved: Solved, weights: np.ndarray) -> dict[str, float]:
    """Share of ``weights`` on each status level (who a cohort is)."""
    grid, status = solved.model.grid, solved.model.spec.status_axis
    codes = grid.codes()[grid.position(status)]
    return {lv: float(weights[codes == i].sum()) for i, lv in enumerate(grid.axis(status).levels)}


def marginal_ranked(solved: Solved, stream: str, top: int = 12, level: float = 0.9,
                    weights: np.ndarray | None = None) -> dict[str, Any]:
    """The ``top`` marginal transition values for J = mu . V, mu the population weights (one
    adjoint solve, :func:`.marginal.marginal`), entries differing only in cycle axes pooled; each
    entry with its full formula (``label``) and a short label for charts (``short``)."""
    from stateworth.valuation.marginal import marginal

    if int(top) < 1:
        raise QueryError(f"top must be at least 1 (got {top})", field="top")
    w, basis = population(solved) if weights is None else (np.asarray(weights, dtype=np.float64), "given weights")
    res = marginal(solved, w, stream, top=10**9, level=level)
    cycles = cycle_axes(solved)
    fixed = [a.name for a in solved.model.grid.axes if a.kind == "fixed"]
    entries = pool_marginal(res.entries, cycles)[:int(top)]
    for rank, e in enumerate(entries, 1):
        e["rank"] = rank
        e["label"] = entry_label(e)
        e["short"] = short_label(e, fixed, solved.model.spec.status_axis)
    note = lookups.interval_note(solved, level) if solved.draws is not None else None
    return {"objective": float(res.objective), "interval": _iv(res.interval), "level": level, "weights": basis,
            "population": {k: v for k, v in status_mix(solved, w).items() if v > 0.0005},
            "pooled_over": cycles, "entries": entries, "interval_note": note}


def long_run_figures(solved: Solved, level: float = 0.9) -> dict[str, Any]:
    """The long-run member share (by plan) and the expected discounted member-months per customer
    of the long-run population (:func:`.longrun.long_run`); ``available: false`` with a note when
    the chain has no unique long-run mix."""
    try:
        lr = longrun.long_run(solved, level=level)
    except QueryError as e:
        return {"available": False, "note": e.message}
    note = lookups.interval_note(solved, level) if lr.get("expected_member_months_interval") else None
    return {"available": True, "member_share": lr["member_share"], "member_share_by_plan": lr["member_share_by_plan"],
            "non_member_share_by_level": lr["non_member_share_by_level"],
            "expected_member_months": lr["expected_member_months"],
            "expected_member_months_interval": _iv(lr["expected_member_months_interval"]), "level": level,
            "unit": lr["unit"], "interval_note": note}


def solve_facts(solved: Solved) -> dict[str, Any]:
    """How the values were solved: the point solve's statistics, the draws', the long-run mix's and
    the reachability pass's, the settings, and whether they were read from the model directory."""
    s = solved.stats or {}
    return {"point": dict(s.get("point") or {}), "draws": dict(s.get("draws") or {}) or None,
            "longrun": dict(s.get("longrun") or {}) or None, "reachable": dict(s.get("reachable") or {}) or None,
            "settings": solved.settings.to_dict(), "source": solved.source}


def report_summary(solved: Solved, stream: str | None = None, *, top: int = 12, level: float = 0.9,
                   extra: Mapping[str, Any] | None = None,
                   on_step: Callable[[str], None] | None = None,
                   sensitivity: Mapping[str, Solved] | None = None) -> dict[str, Any]:
    """Every section of the report (see the module doc) for one stream (default the first), as one
    JSON-ready dict: ``model``, ``stream``, ``unit``, ``stream_description``, ``level``, one key per
    name in :data:`SECTIONS`, ``solve``, and one key per name in :data:`EXTRA_SECTIONS` (the value
    given in ``extra``, else None). ``on_step(name)`` is called after each section (progress)."""
    stream = stream or solved.streams[0]
    solved.col(stream)  # QueryError naming the streams
    level = lookups.check_level(level)
    unknown = sorted(set(extra or {}) - set(EXTRA_SECTIONS))
    if unknown:
        raise QueryError(f"unknown report section '{unknown[0]}'; extra sections are {', '.join(EXTRA_SECTIONS)}",
                         field="extra")
    note = lookups.interval_note(solved, level)
    facts_of = solved
    if note is not None:
        # fewer draws than the level needs: every figure without its interval (the note says why)
        solved = dataclasses.replace(solved, draws=None)
    facts = stream_facts(solved, stream)
    data: dict[str, Any] = {"model": model_facts(facts_of), "stream": stream, "unit": facts["unit"],
                            "stream_description": facts["description"], "level": level}
    steps: dict[str, Callable[[], Any]] = {
        "value_by_tenure": lambda: value_by_tenure(solved, stream, level),
        "acquisition": lambda: acquisition_by_market(solved, stream, level, sensitivity),
        "plan_upgrade": lambda: plan_upgrades(solved, stream, level),
        "marginal": lambda: marginal_ranked(solved, stream, top, level),
        "long_run": lambda: long_run_figures(solved, level),
    }
    for name in SECTIONS:
        data[name] = steps[name]()
        if on_step is not None:
            on_step(name)
    data["solve"] = solve_facts(solved)
    notes = {data[n].get("interval_note") for n in SECTIONS if isinstance(data[n], Mapping)} - {None}
    data["interval_note"] = note or (next(iter(notes)) if notes else None)
    for n in SECTIONS:
        if note is not None and isinstance(data[n], dict):
            data[n]["interval_note"] = note
    for name in EXTRA_SECTIONS:
        data[name] = (extra or {}).get(name)
    return data
