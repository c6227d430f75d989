"""Contrasts: the value of moving one customer, V(after) - V(before) of one chain.

The honest value of a move, as opposed to the value of the destination alone: a non-member is
worth something too, because many join later anyway. Named contrasts build the state after from
the state before (:func:`counterpart`: the status replaced, counters reset as the spec's
``reset_on`` says); :func:`naive_comparison` puts the usual shortcuts beside the honest figure.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stateworth.caution import CAUTION
from stateworth.errors import QueryError
from stateworth.rules.rewards import period_cash
from stateworth.valuation import states as st
from stateworth.valuation.answer import Answer
from stateworth.valuation.lookups import Coords, answer, coords, draws_needed, index, values
from stateworth.valuation.solved import Solved


def counterpart(solved: Solved, state: Coords, status: str, **levels: str) -> dict[str, str]:
    """The state a status event leads to, at the same date: ``status`` replaced, each counter
    reset to 0 when the event (join, lapse or change of status) is in its ``reset_on``, else
    unchanged; cycles, fixed and chance axes unchanged unless given in ``levels``."""
    model = solved.model
    i = index(solved, state)
    moved = st.moved_states(model.spec, model.grid, np.array([i]), {model.spec.status_axis: status, **levels})
    return coords(solved, int(moved[0]))


def contrast(solved: Solved, before: Coords, after: Coords, stream: str = "revenue", horizon: int | None = None,
             level: float = 0.9, kind: str = "contrast") -> Answer:
    """V(after) - V(before). The two states must agree on every fixed axis (QueryError names the
    axis otherwise): a fixed axis never changes, so no move can cross it."""
    b, a = index(solved, before), index(solved, after)
    cb, ca = coords(solved, b), coords(solved, a)
    st.check_same_fixed(solved.model.grid, cb, ca)
    ans = answer(solved, kind, [(np.array([a, b]), np.array([1.0, -1.0]))], stream, horizon, level,
                 {"before": cb, "after": ca})
    vb = float(values(solved, np.array([b]), stream, horizon)[0])
    ans.details.update({"before_value": vb, "after_value": vb + ans.value})
    return ans


def check_plan(solved: Solved, plan: str, what: str = "plan") -> None:
    spec = solved.model.spec
    if plan not in spec.members:
        raise QueryError(f"'{plan}' is not a plan; plans are {', '.join(spec.members)}", field=what)


def acquisition(solved: Solved, state: Coords, plan: str, stream: str = "revenue", horizon: int | None = None,
                level: float = 0.9) -> Answer:
    """Value of acquiring a non-member onto ``plan``: E[V(landing state)] - V(non-member state),
    the landing states being where the chain's own joining rows put a joiner (:func:`landing`:
    engagement and other chance axes as the factors say for that move, counters reset as the
    spec's ``reset_on`` says). ``details["landing"]`` lists the mix; ``details["after"]`` is its
    most likely state. QueryError if the state is a member, ``plan`` is not a plan, is not sold
    there, or the move rules forbid joining it from this status. (For one chosen after-state use
    :func:`contrast`.)"""
    c = coords(solved, index(solved, state))
    _check_acquisition(solved, c, plan)
    return landing_contrast(solved, c, plan, stream, horizon, level, kind="acquisition")


def _check_acquisition(solved: Solved, c: dict[str, str], plan: str) -> None:
    spec = solved.model.spec
    if c[spec.status_axis] in spec.members:
        raise QueryError(f"an acquisition starts from a non-member state; {spec.status_axis}={c[spec.status_axis]} "
                         f"is a plan (non-member levels: {', '.join(spec.non_members)})", field=spec.status_axis)
    check_plan(solved, plan)
    st.check_sold(spec, c, plan)
    st.check_move(spec, c[spec.status_axis], plan)


def plan_change(solved: Solved, state: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
                level: float = 0.9) -> Answer:
    """Upgrade or downgrade of a member: V(same state on ``to_plan``) - V(state), counters reset
    where the spec resets them on a change of status."""
    spec = solved.model.spec
    c = coords(solved, index(solved, state))
    cur = c[spec.status_axis]
    if cur not in spec.members:
        raise QueryError(f"a plan change starts from a member state; {spec.status_axis}={cur} is not a plan "
                         f"(plans: {', '.join(spec.members)})", field=spec.status_axis)
    check_plan(solved, to_plan, "to_plan")
    if to_plan == cur:
        raise QueryError(f"the state is already on plan '{cur}'; choose another plan", field="to_plan")
    st.check_sold(spec, c, to_plan)
    st.check_move(spec, cur, to_plan, "to_plan")
    return contrast(solved, c, counterpart(solved, c, to_plan), stream, horizon, level, kind="plan_change")


def win_back(solved: Solved, state: Coords, to_plan: str, stream: str = "revenue", horizon: int | None = None,
             level: float = 0.9) -> Answer:
    """Winning back a former member: like :func:`acquisition` (into the chain's landing mix for
    that move), but the state's status must be a former-member level (a non-member level that
    members can move into)."""
    spec = solved.model.spec
    c = coords(solved, index(solved, state))
    former = st.former_member_levels(spec)
    if c[spec.status_axis] not in former:
        raise QueryError(f"a win-back starts from a former member; {spec.status_axis}={c[spec.status_axis]} is not "
                         f"one (former-member levels: {', '.join(former) or 'none'})", field=spec.status_axis)
    check_plan(solved, to_plan, "to_plan")
    st.check_sold(spec, c, to_plan)
    st.check_move(spec, c[spec.status_axis], to_plan, "to_plan")
    return landing_contrast(solved, c, to_plan, stream, horizon, level, kind="win_back")


def engagement_change(solved: Solved, state: Coords, axis: str, to_level: str, stream: str = "revenue",
                      horizon: int | None = None, level: float = 0.9) -> Answer:
    """Lifting (or lowering) a chance axis such as an engagement band: V(state with ``axis`` at
    ``to_level``) - V(state)."""
    grid = solved.model.grid
    ax = grid.axis(axis)
    if ax.kind != "chance":
        raise QueryError(f"axis '{axis}' is a {ax.kind} axis; an engagement change moves a chance axis "
                         f"({', '.join(a.name for a in grid.axes if a.kind == 'chance') or 'none'})", field="axis")
    c = coords(solved, index(solved, state))
    grid.level_index(axis, to_level)
    after = dict(c)
    after[axis] = to_level
    return contrast(solved, c, after, stream, horizon, level, kind="engagement_change")


def naive_comparison(solved: Solved, state: Coords, plan: str, stream: str = "revenue",
                     level: float | None = 0.9) -> dict[str, Any]:
    """The shortcut figures beside the honest one, for a non-member state and a plan:
    ``member_value`` V(s+) (the usual lifetime-value shortcut; s+ the landing mix), ``honest``
    V(s+) - V(s), ``one_period`` the stream's cash in one member period at s+, ``gap_ratio`` member_value /
    honest, plus unit, version and a caution. ``honest_interval`` at ``level`` when the model has
    enough draws for it (None with ``level=None``)."""
    enough = level is not None and (solved.draws is None or solved.n_draws >= draws_needed(level))
    if enough:
        acq = acquisition(solved, state, plan, stream, level=level)
    else:  # the checks of an acquisition, then its figures without an interval
        c = coords(solved, index(solved, state))
        _check_acquisition(solved, c, plan)
        va, vb, _, dst0, w0 = landing_samples(solved, index(solved, c), plan, stream)
        acq = Answer(kind="acquisition", value=va - vb, unit=solved.unit(stream), version=solved.version,
                     stream=stream, interval=None, level=0.9,
                     details={"before": c, "after": coords(solved, int(dst0[np.argmax(w0)])), "before_value": vb,
                              "after_value": va})
    spec = solved.model.spec
    dst, w, _ = landing(solved, index(solved, state), plan)
    one = float(np.dot(w, period_cash(spec, solved.model.grid,
                                      None if stream == "member_months" else spec.rewards[stream])[dst]))
    member_value = float(acq.details["after_value"])
    honest = float(acq.value)
    return {"state": acq.details["before"], "member_state": acq.details["after"], "stream": stream,
            "unit": acq.unit, "version": solved.version, "member_value": member_value, "honest": honest,
            "non_member_value": float(acq.details["before_value"]), "one_period": one,
            "gap_ratio": member_value / honest if honest != 0 else None,
            "honest_interval": None if acq.interval is None else list(acq.interval), "level": acq.level,
            "caution": CAUTION + ("; 'member_value' ignores that a non-member may join later anyway and "
                                  "'one_period' ignores that members stay")}


def landing(solved: Solved, state: int, status: str) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Where a customer in flat state ``state`` lands when their next status is ``status``, as the
    chain's own factors say: the next levels of the other random axes (engagement, band, ...)
    drawn given the current state and that next status, ``P(x' | s, status' = status)``; counters
    reset as the status event's ``reset_on`` says; cycles and fixed axes as now (a contrast
    compares two states at the same date).

    Returns ``(states (m,), weights (m,), draw_weights (D, m) or None)``: the landing states and
    their probabilities under the point tables and under each posterior draw's tables."""
    model = solved.model
    spec, grid = model.spec, model.grid
    st_axis = spec.status_axis
    target = grid.level_index(st_axis, status)
    cur = np.array(np.unravel_index(int(state), grid.shape))
    others = [f for f in model.factors if f.axis != st_axis]
    sizes = [grid.axis(f.axis).size for f in others]
    combos = np.indices(sizes).reshape(len(sizes), -1) if others else np.zeros((0, 1), dtype=np.int64)
    nxt = {f.axis: combos[k] for k, f in enumerate(others)}
    nxt[st_axis] = np.full(combos.shape[1], target)
    pos = {a.name: i for i, a in enumerate(grid.axes)}

    def weights(tables: dict, lead: int) -> np.ndarray:
        """P(x', status' = status | s) over the combos; where that is zero everywhere (the
        tables give this move no mass from s), the law of x' with the status factor left out,
        so that a move the rules allow still has a landing mix."""
        joint = rest = None
        for f in model.factors:
            idx = [nxt[g[5:]] if g.startswith("next.") else np.full(combos.shape[1], cur[pos[g]]) for g in f.given]
            idx.append(nxt[f.axis])
            p = np.asarray(tables[f.axis])[(slice(None),) * lead + tuple(idx)]
            joint = p if joint is None else joint * p
            if f.axis != st_axis:
                rest = p if rest is None else rest * p
        rest = np.ones_like(joint) if rest is None else rest
        tot = joint.sum(axis=-1, keepdims=True)
        w = np.where(tot > 0, joint, rest)
        return w / np.maximum(w.sum(axis=-1, keepdims=True), 1e-300)

    w = weights(model.tables, 0)
    D = solved.n_draws
    wd = None
    if D and model.draws:
        tabs = {a: (model.draws[a] if a in model.draws else np.broadcast_to(model.tables[a], (D,) + model.tables[a].shape))
                for a in model.tables}
        wd = weights(tabs, 1)
    keep = w > 0
    if wd is not None:
        keep = keep | np.any(wd > 0, axis=0)
        wd = wd[:, keep]
    w = w[keep]
    # the landing states: status set (counters reset by the event), random axes at the combo
    base = st.moved_states(spec, grid, np.array([int(state)]), {st_axis: status})
    codes = np.array(np.unravel_index(base, grid.shape))[:, 0]
    out = np.repeat(codes[:, None], int(keep.sum()), axis=1)
    for f in others:
        out[pos[f.axis]] = nxt[f.axis][keep]
    return np.ravel_multi_index(tuple(out), grid.shape).astype(np.int64), w, wd


def describe_landing(solved: Solved, states: np.ndarray, weights: np.ndarray, top: int = 6) -> list[dict[str, Any]]:
    """The landing mix as a list of ``{levels of the random axes other than the status, share}``,
    largest first (at most ``top``, the rest summed as ``other``)."""
    model = solved.model
    names = [f.axis for f in model.factors if f.axis != model.spec.status_axis]
    order = np.argsort(-weights)
    out = []
    for k in order[:top]:
        c = coords(solved, int(states[k]))
        out.append({"levels": {a: c[a] for a in names}, "share": float(weights[k])})
    rest = float(weights[order[top:]].sum()) if len(order) > top else 0.0
    if rest > 0:
        out.append({"levels": {"other": "other"}, "share": rest})
    return out


def landing_samples(solved: Solved, state: int, plan: str, stream: str, horizon: int | None = None
                    ) -> tuple[float, float, np.ndarray | None, np.ndarray, np.ndarray]:
    """The parts of a move into the landing mix on ``plan`` from flat state ``state`` (a state the
    caller has checked): ``(V(after), V(before), per_draw, states, weights)``. V(after) is the
    landing distribution's expectation of V (:func:`landing`); ``per_draw`` ``(D,)`` is
    V(after) - V(before) within each posterior draw under that draw's own landing weights (None
    without draws), so averages of several moves can take their interval over the draws."""
    from stateworth.valuation.lookups import draw_values

    i = int(state)
    dst, w, wd = landing(solved, i, plan)
    v_after = float(np.dot(w, values(solved, dst, stream, horizon)))
    v_before = float(values(solved, np.array([i]), stream, horizon)[0])
    per = None
    if solved.draws is not None:
        dv = draw_values(solved, dst, stream, horizon)
        per = np.sum(dv * (wd if wd is not None else w[None, :]), axis=1) - draw_values(
            solved, np.array([i]), stream, horizon)[:, 0]
    return v_after, v_before, per, dst, w


def landing_contrast(solved: Solved, state: Coords, plan: str, stream: str, horizon: int | None, level: float,
                     kind: str) -> Answer:
    """V(landing mix on ``plan``) - V(state): the after value is the landing distribution's
    expectation (:func:`landing`), within each posterior draw under that draw's own landing
    weights."""
    from stateworth.valuation.answer import percentile_interval
    from stateworth.valuation.lookups import check_level

    level = check_level(level)
    i = index(solved, state)
    v_after, v_before, per, dst, w = landing_samples(solved, i, plan, stream, horizon)
    interval = None
    details: dict[str, Any] = {"before": coords(solved, i), "after": coords(solved, int(dst[np.argmax(w)])),
                               "landing": describe_landing(solved, dst, w), "before_value": v_before,
                               "after_value": v_after}
    if per is not None:
        lo, hi = percentile_interval(per, level)
        interval = (float(lo), float(hi))
    return Answer(kind=kind, value=v_after - v_before, unit=solved.unit(stream), version=solved.version,
                  stream=stream, interval=interval, level=level, horizon=None if horizon is None else int(horizon),
                  details=details)
