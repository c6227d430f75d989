"""Which states the chain can ever be in: the states reachable from a never-member.

A grid is a product of axes, so it holds combinations no customer can be in: a member of a plan
not sold in that market, a prospect with twelve months of tenure (tenure only counts member
months), a plan no move rule leads to. Their values solve the Bellman equation like any other
state's, but they answer no real question, so a query about one is refused and averages leave
them out.

Entry states: every never-member level (every non-member level when none is a never-member),
each counter at its never-member start (:func:`stateworth.rules.counters.counter_start`), every
level of the other axes. Reachable: the entry states and every state a path of moves the rules
allow leads to from them. The rules, not the fitted probabilities, decide: a move the spec allows
is possible even where a table puts (or a panel shows) no mass on it, so a model without joins
still values its members. Computed by pushing the indicator forward through the allowed-move
structure (the chain with each table replaced by its move mask) until it stops growing: one
transpose apply per step, about as many steps as the longest counter.
"""

from __future__ import annotations

import numpy as np

from stateworth.rules.counters import counter_start


def entry_states(model) -> np.ndarray:
    """Boolean ``(n,)``: the entry states (see the module doc)."""
    from stateworth.valuation.states import never_member_levels

    spec, grid = model.spec, model.grid
    codes = grid.codes()
    never = never_member_levels(spec) or list(spec.non_members)
    mask = np.isin(codes[grid.position(spec.status_axis)], [grid.level_index(spec.status_axis, x) for x in never])
    for ax in grid.axes:
        if ax.kind == "counter":
            mask &= codes[grid.position(ax.name)] == counter_start(spec, ax.name)
    return mask


def reachable(model, max_steps: int = 100_000) -> np.ndarray:
    """Boolean ``(n,)``: the states reachable from an entry state (see the module doc)."""
    from stateworth.solver.solve import choose_method
    from stateworth.valuation.change import _allowed

    x = entry_states(model)
    masks = {f.axis: _allowed(model, f).astype(np.float64) for f in model.factors}
    if choose_method(model) == "sparse":
        from stateworth.rules.explicit import explicit_csr

        Pt = explicit_csr(model.spec, model.grid, model.factors, masks).T.tocsr()

        def step(v: np.ndarray) -> np.ndarray:
            return (Pt @ v.astype(np.float64)) > 0
    else:
        from stateworth import config

        config.use_jax()
        import jax

        op = model.operator.with_tables(masks).transpose()
        push = jax.jit(lambda o, v: o.mv(v) > 0)

        def step(v: np.ndarray) -> np.ndarray:
            return np.asarray(push(op, config.device(v, np.float64)))

    for _ in range(max_steps):
        grown = x | step(x)
        if np.array_equal(grown, x):
            return x
        x = grown
    return x
