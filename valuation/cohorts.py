"""Cohorts and campaigns: contrasts weighted over many states at once.

A cohort is weights mu over states (normalised to sum 1): the mix of last month's joiners, the
members on one plan in the mix they are found in. ``cohort_contrast`` is mu . (V(after) -
V(before)); ``campaign`` is the sum over markets of incremental joins x the value per acquisition
averaged over the joiners' source states.
"""

from __future__ import annotations

from typing import Any, Callable, Mapping

import numpy as np

from stateworth.errors import QueryError
from stateworth.rules.rewards import expected_amounts
from stateworth.rules.spec import not_sold_pairs
from stateworth.valuation import states as st
from stateworth.valuation.answer import Answer
from stateworth.valuation.contrasts import check_plan
from stateworth.valuation.lookups import answer, coords, index, values
from stateworth.valuation.solved import Solved


def weights_vector(solved: Solved, weights: Any) -> np.ndarray:
    """Cohort weights -> ``(n,)`` normalised to sum 1 (see :func:`.states.weights_vector`)."""
    return st.weights_vector(solved.model.grid, weights)


def after_states(solved: Solved, src: np.ndarray, after) -> np.ndarray:
    """The states ``src`` move to: ``after`` is a mapping axis -> level applied to each (a status
    change moves counters as :func:`.contrasts.counterpart` does), or a function of a state's
    coordinates returning the state after."""
    grid, spec = solved.model.grid, solved.model.spec
    if isinstance(after, Mapping):
        for k, lv in after.items():
            grid.level_index(k, lv)
        moved = st.moved_states(spec, grid, src, dict(after))
        if spec.status_axis in after:
            codes = np.stack(np.unravel_index(moved, grid.shape), axis=1)
            for plan, fax, flevel in not_sold_pairs(spec):
                if after[spec.status_axis] == plan:
                    hit = codes[:, grid.position(fax)] == grid.level_index(fax, flevel)
                    if hit.any():
                        raise QueryError(f"plan '{plan}' is not sold in {fax}={flevel}, where some of the cohort "
                                         "lives; restrict the weights or choose another plan", field="after")
        return moved
    if callable(after):
        out = np.empty(len(src), dtype=np.int64)
        for k, s in enumerate(src):
            cb = coords(solved, int(s))
            j = index(solved, after(dict(cb)))
            st.check_same_fixed(grid, cb, coords(solved, j))
            out[k] = j
        return out
    raise QueryError("'after' must be a mapping axis -> level or a function of a state's coordinates", field="after")


def cohort_contrast(solved: Solved, weights: Any,
                    after: Callable[[dict[str, str]], Mapping[str, str]] | Mapping[str, str],
                    stream: str = "revenue", horizon: int | None = None, level: float = 0.9) -> Answer:
    """mu . (V(after(s)) - V(s)) for cohort weights mu (normalised to sum 1)."""
    w = weights_vector(solved, weights)
    src = np.flatnonzero(w)
    dst = after_states(solved, src, after)
    ans = answer(solved, "cohort_contrast", [(dst, w[src]), (src, -w[src])], stream, horizon, level,
                 {"states": int(src.size)})
    before = float(np.dot(w[src], values(solved, src, stream, horizon)))
    ans.details.update({"before_value": before, "after_value": before + ans.value})
    return ans


def join_probability(model) -> np.ndarray:
    """``(n,)``: each state's probability that its next status is a plan (from the tables alone)."""
    member = model.spec.member_flags().astype(np.float64)
    S = member.size
    return expected_amounts(model.spec, model.grid, model.factors, model.tables,
                            np.broadcast_to(member, (S, S)).copy())


def joiner_mix(solved: Solved, market_axis: str, market: str) -> np.ndarray:
    """Default source mix of acquisitions in one market, ``(n,)`` summing to 1: never-member
    states with every counter at 0, weighted by their one-period probability of joining (a
    uniform never-member population filtered by who joins)."""
    model = solved.model
    spec, grid = model.spec, model.grid
    never = st.never_member_levels(spec) or list(spec.non_members)
    codes = grid.codes()
    mask = np.isin(codes[grid.position(spec.status_axis)], [grid.level_index(spec.status_axis, x) for x in never])
    mask &= codes[grid.position(market_axis)] == grid.level_index(market_axis, market)
    for ax in grid.axes:
        if ax.kind == "counter":
            mask &= codes[grid.position(ax.name)] == 0
    w = np.where(mask, np.clip(join_probability(model), 0.0, None), 0.0)
    if not w.sum() > 0:
        w = mask.astype(np.float64)
    if not w.sum() > 0:
        raise QueryError(f"no never-member states in {market_axis}={market}", field="joins_by_market")
    return w / w.sum()


def campaign(solved: Solved, joins_by_market: Mapping[str, float], plan: str, stream: str = "revenue", *,
             weights: Any = None, axis: str | None = None, horizon: int | None = None,
             level: float = 0.9) -> Answer:
    """Value of a campaign: sum over markets of incremental joins x value per acquisition.

    ``axis``: the fixed axis whose levels key ``joins_by_market`` (default the first fixed axis).
    Value per acquisition in a market: the acquisition contrast onto ``plan`` averaged over the
    joiners' source states: ``weights`` restricted to the market, or by default
    :func:`joiner_mix`. Source states must be non-members."""
    spec, grid = solved.model.spec, solved.model.grid
    fixed = [a.name for a in grid.axes if a.kind == "fixed"]
    if axis is None:
        if not fixed:
            raise QueryError("the model has no fixed axis to key joins by; give joins for the whole grid "
                             "as cohort weights instead", field="axis")
        axis = fixed[0]
    elif axis not in fixed:
        raise QueryError(f"'{axis}' is not a fixed axis; fixed axes are {', '.join(fixed) or 'none'}", field="axis")
    check_plan(solved, plan)
    if not joins_by_market:
        raise QueryError("no joins given; map market levels to incremental joins", field="joins_by_market")
    base_w = None if weights is None else weights_vector(solved, weights)
    codes = grid.codes()
    fpos = grid.position(axis)
    member_codes = [grid.level_index(spec.status_axis, x) for x in spec.members]
    parts: list[tuple[np.ndarray, np.ndarray]] = []
    per_market = {}
    for market, joins in joins_by_market.items():
        grid.level_index(axis, market)
        try:
            j = float(joins)
        except (TypeError, ValueError):
            raise QueryError(f"joins for {axis}={market} is not a number ({joins!r})",
                             field=f"joins_by_market.{market}") from None
        if not np.isfinite(j):
            raise QueryError(f"joins for {axis}={market} is not finite", field=f"joins_by_market.{market}")
        st.check_sold(spec, {axis: market}, plan)
        if base_w is None:
            w = joiner_mix(solved, axis, market)
        else:
            w = np.where(codes[fpos] == grid.level_index(axis, market), base_w, 0.0)
            if not w.sum() > 0:
                raise QueryError(f"the weights give no mass to {axis}={market}", field="weights")
            w = w / w.sum()
        src = np.flatnonzero(w)
        if np.isin(codes[grid.position(spec.status_axis)][src], member_codes).any():
            raise QueryError("acquisition weights must cover non-member states only", field="weights")
        dst = st.moved_states(spec, grid, src, {spec.status_axis: plan})
        per = answer(solved, "acquisition", [(dst, w[src]), (src, -w[src])], stream, horizon, level, {})
        per_market[market] = {"joins": j, "value_per_acquisition": per.value,
                              "interval": None if per.interval is None else list(per.interval)}
        parts += [(dst, j * w[src]), (src, -j * w[src])]
    return answer(solved, "campaign", parts, stream, horizon, level, {"axis": axis, "plan": plan, "markets": per_market})
