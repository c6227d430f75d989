"""Transition changes: the exact value of changing one transition probability, re-solved.

``transition_change`` applies a :class:`~stateworth.valuation.change.TransitionChange` (+delta on one
factor entry in chosen cells, the row's other entries scaled down in proportion, forbidden moves
kept at zero), re-solves the changed chain and returns V_changed - V per state and weighted by a
cohort. Only the fixed cells the change is conditioned on are re-solved: P is block-diagonal over
fixed cells, so every other state's change is exactly zero (:mod:`.block`). With posterior draws,
the same change is applied to every draw and solved by the draws' method for an interval.
"""

from __future__ import annotations

import threading
import time
from typing import Any

import numpy as np

from stateworth.errors import QueryError
from stateworth.rules.compiled import content_hash
from stateworth.valuation.answer import ChangeResult, percentile_interval
from stateworth.valuation.block import restrict, slice_table, touched
from stateworth.valuation.change import TransitionChange, apply_change, describe_change
from stateworth.valuation.cohorts import weights_vector
from stateworth.valuation.lookups import check_level
from stateworth.valuation.parts import reward_parts, slice_parts
from stateworth.valuation.solved import Solved


def transition_change(solved: Solved, change: TransitionChange, stream: str = "revenue", weights: Any = None,
                      level: float = 0.9, parts_cache: dict | None = None) -> ChangeResult:
    """Exact effect of ``change``: per-state delta and, with ``weights``, the cohort-weighted delta
    (see the module doc). ``parts_cache``: a dict the caller keeps so that repeated changes on the
    same cells reuse the stream's reward parts. ``stats["states_resolved"]`` says how many states
    were re-solved."""
    from stateworth.solver import solve
    from stateworth.valuation.draws import solve_draw_values

    level = check_level(level)
    j = solved.col(stream)
    w = None if weights is None else weights_vector(solved, weights)
    if not isinstance(change, TransitionChange):
        raise QueryError("change must be a TransitionChange", field="change")
    model, spec = solved.model, solved.model.spec
    new = apply_change(model, change)
    t0 = time.perf_counter()
    tables = {**model.tables, change.axis: new}
    # the changed model's version is a hash of every table (~10 ms for the 14 MB status table at
    # 3.6e5 states); hashlib lets go of the interpreter lock, so it runs beside the solve
    version_box: list[str] = []
    hasher = threading.Thread(target=lambda: version_box.append(content_hash(spec, tables)[:12]),
                              name="stateworth-change-hash", daemon=True)
    hasher.start()
    block = touched(model, change.axis, change.when)
    cache = parts_cache if parts_cache is not None else {}
    key = (stream, tuple((a, tuple(lv.tolist())) for a, lv in sorted(block.levels.items())))
    parts = cache.get(key)
    if parts is None:
        full = cache.get((stream, None))
        if full is None:
            full = cache[(stream, None)] = reward_parts(model, stream)
        parts = full if block.full else slice_parts(full, block.states)
        if len(cache) < 64:
            cache[key] = parts
    sub = restrict(model, block, tables, {})
    old = solved.values[block.states, j]
    sol = solve(sub, stream, tol=solved.settings.tol, x0=old[:, None])
    seconds = time.perf_counter() - t0
    delta = np.zeros(model.n_states)
    delta[block.states] = sol.values[:, 0] - old
    weighted = None if w is None else float(np.dot(w, delta))
    stats = {"seconds": seconds, "warm_start": sol.method == "gmres", "states_resolved": int(block.states.size),
             **{k: v for k, v in sol.stats().items() if k in ("method", "iterations", "operator_applies", "residual")}}
    interval = state_iv = None
    if solved.draws is not None:
        from stateworth.valuation.draws import stacked_tables

        t1 = time.perf_counter()
        D = solved.n_draws
        tabs, _ = stacked_tables(model)
        tabs = dict(tabs)
        if change.axis in tabs:
            tabs[change.axis] = np.stack([apply_change(model, change, {change.axis: tabs[change.axis][d]},
                                                       what=f"posterior draw {d}: ") for d in range(D)])
        else:
            tabs[change.axis] = np.broadcast_to(new, (D,) + new.shape)
        factors = {f.axis: f for f in model.factors}
        tabs = {a: slice_table(model, factors[a], t, block, lead=1) for a, t in tabs.items()}
        xd, dstats = solve_draw_values(sub, tabs, [parts], sol.values, tol=solved.settings.tol)
        dd = np.zeros((D, model.n_states))
        dd[:, block.states] = xd[:, :, 0] - solved.draws[:, block.states, j]
        lo, hi = percentile_interval(dd, level)
        state_iv = (lo, hi)
        if w is not None:
            wlo, whi = percentile_interval(dd @ w, level)
            interval = (float(wlo), float(whi))
        stats["draws"] = {**dstats, "seconds": time.perf_counter() - t1}
    hasher.join()
    changed_version = version_box[0] if version_box else content_hash(spec, tables)[:12]
    return ChangeResult(delta=delta, weighted=weighted, unit=solved.unit(stream), version=solved.version,
                        changed_version=changed_version, stream=stream, interval=interval, level=level,
                        state_interval=state_iv, change=describe_change(model, change), stats=stats)
