"""Estimation: shrinkage, move rules, draws, and recovery of a simulated truth."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stateworth.errors import PanelError
from stateworth.rules import load_spec
from stateworth.estimation.estimate import pool_counts, pooling_order, posterior, wilson_interval
from stateworth.estimation.diagnostics import summary_text
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


def test_posterior_mean_is_the_hierarchical_formula_and_respects_the_mask():
    # one given axis of 2 cells, 3 next levels; cell 0 may not make move 2
    allowed = np.array([[True, True, False], [True, True, True]])
    counts = np.array([[3.0, 1.0, 0.0], [2.0, 2.0, 4.0]])
    fit = posterior(counts, allowed, strength=4.0, n_draws=50, rng=np.random.default_rng(0))
    # by hand (MacKay & Peto 1995's smoothing, docs/references.md; computed from the formula):
    # the top level pools both cells; cell 0 shows the pool truncated to moves 0 and 1, so its
    # moves are completed by EM (pool_counts) before pooling: the pooled distribution p solves
    # p = normalise(C_1 + C_0 + 4 p_2 / (p_0 + p_1) * [0, 0, p_2]) ... checked against scipy below;
    # then theta_top = (P + 4 / 3) / (|P| + 4) and theta_c = (C_c + 4 m_c) / (n_c + 4) with m_c the
    # top's theta restricted to the cell's moves.
    P, _, _ = pool_counts(counts, allowed, 0)
    top = (P[0] + 4 / 3) / (P[0].sum() + 4)
    for c in range(2):
        m = np.where(allowed[c], top, 0.0)
        m /= m.sum()
        np.testing.assert_allclose(fit.table[c], (counts[c] + 4 * m) / (counts[c].sum() + 4), rtol=1e-12)
    assert (fit.draws[:, 0, 2] == 0).all() and np.allclose(fit.draws.sum(-1), 1)


def test_pool_counts_is_the_maximum_likelihood_parent_under_truncation():
    # cells that may not make some moves see the parent renormalised over the moves they may
    # make (Luce's choice model with varying choice sets); the EM pooling's fixed point is its
    # maximum likelihood estimate (Hunter 2004, docs/references.md), here found by scipy instead
    from scipy.optimize import minimize

    rng = np.random.default_rng(3)
    allowed = np.array([[True, True, True, True], [True, True, False, True], [True, False, True, False]])
    truth = np.array([0.4, 0.3, 0.2, 0.1])
    counts = np.zeros((3, 4))
    for c in range(3):
        p = np.where(allowed[c], truth, 0.0)
        counts[c] = rng.multinomial(400, p / p.sum())
    P, A, _ = pool_counts(counts, allowed, 0)
    got = P[0] / P[0].sum()

    def nll(z):
        th = np.exp(z - z.max())
        return -sum((counts[c][allowed[c]] * np.log(th[allowed[c]] / th[allowed[c]].sum())).sum() for c in range(3))

    ref = minimize(nll, np.zeros(4), method="BFGS", options={"gtol": 1e-10}).x
    ref = np.exp(ref - ref.max())
    np.testing.assert_allclose(got, ref / ref.sum(), atol=1e-6)
    assert A[0].all()
    # plain sums would understate the moves some cells may not make
    plain = counts.sum(axis=0) / counts.sum()
    assert plain[2] < got[2] - 0.01


def test_pooling_order_prefers_the_axis_moves_do_not_depend_on():
    # axis 0 (six "months") does not matter, axis 1 (four "bands") does: pool axis 0 first
    rng = np.random.default_rng(1)
    th = rng.dirichlet([6.0, 3.0, 1.0], size=4)
    counts = np.stack([[rng.multinomial(20, th[b]) for b in range(4)] for _ in range(6)]).astype(float)
    allowed = np.ones_like(counts, dtype=bool)
    assert pooling_order(counts, allowed) == (0, 1)
    assert pooling_order(counts.transpose(1, 0, 2).copy(), allowed.transpose(1, 0, 2)) == (1, 0)
    fit = posterior(counts, allowed, n_draws=0)
    # the months are pooled far beyond each cell's 20 moves, and harder than the bands
    assert fit.strengths[0] > 5 * 20 and fit.strengths[0] > fit.strengths[1]


def test_empirical_bayes_pools_alike_cells_and_separates_different_ones():
    rng = np.random.default_rng(0)
    allowed = np.ones((20, 2), dtype=bool)
    alike = np.stack([rng.multinomial(200, [0.3, 0.7]) for _ in range(20)]).astype(float)
    diff = np.stack([rng.multinomial(200, [p, 1 - p]) for p in np.linspace(0.05, 0.95, 20)]).astype(float)
    a1 = posterior(alike, allowed).strength
    a2 = posterior(diff, allowed).strength
    assert a1 > 100 * a2


def _calibration(rng_seed: int, repeats: int = 30) -> float:
    """Share of 90 % intervals covering the truth when cells are drawn from a hierarchical
    Dirichlet (the truth drawn from the model's own prior): Cook, Gelman & Rubin (2006)'s check
    that posterior intervals are calibrated (docs/references.md)."""
    rng = np.random.default_rng(rng_seed)
    hits = total = 0
    for r in range(repeats):
        th = rng.dirichlet(30 * np.array([0.6, 0.3, 0.1]), size=20)  # 20 "bands", strength 30
        truth = np.broadcast_to(th[None], (6, 20, 3))  # six "months" that do not matter
        n = rng.poisson(8, size=(6, 20))
        counts = np.stack([[rng.multinomial(n[i, j], th[j]) for j in range(20)] for i in range(6)]).astype(float)
        fit = posterior(counts, np.ones_like(counts, dtype=bool), "auto", 200, np.random.default_rng(r))
        lo, hi = np.quantile(fit.draws[:, 0], [0.05, 0.95], axis=0)
        hits += int(((truth[0] >= lo) & (truth[0] <= hi)).sum())
        total += truth[0].size
    return hits / total


def test_hierarchical_intervals_are_calibrated_and_declaration_order_is_not(monkeypatch):
    cover = _calibration(7)
    se = np.sqrt(0.9 * 0.1 / (30 * 60))  # 1,800 entries; the 20 bands of a repeat are independent draws
    # each parent's strength leans on the level's and on alpha^(-1/2): a little conservative (0.95 here)
    assert 0.9 - 4 * se <= cover <= 0.96, cover
    # the same check with the parent fixed to the declared order (pool the bands first, as the
    # last given axis): sparse cells are pulled towards the wrong parent and the intervals miss
    import stateworth.estimation.estimate as est

    monkeypatch.setattr(est, "pooling_order", lambda c, a, s="auto", g=None: tuple(range(c.ndim - 2, -1, -1)))
    assert _calibration(7) < 0.9 - 4 * se


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


def test_join_rates_reported_as_the_model_uses_them(spec, sim_files):
    sim, p, m, _ = sim_files
    res = fit_panel(spec, p, m, FitOptions(draws=0))
    j = res.diagnostics["joins"]
    # raw rate recomputed from the panel with pandas: first joins after the first month over
    # never-members at risk (size - accounts seen so far), summed over the months
    df = pd.read_parquet(p)
    df["period"] = df["period"].astype(str)
    first = df.sort_values("period").groupby("account").first()
    months = sorted(df["period"].unique())
    sizes = pd.read_csv(m).set_index("market")["size"]
    tab = res.model.tables["status"]  # (market, status, engagement, next status)
    for mi, mk in enumerate(["north", "south"]):
        f = first[first["market"].astype(str) == mk]["period"].value_counts()
        tracked = np.cumsum([f.get(t, 0) for t in months])
        joins = sum(f.get(t, 0) for t in months[1:])
        at_risk = sum(sizes[mk] - tracked[:-1])
        assert j["hazard_raw"][mk] == pytest.approx(joins / at_risk, rel=1e-12)
        # the used rate is the one in the model's never-member rows (no cycle axis: one row per market)
        assert j["hazard"][mk] == pytest.approx(1 - tab[mi, 0, 0, 0], rel=1e-12)
        assert j["hazard"][mk] != j["hazard_raw"][mk]  # shrunk, however little
    text = summary_text(res.diagnostics)
    assert f"north: raw {j['hazard_raw']['north']:.5f}, used {j['hazard']['north']:.5f}" in text
    assert "pooled over" in text and "alpha by pooled axis" in text


def test_join_rates_shrink_towards_the_pooled_rate_with_small_markets(tmp_path):
    # two markets of 100 people, 10 and 40 first joins over one month: the raw rates 0.1 and
    # 0.4 are pulled towards the pooled 0.25, and the diagnostics report what is used
    from stateworth.rules import parse_spec

    spec = parse_spec({"model": {"name": "two-markets", "discount": {"annual_rate": 0.1}},
                       "axes": {"market": {"kind": "fixed", "levels": ["a", "b"]},
                                "status": {"kind": "status", "levels": ["prospect", "lapsed", "member"],
                                           "members": ["member"], "given": ["market", "status"]}},
                       "rewards": {"revenue": {"price": {"member": 10.0}}}})
    rows = []
    for mk, joins in (("a", 10), ("b", 40)):
        # one account present from the first month (tracked, not a join), then the joins
        rows += [{"account": f"{mk}0", "period": "2024-01", "market": mk, "status": "member"},
                 {"account": f"{mk}0", "period": "2024-02", "market": mk, "status": "member"}]
        rows += [{"account": f"{mk}{i}", "period": "2024-02", "market": mk, "status": "member"}
                 for i in range(1, joins + 1)]
    pd.DataFrame(rows).to_csv(tmp_path / "p.csv", index=False)
    pd.DataFrame({"market": ["a", "b"], "size": [101, 101], "low": [101, 101],
                  "high": [120, 120]}).to_csv(tmp_path / "m.csv", index=False)
    res = fit_panel(spec, str(tmp_path / "p.csv"), str(tmp_path / "m.csv"), FitOptions(draws=0))
    j = res.diagnostics["joins"]
    assert j["hazard_raw"] == pytest.approx({"a": 0.1, "b": 0.4})
    tab = res.model.tables["status"]
    assert j["hazard"]["a"] == pytest.approx(1 - tab[0, 0, 0], rel=1e-12)
    assert 0.1 < j["hazard"]["a"] < j["hazard"]["b"] < 0.4  # shrunk towards the pooled rate
    assert j["pooling"] == ["market"] and j["strengths"][0] > 0
