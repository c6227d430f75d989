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
from stateworth.valuation.lookups import Coords, answer, coords, index, values
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
    """Value of acquiring a non-member: V(member counterpart on ``plan``) - V(non-member state).
    QueryError if the state is a member, ``plan`` is not a plan, or it is not sold there."""
    spec = solved.model.spec
    c = coords(solved, index(solved, state))
    if c[spec.status_axis] in spec.members:
        raise QueryError(f"an acquisition starts from a non-member state; {spec.status_axis}={c[spec.status_axis]} "
                         f"is a plan (non-member levels: {', '.join(spec.non_members)})", field=spec.status_axis)
    check_plan(solved, plan)
    st.check_sold(spec, c, plan)
    st.check_move(spec, c[spec.status_axis], plan)
    return contrast(solved, c, counterpart(solved, c, plan), stream, horizon, level, kind="acquisition")


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
    """Winning back a former member: like :func:`acquisition`, but the state's status must be a
    former-member level (a non-member level that members can move into)."""
    spec = solved.model.spec
    c = coords(solved, index(solved, state))
    former = st.former_member_levels(spec)
    if c[spec.status_axis] not in former:
        raise QueryError(f"a win-back starts from a former member; {spec.status_axis}={c[spec.status_axis]} is not "
                         f"one (former-member levels: {', '.join(former) or 'none'})", field=spec.status_axis)
    check_plan(solved, to_plan, "to_plan")
    st.check_sold(spec, c, to_plan)
    st.check_move(spec, c[spec.status_axis], to_plan, "to_plan")
    return contrast(solved, c, counterpart(solved, c, to_plan), stream, horizon, level, kind="win_back")


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


def naive_comparison(solved: Solved, state: Coords, plan: str, stream: str = "revenue") -> dict[str, Any]:
    """The shortcut figures beside the honest one, for a non-member state and a plan:
    ``member_value`` V(s+) (the usual lifetime-value shortcut), ``honest`` V(s+) - V(s),
    ``one_period`` the stream's cash in one member period at s+, ``gap_ratio`` member_value /
    honest, plus unit, version and a caution."""
    acq = acquisition(solved, state, plan, stream)
    after = index(solved, acq.details["after"])
    spec = solved.model.spec
    one = float(period_cash(spec, solved.model.grid,
                            None if stream == "member_months" else spec.rewards[stream])[after])
    member_value = float(acq.details["after_value"])
    honest = float(acq.value)
    return {"state": acq.details["before"], "member_state": acq.details["after"], "stream": stream,
            "unit": acq.unit, "version": solved.version, "member_value": member_value, "honest": honest,
            "non_member_value": float(acq.details["before_value"]), "one_period": one,
            "gap_ratio": member_value / honest if honest != 0 else None,
            "honest_interval": None if acq.interval is None else list(acq.interval), "level": acq.level,
            "caution": CAUTION + ("; 'member_value' ignores that a non-member may join later anyway and "
                                  "'one_period' ignores that members stay")}
