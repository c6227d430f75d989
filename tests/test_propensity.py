"""Propensity score: Newton/IRLS logistic fit against statsmodels, bands, balance, spec key."""

from __future__ import annotations

import numpy as np
import pytest

from stateworth.errors import SpecError
from stateworth.rules import parse_spec
from stateworth.estimation.propensity import band_cuts, band_of, fit_logit, smd, smd_by_band


def test_logit_matches_statsmodels():
    import statsmodels.api as sm

    rng = np.random.default_rng(7)
    x = np.column_stack([rng.normal(40, 10, 3000), rng.exponential(5, 3000)])
    eta = -1.0 + 0.03 * x[:, 0] - 0.2 * x[:, 1]
    y = (rng.random(3000) < 1 / (1 + np.exp(-eta))).astype(float)
    fit = fit_logit(x, y, ("age", "distance_km"))
    # Reference: statsmodels.api.Logit (docs/references.md, "general-purpose reference libraries"),
    # computed here by the library on the same data.
    ref = sm.Logit(y, sm.add_constant(x)).fit(disp=0)
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(fit.se, ref.bse, rtol=1e-6)
    np.testing.assert_allclose(1 / (1 + np.exp(-fit.eta(x))), ref.predict(sm.add_constant(x)), rtol=1e-8)
    assert fit.converged


def test_band_cuts_split_evenly():
    eta = np.random.default_rng(1).normal(size=1001)
    cuts = band_cuts(eta, 4)
    counts = np.bincount(band_of(eta, cuts), minlength=4)
    assert counts.max() - counts.min() <= 1
    assert not np.isin(eta, cuts).any()



def test_band_cuts_skip_tied_scores():
    # discrete covariates give tied scores; a cut on a tied score would put those rows in one
    # band or the other depending on the last bit of each engine's arithmetic
    eta = np.repeat([0.0, 1.0, 2.0, 3.0], [10, 25, 5, 60])
    cuts = band_cuts(eta, 4)
    assert not np.isin(eta, cuts).any()
    # quantile positions 25, 50, 75 fall on ties of 1, 3, 3: the gaps above 1, then below 3
    # (nothing lies above 3), and the same gap again (an empty band rather than a cut on a score)
    np.testing.assert_array_equal(cuts, [1.5, 2.5, 2.5])
    # a band that cannot be separated: only the distinct gaps exist, and no cut sits on a score
    cuts = band_cuts(np.repeat([0.0, 1.0], [50, 50]), 4)
    assert not np.isin([0.0, 1.0], cuts).any()

def test_smd_formula():
    x = np.array([[1.0], [2.0], [3.0], [2.0], [3.0], [4.0]])
    member = np.array([0, 0, 0, 1, 1, 1])
    # (mean1 - mean0) / sqrt((var1 + var0) / 2) = (3 - 2) / 1; common practice, no source
    assert smd(x, member)[0] == pytest.approx(1.0)
    by = smd_by_band(x, member, np.array([0, 0, 0, 1, 1, 1]), 2)
    assert np.isnan(by).all()  # each band has only one group


BASE = {
    "model": {"name": "t", "discount": {"annual_rate": 0.1}},
    "axes": {
        "market": {"kind": "fixed", "levels": ["a", "b"]},
        "status": {"kind": "status", "levels": ["prospect", "lapsed", "basic"], "members": ["basic"],
                   "given": ["market", "status", "band"]},
        "band": {"kind": "chance", "levels": ["b0", "b1"], "given": ["band"],
                 "propensity": {"covariates": ["age"]}},
    },
}


def test_spec_key_validation():
    spec = parse_spec(BASE)
    assert spec.axes["band"].propensity.covariates == ["age"]
    bad = {**BASE, "axes": {**BASE["axes"], "market": {"kind": "fixed", "levels": ["a", "b"],
                                                        "propensity": {"covariates": ["age"]}}}}
    with pytest.raises(SpecError, match="axes.market.propensity: not used by a fixed axis"):
        parse_spec(bad)
    clash = {**BASE, "axes": {**BASE["axes"], "band": {**BASE["axes"]["band"], "propensity": {"covariates": ["market"]}}}}
    with pytest.raises(SpecError, match="propensity.covariates"):
        parse_spec(clash)


# --- categorical covariates -------------------------------------------------------------------

def _cat_spec() -> str:
    from test_simulate import BAND_SPEC

    old = 'propensity = { covariates = ["age", "distance_km"] }'
    assert old in BAND_SPEC
    return BAND_SPEC.replace(old, 'propensity = { covariates = ["age", "channel"], categorical = ["channel"] }')


def test_categorical_covariate_fit_matches_statsmodels(tmp_path):
    import tomllib

    import pandas as pd
    import statsmodels.api as sm

    from stateworth.estimation.fit import FitOptions, fit_panel
    from stateworth.estimation.simulate import CATEGORY_NAMES, simulate_panel, write_simulation

    spec = parse_spec(tomllib.loads(_cat_spec()))
    sim = simulate_panel(spec, 3000, 10, seed=2)
    p, m = write_simulation(sim, tmp_path / "p.parquet")
    res = fit_panel(spec, str(p), str(m), FitOptions(draws=0))
    prop = res.diagnostics["propensity"]
    ref_levels = sorted(CATEGORY_NAMES)
    assert prop["levels"] == {"channel": ref_levels}
    assert prop["terms"] == ["age"] + [f"channel={v}" for v in ref_levels[1:]]
    assert len(prop["smd_by_band"][0]) == len(prop["terms"])
    # Reference: statsmodels.api.Logit (docs/references.md, general-purpose reference libraries) on the
    # same panel rows with indicator columns for channel against its first sorted value, computed
    # here by the library.
    df = sim.panel.to_pandas()
    y = (df["status"].astype(str) == "basic").astype(float).to_numpy()
    ch = df["channel"].astype(str)
    X = pd.DataFrame({"age": df["age"].astype(float)})
    for v in ref_levels[1:]:
        X[f"channel={v}"] = (ch == v).astype(float)
    ref = sm.Logit(y, sm.add_constant(X.to_numpy())).fit(disp=0)
    np.testing.assert_allclose(prop["coef"], ref.params, rtol=1e-6, atol=1e-8)
    assert res.model.metadata["propensity"]["terms"] == prop["terms"]


def test_band_sql_equals_numpy_bands_with_categorical_terms():
    import duckdb

    from stateworth.estimation.propensity import Design, LogitFit, band_sql

    rng = np.random.default_rng(3)
    v = np.column_stack([rng.normal(size=500), rng.integers(0, 3, 500)])
    design = Design.of(("age", "plan"), {"plan": ["a", "b", "c"]})
    assert design.names == ("age", "plan=b", "plan=c")
    x = design.matrix(v)
    fit = LogitFit(design.names, np.array([0.2, 1.1, -0.7, 0.4]), np.ones(4), 3, True)
    eta = fit.eta(x)
    cuts = band_cuts(eta, 3)
    con = duckdb.connect()
    con.execute("CREATE TABLE t (i INTEGER, v0 DOUBLE, v1 INTEGER)")
    con.executemany("INSERT INTO t VALUES (?, ?, ?)", [(i, float(a), int(b)) for i, (a, b) in enumerate(v)])
    got = con.execute(f"SELECT {band_sql(fit, design.sql(['v0', 'v1']), cuts, null_col='v0')} FROM t ORDER BY i").fetchnumpy()
    np.testing.assert_array_equal(next(iter(got.values())), band_of(eta, cuts))


def test_categorical_key_and_panel_errors(tmp_path):
    import tomllib

    import pandas as pd

    from stateworth.errors import PanelError
    from stateworth.estimation.panel import MAX_CATEGORIES, load_panel
    from stateworth.estimation.simulate import simulate_panel, write_simulation

    d = tomllib.loads(_cat_spec())
    bad = tomllib.loads(_cat_spec())
    bad["axes"]["band"]["propensity"]["categorical"] = ["region"]
    with pytest.raises(SpecError, match=r"axes.band.propensity.categorical: 'region' is not in covariates"):
        parse_spec(bad)
    spec = parse_spec(d)
    sim = simulate_panel(spec, 300, 4, seed=1)
    p, _ = write_simulation(sim, tmp_path / "p.csv")
    df = pd.read_csv(p, dtype=str)
    df.loc[4, "channel"] = ""
    df.to_csv(tmp_path / "empty.csv", index=False)
    with pytest.raises(PanelError, match=r"row 5 \(line 6\), column channel: empty value; a categorical covariate"):
        load_panel(spec, str(tmp_path / "empty.csv"))
    df = pd.read_csv(p, dtype=str)
    df["channel"] = [f"c{i % (MAX_CATEGORIES + 1)}" for i in range(len(df))]
    df.to_csv(tmp_path / "many.csv", index=False)
    with pytest.raises(PanelError, match=rf"column channel: the categorical covariate has more than {MAX_CATEGORIES}"):
        load_panel(spec, str(tmp_path / "many.csv"))
