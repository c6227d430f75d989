"""Posterior draws of the factor tables: validated, and solved by the method the point solve uses.

``model.draws`` maps a random axis to ``(D, *table shape)``: D draws of that factor's table
(e.g. from its Dirichlet posterior). Draw d is the model with every drawn axis's table replaced
by its d-th draw. Its value functions solve ``(I - beta P_d) V_d = r_d``; ``r_d`` depends on the
draw too where a stream has one-off amounts on status moves (their expectation uses P_d).

:func:`solve_draw_values` picks the method as :func:`stateworth.solver.solve.choose_method` does
for the point model: a sparse LU per draw on the host for small and medium grids
(:func:`sparse_draws`, no JAX), else one batched, preconditioned GMRES computation on the
structured operator (:mod:`.batched`). Imports no JAX itself.
"""

from __future__ import annotations

import time
from typing import Mapping, Sequence

import numpy as np

from stateworth import config
from stateworth.errors import ConvergenceError, QueryError
from stateworth.valuation.parts import RewardParts


def stacked_tables(model, draws: Mapping[str, np.ndarray] | None = None) -> tuple[dict[str, np.ndarray], int]:
    """Validate draws ``{axis: (D, *shape)}`` against the model's factors -> (draws, D)."""
    draws = model.draws if draws is None else draws
    shapes = {f.axis: f.shape for f in model.factors}
    D = None
    out = {}
    for axis, arr in draws.items():
        if axis not in shapes:
            raise QueryError(f"draws for '{axis}', which is not a random axis of the model "
                             f"({', '.join(shapes)})", field=f"draws.{axis}")
        a = np.asarray(arr, dtype=np.float64)
        if a.shape[1:] != shapes[axis]:
            raise QueryError(f"draws for '{axis}' have shape {a.shape}; expected (D, {', '.join(map(str, shapes[axis]))})",
                             field=f"draws.{axis}")
        if D is not None and a.shape[0] != D:
            raise QueryError(f"draws for '{axis}' number {a.shape[0]} but other axes have {D}", field=f"draws.{axis}")
        D = a.shape[0]
        out[axis] = a
    return out, int(D or 0)


# ---- one entry point for every method ------------------------------------------------------


def _parts_rhs(P, parts: Sequence[RewardParts]) -> np.ndarray:
    """Rewards ``(n, k)`` of ``parts`` under the explicit matrix ``P`` (scipy)."""
    cols = []
    for p in parts:
        r = np.asarray(p.base, dtype=np.float64)
        if p.cols.shape[1]:
            r = r + p.scale * np.sum(p.masks * (P @ p.cols), axis=1)
        cols.append(r)
    return np.stack(cols, axis=1)


def sparse_draws(model, stacked: Mapping[str, np.ndarray], parts: Sequence[RewardParts], *, tol: float = 1e-10,
                 transpose: bool = False, horizon: int | None = None) -> tuple[np.ndarray, dict]:
    """Every draw solved on the host by a sparse LU per fixed block (:mod:`stateworth.solver.sparse`):
    the explicit matrix of a draw is one gather and product per factor on a pattern enumerated once
    for the point tables and all draws (:func:`stateworth.rules.explicit.pattern`). With
    ``horizon``, the H-period values instead (H sparse products per draw). Returns
    ``(X (D, n, k), stats)``; ConvergenceError if a draw fails."""
    import scipy.sparse as sp

    from stateworth.rules.explicit import pattern
    from stateworth.solver.result import Status
    from stateworth.solver.sparse import BlockSystem, fixed_blocks

    t0 = time.perf_counter()
    D = int(next(iter(stacked.values())).shape[0]) if stacked else 0
    n, k = model.n_states, len(parts)
    X = np.empty((D, n, k))
    if D == 0:
        return X, {"method": "sparse", "draws": 0, "seconds": 0.0}
    pat = pattern(model.spec, model.grid, model.factors, [model.tables, dict(stacked)])
    blocks = fixed_blocks(model)
    system = BlockSystem(n, pat.indptr, pat.indices, blocks)
    worst = 0.0
    for d in range(D):
        tabs = {**model.tables, **{a: np.asarray(v[d]) for a, v in stacked.items()}}
        p_data = pat.data(tabs)
        P = sp.csr_matrix((p_data, pat.indices, pat.indptr), shape=(n, n))
        r = _parts_rhs(P, parts)
        if horizon is not None:
            Pt = P.T.tocsr() if transpose else P
            v = np.zeros_like(r)
            for _ in range(int(horizon)):
                v = r + model.beta * (Pt @ v)
            X[d] = v
            continue
        res = system.solve(system.data(p_data, model.beta), r, transpose=transpose, tol=tol)
        if res.status != Status.CONVERGED:
            raise ConvergenceError(f"sparse LU failed on posterior draw {d} ({res.status.name.lower()}, relative "
                                   f"residual {res.residual:.3g})", stats={"method": "sparse", "draw": d})
        X[d] = res.x
        worst = max(worst, res.residual)
    return X, {"method": "sparse", "draws": D, "blocks": blocks, "non_zeros": pat.nnz, "residual": worst,
               "seconds": time.perf_counter() - t0}


def solve_draw_values(model, stacked: Mapping[str, np.ndarray], parts: Sequence[RewardParts], x0: np.ndarray, *,
                      tol: float = 1e-10, transpose: bool = False, method: str = "auto",
                      batch: int | None = None) -> tuple[np.ndarray, dict]:
    """Values of every posterior draw, ``(D, n, k)``, by the method the point solve would use
    (:func:`stateworth.solver.solve.choose_method`): the sparse LU on the host, or batched
    preconditioned GMRES on the structured operator (:func:`solve_draws`, warm from ``x0``)."""
    from stateworth.solver.solve import choose_method

    chosen = choose_method(model) if method == "auto" else method
    if chosen == "sparse":
        return sparse_draws(model, stacked, parts, tol=tol, transpose=transpose)
    config.use_jax()
    from stateworth.valuation.batched import rewards_for_draws, solve_draws

    op = model.operator
    return solve_draws(model, stacked, lambda t: rewards_for_draws(op, t, parts), x0, tol=tol,
                       transpose=transpose, batch=batch)


def horizon_draw_values(model, stacked: Mapping[str, np.ndarray], parts: Sequence[RewardParts],
                        horizon: int) -> np.ndarray:
    """H-period values of every draw, ``(D, n, k)``, on the host for sparse-sized models, else
    batched on the structured operator."""
    from stateworth.solver.solve import choose_method

    if choose_method(model) == "sparse":
        return sparse_draws(model, stacked, parts, horizon=horizon)[0]
    config.use_jax()
    from stateworth.valuation.batched import horizon_draws, rewards_for_draws

    return horizon_draws(model, stacked, rewards_for_draws(model.operator, stacked, parts), horizon)
