"""Marginal value of transitions: what small changes to the chain are worth, from one adjoint solve.

For a cohort objective J = mu . V with (I - beta P) V = r:

* the adjoint lambda solves (I - beta P^T) lambda = mu; lambda_i is the discounted expected number
  of periods the cohort spends in state i;
* dJ/dP_ij = beta lambda_i V_j (differentiate (I - beta P) V = r: dV = (I - beta P)^{-1}(beta dP V
  + dr), and mu^T (I - beta P)^{-1} = lambda^T);
* P is a product of factor tables T (and r depends on T through the expected one-off amounts), so
  dJ/dT = d/dT [beta lambda^T P(T) V + lambda^T r(T)] at fixed lambda and V: one vector-Jacobian
  product of the operator apply, by implicit differentiation without differentiating the solver;
* a table row must sum to one, so the value of "+1 point on entry (cell, a')" moves that entry by
  0.01 and scales the row's other entries down in proportion (forbidden moves stay at zero):
  per_point = 0.01 * (G[a'] - sum_{b != a'} G[b] T[b] / (1 - T[a'])), G = dJ/dT of the row.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from stateworth import config
from stateworth.errors import QueryError
from stateworth.valuation.answer import MarginalEntry, MarginalResult, percentile_interval
from stateworth.valuation.change import _allowed
from stateworth.valuation.parts import RewardParts
from stateworth.valuation.solved import Solved

_JIT: dict = {}


def _table_gradients(*args):
    if "grad" not in _JIT:
        import jax
        import jax.numpy as jnp

        @jax.jit
        def grad(op, tables, lam, v, beta, base, cols, masks, scale):
            def f(tabs):
                opd = op.with_tables(tabs)
                j = beta * jnp.dot(lam, opd.mv(v))
                if cols.shape[1]:
                    j = j + scale * jnp.dot(lam, jnp.sum(masks * opd.mv(cols), axis=1))
                return j

            return jax.grad(f)(tables)

        _JIT["grad"] = grad
    return _JIT["grad"](*args)


def marginal(solved: Solved, weights: Any, stream: str = "revenue", top: int = 20,
             level: float = 0.9) -> MarginalResult:
    """Marginal values for J = mu . V: one adjoint solve (I - beta P^T) lambda = mu gives
    dJ/dP_ij = beta lambda_i V_j and, chained through the factor product, dJ/dT for every
    factor-table entry; ``top`` entries ranked by the value of +1 point with proportional
    renormalisation. With draws, ``interval`` is J's. A slope: use a transition change for the
    exact effect of a finite change."""
    from stateworth.solver import solve
    from stateworth.valuation.cohorts import weights_vector
    from stateworth.valuation.lookups import check_level
    from stateworth.valuation.parts import reward_parts

    level = check_level(level)
    j = solved.col(stream)
    if int(top) < 1:
        raise QueryError(f"top must be at least 1 (got {top})", field="top")
    mu = weights_vector(solved, weights)
    model = solved.model
    adj = solve(model, mu, transpose=True, tol=solved.settings.tol)
    lam = adj.values[:, 0]
    v = solved.values[:, j]
    grads = table_gradients(model, lam, v, reward_parts(model, stream))
    entries = ranked_entries(model, grads, int(top))
    interval = None
    if solved.draws is not None:
        lo, hi = percentile_interval(solved.draws[:, :, j] @ mu, level)
        interval = (float(lo), float(hi))
    return MarginalResult(objective=float(np.dot(mu, v)), unit=solved.unit(stream), version=solved.version,
                          stream=stream, beta=model.beta, entries=entries, gradients=grads, adjoint=lam,
                          values=v, interval=interval, level=level)


def table_gradients(model, lam: np.ndarray, v: np.ndarray, parts: RewardParts) -> dict[str, np.ndarray]:
    """dJ/dT for every factor table (raw partials, same shapes as the tables): on the explicit
    matrix for models the sparse LU solves (:func:`explicit_gradients`), else by a vector-Jacobian
    product of the structured operator (JAX)."""
    from stateworth.solver.solve import choose_method

    if choose_method(model) == "sparse":
        return explicit_gradients(model, lam, v, parts)
    config.use_jax()
    import jax.numpy as jnp

    tabs = {a: config.device(t) for a, t in model.tables.items()}
    g = _table_gradients(model.operator, tabs, config.device(lam), config.device(v), jnp.float64(model.beta),
                         config.device(parts.base), config.device(parts.cols), config.device(parts.masks), parts.scale)
    return {a: np.asarray(x) for a, x in g.items()}


def explicit_gradients(model, lam: np.ndarray, v: np.ndarray, parts: RewardParts) -> dict[str, np.ndarray]:
    """dJ/dT on the explicit matrix. J's dependence on the tables at fixed lambda and V is
    ``sum_{(i,j) in P} lam_i (beta V_j + scale masks_i . cols_j) P_ij``, and P_ij is a product of one
    entry of each factor's table (:class:`stateworth.rules.explicit.Pattern`), so the partial on a
    table entry sums, over the non-zeros it makes, that weight times the other factors' entries."""
    from stateworth.rules.explicit import pattern

    # every allowed move, also those the tables put at zero: a slope there is still a slope
    allowed = {f.axis: _allowed(model, f).astype(np.float64) for f in model.factors}
    pat = pattern(model.spec, model.grid, model.factors, [allowed])
    rows = np.repeat(np.arange(pat.n), np.diff(pat.indptr))
    cols = pat.indices
    weight = model.beta * np.asarray(v, dtype=np.float64)[cols]
    if parts.cols.shape[1]:
        weight = weight + parts.scale * np.einsum("km,km->k", parts.masks[rows], parts.cols[cols])
    weight = weight * np.asarray(lam, dtype=np.float64)[rows]
    values = {a: np.asarray(model.tables[a], dtype=np.float64).reshape(-1)[e] for a, e in pat.entries.items()}
    out = {}
    for a, e in pat.entries.items():
        others = np.ones(pat.nnz)
        for b, x in values.items():
            if b != a:
                others *= x
        size = int(np.asarray(model.tables[a]).size)
        out[a] = np.bincount(e, weights=weight * others, minlength=size).reshape(np.shape(model.tables[a]))
    return out


def per_point(table: np.ndarray, grad: np.ndarray) -> np.ndarray:
    """Value of +0.01 on each entry with proportional renormalisation of its row; NaN where the
    entry is already 1 (no other mass to take)."""
    rowsum = np.sum(grad * table, axis=-1, keepdims=True)
    rest = 1.0 - table
    with np.errstate(divide="ignore", invalid="ignore"):
        d = grad - (rowsum - grad * table) / rest
    return np.where(rest > 1e-12, 0.01 * d, np.nan)


def ranked_entries(model, gradients: dict[str, np.ndarray], top: int) -> list[MarginalEntry]:
    """The ``top`` allowed factor entries by |per_point|, largest first."""
    spec = model.spec
    cands: list[tuple[float, str, tuple, float, float, float]] = []
    for f in model.factors:
        t, g = model.tables[f.axis], gradients[f.axis]
        pp = per_point(t, g)
        ok = _allowed(model, f) & np.isfinite(pp)
        flat = np.where(ok, np.abs(pp), -1.0).reshape(-1)
        k = min(top, int(np.sum(flat >= 0)))
        if k == 0:
            continue
        idx = np.argpartition(-flat, k - 1)[:k]
        for i in idx:
            cell = np.unravel_index(int(i), t.shape)
            cands.append((float(flat[i]), f.axis, cell, float(t[cell]), float(pp[cell]), float(g[cell])))
    cands.sort(key=lambda c: -c[0])
    out = []
    for _, axis, cell, p, ppv, gv in cands[:top]:
        f = next(x for x in model.factors if x.axis == axis)
        given = {gname: spec.axis_levels(gname[5:] if gname.startswith("next.") else gname)[int(c)]
                 for gname, c in zip(f.given, cell[:-1])}
        out.append(MarginalEntry(axis=axis, cell=given, to=spec.axis_levels(axis)[int(cell[-1])], probability=p,
                                 per_point=ppv, gradient=gv))
    return out


def d_transitions(beta: float, lam: np.ndarray, v: np.ndarray, pairs: Sequence[tuple[int, int]]) -> np.ndarray:
    """dJ/dP_ij = beta lambda_i V_j for explicit (i, j) pairs."""
    p = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    return beta * lam[p[:, 0]] * v[p[:, 1]]
