"""The simulator, and recovery of an acquisition value with a confounder the propensity band
measures; the naive fit that ignores the confounder misses it."""

from __future__ import annotations

import tomllib

import numpy as np
import pytest

from stateworth.rules import compile_model, parse_spec
from stateworth.estimation.fit import FitOptions, fit_panel
from stateworth.estimation.simulate import simulate_panel, write_simulation
from stateworth.solver import solve

# Invented: one plan; band "b0" members lapse often and rarely come back, band "b1" stay. The
# band index rises with the propensity to be a member, as the fit orders bands by score.
BAND_SPEC = """
[model]
name = "band-demo"
discount = { annual_rate = 0.10 }

[axes.market]
kind = "fixed"
levels = ["north", "south"]

[axes.status]
kind = "status"
levels = ["prospect", "lapsed", "basic"]
members = ["basic"]
given = ["market", "status", "band"]
moves.prospect = ["prospect", "basic"]
[[axes.status.table]]
when = { status = "prospect" }
probs = { prospect = 0.97, basic = 0.03 }
[[axes.status.table]]
when = { status = "lapsed", band = "b0" }
probs = { lapsed = 0.97, basic = 0.03 }
[[axes.status.table]]
when = { status = "lapsed", band = "b1" }
probs = { lapsed = 0.90, basic = 0.10 }
[[axes.status.table]]
when = { status = "basic", band = "b0" }
probs = { lapsed = 0.25, basic = 0.75 }
[[axes.status.table]]
when = { status = "basic", band = "b1" }
probs = { lapsed = 0.03, basic = 0.97 }

[axes.band]
kind = "chance"
levels = ["b0", "b1"]
given = ["band"]
propensity = { covariates = ["age", "distance_km"] }
[[axes.band.table]]
when = { band = "b0" }
probs = { b0 = 1.0 }
[[axes.band.table]]
when = { band = "b1" }
probs = { b1 = 1.0 }

[rewards.revenue]
price = { basic = 20.0 }
"""


def _naive(data: dict) -> dict:
    d = tomllib.loads(BAND_SPEC)
    del d["axes"]["band"]
    st = d["axes"]["status"]
    st["given"] = ["market", "status"]
    st["table"] = [{k: v for k, v in row.items()} for row in st["table"]]
    for row in st["table"]:
        row["when"].pop("band", None)
    return d


@pytest.fixture(scope="module")
def band(tmp_path_factory):
    spec = parse_spec(tomllib.loads(BAND_SPEC))
    sim = simulate_panel(spec, 20000, 30, seed=4)
    d = tmp_path_factory.mktemp("band")
    p, m = write_simulation(sim, d / "panel.parquet")
    return spec, sim, str(p), str(m)


def test_panel_shape(band):
    spec, sim, _, _ = band
    df = sim.panel.to_pandas()
    assert "prospect" not in set(df["status"].astype(str))  # never-members never appear
    assert {"lapsed", "basic"} <= set(df["status"].astype(str))
    # former members stay: an account's rows run without gaps to the last period
    last = df.groupby("account")["period"].agg(lambda s: s.astype(str).max())
    assert (last == df["period"].astype(str).max()).all()
    mk = sim.markets.to_pandas()
    assert (mk["low"] <= mk["size"]).all() and (mk["size"] <= mk["high"]).all()
    assert mk["size"].sum() == 20000
    again = simulate_panel(spec, 20000, 30, seed=4)
    assert again.panel.equals(sim.panel)


def _acq(model, market: str, band: str | None, draws: bool = False):
    """V(basic) - V(prospect) by solve(), for the point model and optionally every draw."""
    def one(m):
        v = solve(m, "revenue").value("revenue")
        c = {"market": market, **({"band": band} if band else {})}
        return v[m.grid.flat_index({**c, "status": "basic"})] - v[m.grid.flat_index({**c, "status": "prospect"})]

    point = one(model)
    if not draws:
        return point
    D = next(iter(model.draws.values())).shape[0]
    vals = [one(model.with_tables({a: t[i] for a, t in model.draws.items()})) for i in range(D)]
    return point, np.array(vals)


def test_acquisition_recovered_and_naive_misses(band):
    spec, sim, p, m = band
    truth = compile_model(spec)
    res = fit_panel(spec, p, m, FitOptions(draws=30, seed=2))
    prop = res.diagnostics["propensity"]
    assert prop["coef"][1] > 0 and prop["coef"][2] < 0  # the covariates' signs as simulated
    naive_spec = parse_spec(_naive({}))
    naive = fit_panel(naive_spec, p, m, FitOptions(draws=0)).model
    for b in ("b0", "b1"):
        t = _acq(truth, "north", b)
        point, vals = _acq(res.model, "north", b, draws=True)
        lo, hi = np.quantile(vals, [0.025, 0.975])
        assert lo <= t <= hi, (b, t, lo, hi)
        # the naive model has one figure for both bands; it lies outside each band's interval
        nv = _acq(naive, "north", None)
        assert not (lo <= nv <= hi), (b, nv, lo, hi)
    # within bands the covariates are balanced far better than overall
    smd = np.array(prop["smd_by_band"], dtype=float)
    assert np.nanmax(np.abs(smd)) < 0.5
