"""The long run: the chain's stationary state mix (members and non-members alike) and what it
implies: the long-run member share by plan, and the expected discounted member-months of a
cohort. See :mod:`.stationary` for the mathematics."""

from __future__ import annotations

from typing import Any, Mapping

import numpy as np

from stateworth.caution import CAUTION
from stateworth.errors import QueryError
from stateworth.valuation.answer import percentile_interval
from stateworth.valuation.lookups import check_level
from stateworth.valuation.solved import Solved


def block_weights(solved: Solved, fixed_weights: Mapping[str, float] | np.ndarray | None) -> np.ndarray:
    """Population share per fixed cell ``(F,)`` (default equal): a mapping level -> weight of the
    single fixed axis, or an array over the fixed cells. QueryError on a bad entry."""
    grid = solved.model.grid
    fixed = [a for a in grid.axes if a.kind == "fixed"]
    F = int(np.prod([a.size for a in fixed], dtype=np.int64)) if fixed else 1
    if fixed_weights is None:
        return np.ones(F)
    if isinstance(fixed_weights, Mapping):
        if len(fixed) != 1:
            raise QueryError("fixed_weights by level needs exactly one fixed axis; give an array over the "
                             f"{F} fixed cells instead", field="fixed_weights")
        w = np.zeros(F)
        for k, v in fixed_weights.items():
            w[grid.level_index(fixed[0].name, k)] = float(v)
    else:
        w = np.asarray(fixed_weights, dtype=np.float64).reshape(-1)
        if w.size != F:
            raise QueryError(f"fixed_weights has {w.size} entries; the model has {F} fixed cells",
                             field="fixed_weights")
    if not np.all(np.isfinite(w)) or (w < 0).any() or not w.sum() > 0:
        raise QueryError("fixed_weights must be finite, non-negative and not all zero", field="fixed_weights")
    return w


def stationary(solved: Solved, fixed_weights: Mapping[str, float] | np.ndarray | None = None,
               cache: dict | None = None) -> np.ndarray:
    """Long-run state distribution pi ``(n,)`` (pi P = pi, sum 1). Each fixed cell's block gets the
    share ``fixed_weights`` gives it (default equal: the stored long-run mix, no solve).
    ``cache``: a dict the caller keeps, to solve each other weighting once."""
    from stateworth.valuation.stationary import long_run_mix

    w = block_weights(solved, fixed_weights)
    w = w / w.sum()
    equal = np.allclose(w, w[0])
    if equal and solved.longrun is not None:
        return solved.longrun.copy()
    if equal and solved.stats.get("longrun") and solved.stats["longrun"].get("error"):
        raise QueryError(solved.stats["longrun"]["error"], field="stationary")
    key = tuple(np.round(w, 15))
    if cache is not None and key in cache:
        return cache[key].copy()
    pi = long_run_mix(solved.model, w)
    if cache is not None:
        if len(cache) >= 8:
            cache.pop(next(iter(cache)))
        cache[key] = pi
    return pi.copy()


def long_run(solved: Solved, weights: Any = None, fixed_weights: Mapping[str, float] | np.ndarray | None = None,
             level: float = 0.9, cache: dict | None = None) -> dict[str, Any]:
    """``member_share``: long-run share of periods spent as a member (pi over member states);
    ``member_share_by_plan``; ``expected_member_months``: mu . V_member_months, the discounted
    expected member-months from the cohort ``weights`` (default pi), with an interval when the
    model has draws and member_months was solved."""
    from stateworth.valuation.cohorts import weights_vector

    level = check_level(level)
    model = solved.model
    spec, grid = model.spec, model.grid
    pi = stationary(solved, fixed_weights, cache)
    status = grid.codes()[grid.position(spec.status_axis)]
    by_plan = {p: float(pi[status == grid.level_index(spec.status_axis, p)].sum()) for p in spec.members}
    mu = pi if weights is None else weights_vector(solved, weights)
    interval = None
    if "member_months" in solved.streams:
        j = solved.col("member_months")
        mm = float(np.dot(mu, solved.values[:, j]))
        if solved.draws is not None:
            lo, hi = percentile_interval(solved.draws[:, :, j] @ mu, level)
            interval = [float(lo), float(hi)]
    else:
        from stateworth.solver import solve
        mm = float(np.dot(mu, solve(model, "member_months", tol=solved.settings.tol).values[:, 0]))
    return {"member_share": float(sum(by_plan.values())), "member_share_by_plan": by_plan,
            "non_member_share_by_level": {x: float(pi[status == grid.level_index(spec.status_axis, x)].sum())
                                          for x in spec.non_members},
            "expected_member_months": mm, "expected_member_months_interval": interval,
            "level": level, "unit": "member-months", "version": solved.version, "caution": CAUTION}
