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
            # by the grid's own levels: a sub-grid (some fixed cells only) keeps its prices
            table = np.array([float(val.get(lv_f, 0.0)) for lv_f in grid.axis(fax).levels])
            c[on_plan] += table[codes[fax][on_plan]]
        else:
            c[on_plan] += val
    c *= 1.0 - stream.fees_share
    for cax, table in stream.costs.items():
        vec = np.array([float(table.get(lv_c, 0.0)) for lv_c in grid.axis(cax).levels])
        c -= np.where(member, vec[codes[cax]], 0.0)
    return c


def expected_amounts(spec, grid: Grid, factors, tables: dict[str, np.ndarray], amounts: np.ndarray,
                     xp=np) -> np.ndarray:
    """``E[a(st, st') | s]`` for every state, ``(n,)``: the expected one-off amount of the next
    status move, ``sum_{st'} P(st' | s) a(st(s), st')``.

    Only the factors drawn up to the status matter (later ones sum to one), and only through
    the current axes they are given, so the expectation is one einsum over those tables and
    ``amounts`` (a small array over the current axes involved), broadcast to the grid: no
    operator, no transition matrix. ``xp`` is ``numpy`` or ``jax.numpy`` (traceable, for
    posterior draws)."""
    import string

    st = spec.status_axis
    letters = iter(string.ascii_letters)
    cur = {a.name: next(letters) for a in grid.axes}
    nxt = {}
    ops, subs = [], []
    for f in factors:
        nxt[f.axis] = next(letters)
        subs.append("".join(nxt[g[5:]] if g.startswith("next.") else cur[g] for g in f.given) + nxt[f.axis])
        ops.append(tables[f.axis])
        if f.axis == st:
            break
    ops.append(amounts)
    subs.append(cur[st] + nxt[st])
    mentioned = set("".join(subs))
    out = [a.name for a in grid.axes if cur[a.name] in mentioned]
    expr = ",".join(subs) + "->" + "".join(cur[a] for a in out)
    small = xp.einsum(expr, *ops)
    shape = [grid.axis(a.name).size if a.name in out else 1 for a in grid.axes]
    return xp.broadcast_to(small.reshape(shape), grid.shape).reshape(-1)


def reward_vector(spec, grid: Grid, factors, tables: dict[str, np.ndarray], stream, beta: float) -> np.ndarray:
    """The Bellman reward ``r`` for one stream (``stream=None`` is member_months), ``(n,)`` in
    money per period: ``c + beta E[a | s]`` with cash at the start of a period, ``beta (c + E[a | s])``
    at its end (see the module doc)."""
    c = period_cash(spec, grid, stream)
    a = transition_amounts(spec, stream)
    ea = expected_amounts(spec, grid, factors, tables, a) if np.any(a != 0) else np.zeros(grid.size)
    if spec.model.discount.cash == "start":
        return c + beta * ea
    return beta * (c + ea)
