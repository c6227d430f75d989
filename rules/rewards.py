"""Reward streams compiled to per-state vectors.

For stream ``k`` the vector ``r_k`` is what enters the Bellman equation ``V = r + beta P V``:

* per-period cash ``c(s)``: price of the plan (by fixed-axis level where tabled) times
  ``1 - fees_share``, minus costs by axis level, in member periods only; ``member_months`` is 1
  in member periods;
* one-off amounts on status moves ``a(st, st')`` (join, lapse, listed moves), paid as the chain
  enters the new status, i.e. at the start of the next period: expected value ``E[a | s]``;
* timing: ``cash = "start"`` gives ``r = c + beta E[a]``; ``"end"`` gives ``r = beta (c + E[a])``.

Units: money per period in the spec's currency (member-months for ``member_months``).
"""

from __future__ import annotations

import numpy as np

from stateworth.rules.grid import Grid


def transition_amounts(spec, stream) -> np.ndarray:
    """``a[st, st']``: one-off amount when the status moves ``st -> st'`` (money)."""
    lv = spec.axis_levels(spec.status_axis)
    member = spec.member_flags()
    a = np.zeros((len(lv), len(lv)))
    if stream is None:
        return a
    a[np.ix_(~member, member)] += stream.on_join
    a[np.ix_(member, ~member)] += stream.on_lapse
    for mv in stream.on_move:
        fi = [lv.index(x) for x in mv.from_]
        ti = [lv.index(x) for x in mv.to]
        a[np.ix_(fi, ti)] += mv.amount
    return a


def period_cash(spec, grid: Grid, stream) -> np.ndarray:
    """``c(s)`` for every state, ``(n,)``: money per period (or 1 per member period)."""
    codes = dict(zip(grid.names, grid.codes()))
    st = spec.status_axis
    lv = spec.axis_levels(st)
    member = spec.member_flags()[codes[st]]
    c = np.zeros(grid.size)
    if stream is None:  # member_months
        c[member] = 1.0
        return c
    fixed = [a.name for a in grid.axes if a.kind == "fixed"]
    for plan, val in stream.price.items():
        on_plan = codes[st] == lv.index(plan)
        if isinstance(val, dict):
            fax = next(f for f in fixed if all(k in spec.axis_levels(f) for k in val))
            flv = spec.axis_levels(fax)
            table = np.zeros(len(flv))
            for k, v in val.items():
                table[flv.index(k)] = v
            c[on_plan] += table[codes[fax][on_plan]]
        else:
            c[on_plan] += val
    c *= 1.0 - stream.fees_share
    for cax, table in stream.costs.items():
        alv = spec.axis_levels(cax)
        vec = np.zeros(len(alv))
        for k, v in table.items():
            vec[alv.index(k)] = v
        c -= np.where(member, vec[codes[cax]], 0.0)
    return c


def reward_vector(spec, grid: Grid, operator, stream, beta: float) -> np.ndarray:
    """The Bellman reward ``r`` for one stream (``stream=None`` is member_months)."""
    c = period_cash(spec, grid, stream)
    a = transition_amounts(spec, stream)
    ea = np.zeros(grid.size)
    if np.any(a != 0):
        st = spec.status_axis
        codes = grid.codes()[grid.position(st)]
        cols = []
        rows_nz = [i for i in range(a.shape[0]) if np.any(a[i] != 0)]
        for i in rows_nz:
            cols.append(a[i][codes])  # x_i(s') = a(i, st'(s'))
        import jax.numpy as jnp
        y = np.asarray(operator.mv(jnp.asarray(np.stack(cols, axis=1))))
        for j, i in enumerate(rows_nz):
            sel = codes == i
            ea[sel] = y[sel, j]
    if spec.model.discount.cash == "start":
        return c + beta * ea
    return beta * (c + ea)
