"""Estimation: shrinkage, move rules, draws, and recovery of a simulated truth."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stateworth.errors import PanelError
from stateworth.rules import load_spec
from stateworth.estimation.estimate import empirical_bayes_strength, parent_mean, posterior, wilson_interval
from stateworth.estimation.fit import FitOptions, fit_panel
from stateworth.estimation.simulate import simulate_panel, write_simulation

SPEC = Path(__file__).parent / "data" / "mini_fitness.toml"


@pytest.fixture(scope="module")
def spec():
    return load_spec(SPEC)


@pytest.fixture(scope="module")
def sim_files(spec, tmp_path_factory):
    d = tmp_path_factory.mktemp("est")
    sim = simulate_panel(spec, 30000, 24, seed=5)
    p, m = write_simulation(sim, d / "panel.parquet")
    return sim, str(p), str(m), d


def test_parent_mean_and_mask():
    allowed = np.array([[[True, True, False]], [[True, True, True]]])  # (2 cells, 1, 3 next)
    counts = np.array([[[0.0, 0.0, 0.0]], [[2.0, 2.0, 4.0]]])
    m = parent_mean(counts, allowed)
    # cell 0 has no moves: its parent (pooled over the last given axis, size 1) is empty too, so
    # the root pool (all cells) masked to its allowed moves: 2/4, 2/4
    np.testing.assert_allclose(m[0, 0], [0.5, 0.5, 0.0])
    np.testing.assert_allclose(m[1, 0], [0.25, 0.25, 0.5])
    fit = posterior(counts, allowed, strength=4.0, n_draws=50, rng=np.random.default_rng(0))
    np.testing.assert_allclose(fit.table[1, 0], (counts[1, 0] + 4 * m[1, 0]) / 12)
    assert (fit.draws[..., 0, 0, 2] == 0).all() and np.allclose(fit.draws.sum(-1), 1)


def test_empirical_bayes_pools_alike_cells_and_separates_different_ones():
    rng = np.random.default_rng(0)
    allowed = np.ones((20, 2), dtype=bool)
    alike = np.stack([rng.multinomial(200, [0.3, 0.7]) for _ in range(20)]).astype(float)
    diff = np.stack([rng.multinomial(200, [p, 1 - p]) for p in np.linspace(0.05, 0.95, 20)]).astype(float)
    a1 = empirical_bayes_strength(alike, parent_mean(alike, allowed))
    a2 = empirical_bayes_strength(diff, parent_mean(diff, allowed))
    assert a1 > 100 * a2


def test_wilson_matches_statsmodels():
    from statsmodels.stats.proportion import proportion_confint

    k, n = np.array([0, 3, 17, 50]), np.array([10, 40, 60, 50])
    lo, hi = wilson_interval(k, n)
    # Reference: Wilson (1927) via statsmodels proportion_confint(method="wilson") (docs/references.md),
    # computed by the library.
    rlo, rhi = proportion_confint(k, n, alpha=0.10, method="wilson")
    np.testing.assert_allclose(lo, rlo, atol=1e-12)
    np.testing.assert_allclose(hi, rhi, atol=1e-12)


def test_transition_probabilities_within_posterior_intervals(spec, sim_files):
    sim, p, m, _ = sim_files
    res = fit_panel(spec, p, m, FitOptions(draws=200, seed=1))
    inside, total = 0, 0
    for axis, fit in res.fits.items():
        truth = sim.truth[axis]
        lo = np.quantile(fit.draws, 0.025, axis=0)
        hi = np.quantile(fit.draws, 0.975, axis=0)
        moves = fit.counts.sum(-1, keepdims=True)
        if axis == "status":  # never-member rows: moves are the at-risk never-members
            moves = np.broadcast_to(moves, truth.shape).copy()
            moves[:, 0] = 1e9
        sel = np.broadcast_to(moves >= 300, truth.shape) & (truth > 0) & (truth < 1)  # not degenerate rows
        ok = (truth >= lo - 1e-12) & (truth <= hi + 1e-12)
        inside += int(ok[sel].sum())
        total += int(sel.sum())
    assert total > 30
    assert inside / total >= 0.85  # nominal 95 %; shrinkage to the parent costs a little coverage
    # the never-member join rows (from the market sizes) cover the truth
    st = res.fits["status"]
    lo, hi = np.quantile(st.draws[:, :, 0], [0.005, 0.995], axis=0)
    t = sim.truth["status"][:, 0]
    assert ((t >= lo) & (t <= hi))[..., [0, 2, 3]].all()


def test_forbidden_move_error_and_drop(spec, sim_files, tmp_path):
    sim, p, m, _ = sim_files
    df = pd.read_parquet(p)
    df["period"] = df["period"].astype(str)
    acc = df[(df["market"] == "south")].groupby("account")["period"].count()
    a = acc[acc >= 3].index[0]
    i = df.index[df["account"] == a][1]
    df.loc[i, "status"] = "plus"  # plus is not sold in south
    bad = tmp_path / "forbidden.csv"
    df.to_csv(bad, index=False)
    with pytest.raises(PanelError) as ei:
        fit_panel(spec, str(bad), m, FitOptions(draws=0))
    msg = str(ei.value)
    assert "forbidden.csv: row" in msg and "column status" in msg and "forbidden" in msg
    row = int(msg.split("row ")[1].split(" ")[0])  # "row R (line R + 1), column ..."
    assert df.iloc[row - 1]["account"] == a  # the example row is one of the changed moves
    res = fit_panel(spec, str(bad), m, FitOptions(draws=0, forbidden="drop"))
    assert res.diagnostics["forbidden_dropped"] >= 1
    assert (res.model.tables["status"][1, :, :, 3] == 0).all()
