"""Uncertainty: posterior draws solved in one batch, percentile intervals and their coverage.

The coverage check follows the bootstrap / posterior percentile-interval reading of docs/references.md
(Efron & Tibshirani 1993): a nominal 90 % interval should cover the true value in about 90 % of
simulated data sets, within binomial error for the number of simulations. Data here are simulated
transition counts per factor cell from a known ground-truth model; the posterior of every row is
Dirichlet(counts + 1/2 on the row's possible moves), and the Valuer's intervals come from 200
posterior draws solved as one batch.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom

from stateworth.rules import compile_model
from stateworth.solver import solve
from stateworth.errors import QueryError
from stateworth.valuation import Valuer, percentile_interval
from test_valuation import PROSPECT, dirichlet_draws, tiny_spec, tiny_tables


def posterior(tables, rng, n_per_cell: int, D: int):
    """Simulated counts -> (posterior mean tables, D posterior draws) for every factor."""
    mean, draws = {}, {}
    for a, t in tables.items():
        rows = t.reshape(-1, t.shape[-1])
        counts = np.stack([rng.multinomial(n_per_cell, r) for r in rows]).reshape(t.shape)
        alpha = np.where(t > 0, counts + 0.5, 0.0)  # structural zeros are known from the move rules
        mean[a] = alpha / alpha.sum(axis=-1, keepdims=True)
        g = np.where(alpha > 0, rng.gamma(np.where(alpha > 0, alpha, 1.0), size=(D,) + t.shape), 0.0)
        draws[a] = g / g.sum(axis=-1, keepdims=True)
    return mean, draws


def test_percentile_interval_levels():
    x = np.arange(1001, dtype=float)
    lo, hi = percentile_interval(x, 0.9)
    assert (lo, hi) == pytest.approx((50.0, 950.0), rel=1e-12)


def test_coverage_of_nominal_intervals():
    spec = tiny_spec(markets=1, not_sold=False)
    truth = compile_model(spec, tiny_tables(spec, seed=4), source="truth")
    true_v = Valuer.build(truth)
    target = true_v.acquisition(PROSPECT, "solo").value
    rng = np.random.default_rng(20261201)
    R, D = 30, 200
    hits90 = hits50 = 0
    for _ in range(R):
        mean, draws = posterior(truth.tables, rng, n_per_cell=150, D=D)
        v = Valuer.build(compile_model(spec, mean, draws=draws, source="fit"))
        lo, hi = v.acquisition(PROSPECT, "solo", level=0.9).interval
        hits90 += lo <= target <= hi
        lo, hi = v.acquisition(PROSPECT, "solo", level=0.5).interval
        hits50 += lo <= target <= hi
    # within binomial error: two-sided 0.1 % acceptance regions of Binomial(R, level)
    lo90, hi90 = binom.ppf(0.0005, R, 0.9), binom.ppf(0.9995, R, 0.9)
    lo50, hi50 = binom.ppf(0.0005, R, 0.5), binom.ppf(0.9995, R, 0.5)
    assert lo90 <= hits90 <= hi90, hits90
    assert lo50 <= hits50 <= hi50, hits50  # catches intervals that are too wide as well


def test_batched_gmres_draws_equal_separate_solves(monkeypatch):
    # lower the sparse and dense thresholds so the draws of this small model go through the
    # batched, preconditioned GMRES that large models use
    import stateworth.solver.sparse as sparse_mod
    import stateworth.valuation.batched as draws_mod
    monkeypatch.setattr(sparse_mod, "BLOCK_MAX", 0)
    monkeypatch.setattr(draws_mod, "DENSE_MAX", 10)
    spec = tiny_spec(markets=2, tenure=3)
    t = tiny_tables(spec, seed=2)
    model = compile_model(spec, t, draws=dirichlet_draws(t, 6, seed=5), source="mid")
    v = Valuer.build(model, tol=1e-10, chunk=4)  # 6 draws, vectorised 4 at a time
    assert v.has_intervals and v.n_draws == 6 and v.draw_stats["method"] == "gmres"
    for d in (0, 5):
        md = model.with_tables({a: model.draws[a][d] for a in model.draws})
        ref = solve(md, list(v.streams), method="dense").values
        got = v.draw_values(np.arange(model.n_states), "revenue")[d]
        np.testing.assert_allclose(got, ref[:, 0], rtol=1e-8)
    # 6 draws hold one draw in each tail of a 60 % interval, not of a 90 % one (2 / (1 - level)
    # draws are needed; docs/references.md: common practice, no source)
    a = v.contrast(PROSPECT, {**PROSPECT, "status": "solo"}, level=0.6)
    each = v.draw_values(np.array([v.index({**PROSPECT, "status": "solo"}), v.index(PROSPECT)]), "revenue")
    lo, hi = np.quantile(each[:, 0] - each[:, 1], [0.2, 0.8])
    assert a.interval == pytest.approx((lo, hi), rel=1e-12)
    # an acquisition lands in the mix each draw's own engagement table gives a joiner
    acq = v.acquisition(PROSPECT, "solo", level=0.6)
    eng = model.draws.get("engagement")
    lv = model.spec.axis_levels("engagement")
    per = []
    for d in range(v.n_draws):
        T = (eng[d] if eng is not None else model.tables["engagement"])[2, lv.index(PROSPECT["engagement"])]
        dst = np.array([v.index({**PROSPECT, "status": "solo", "engagement": e}) for e in lv])
        per.append(T @ v.draw_values(dst, "revenue")[d] - v.draw_values(np.array([v.index(PROSPECT)]), "revenue")[d, 0])
    assert acq.interval == pytest.approx(tuple(np.quantile(per, [0.2, 0.8])), rel=1e-10)
    with pytest.raises(QueryError) as ei:
        v.acquisition(PROSPECT, "solo", level=0.9)
    assert ei.value.field == "level" and "at least 20 posterior draws" in str(ei.value)
    assert v.draw_stats["preconditioned"]
    # horizon values of the draws: H applications of each draw's operator
    md = model.with_tables({a: model.draws[a][5] for a in model.draws})
    ref = solve(md, "revenue", horizon=6).values[v.index(PROSPECT), 0]
    assert v.draw_values(np.array([v.index(PROSPECT)]), "revenue", horizon=6)[5, 0] == pytest.approx(ref, rel=1e-12)


def test_draws_in_chunks_reuse_one_compile_and_pad_the_last_chunk(monkeypatch):
    # 5 draws in chunks of 2: three calls of one compiled computation, the last chunk padded
    # with its last draw; every draw equals its own dense solve (numpy LU on the explicit matrix)
    import stateworth.valuation.batched as draws_mod
    monkeypatch.setattr(draws_mod, "DENSE_MAX", 10)
    monkeypatch.setattr(draws_mod, "DRAW_CHUNK", 2)
    spec = tiny_spec(markets=2, tenure=3)
    t = tiny_tables(spec, seed=3)
    model = compile_model(spec, t, draws=dirichlet_draws(t, 5, seed=9), source="chunks")
    sol = solve(model, "revenue", tol=1e-11)
    tabs = {a: model.draws[a] for a in model.draws}
    rhs = draws_mod.draw_rewards(model, tabs, ["revenue"])
    x, stats = draws_mod.solve_draws(model, tabs, rhs, sol.values, tol=1e-10)
    assert stats["chunk"] == 2 and x.shape == (5, model.n_states, 1)
    x2, stats2 = draws_mod.solve_draws(model, tabs, rhs, sol.values, tol=1e-10)
    assert stats2["compile_seconds"] == 0.0  # the same shapes: the compiled computation is reused
    np.testing.assert_array_equal(x, x2)
    for d in range(5):
        md = model.with_tables({a: model.draws[a][d] for a in model.draws})
        ref = solve(md, "revenue", method="dense").values[:, 0]
        np.testing.assert_allclose(x[d, :, 0], ref, rtol=1e-8)
