"""`fit --population`: never-members placed in propensity bands by a sample of the addressable
population, the join hazard estimated per market and band; bad samples refused with one line."""

from __future__ import annotations

import tomllib

import numpy as np
import pandas as pd
import pytest

from stateworth.clients.cli import main
from stateworth.errors import PanelError
from stateworth.estimation.diagnostics import summary_text
from stateworth.estimation.fit import FitOptions, fit_panel
from stateworth.estimation.population import MIN_ROWS_PER_BAND
from stateworth.estimation.simulate import population_path_for, simulate_panel, write_simulation, write_table
from stateworth.rules import compile_model, parse_spec
from stateworth.valuation import Valuer

# Invented: a trait held by 15 % of people (band b1) makes joining five times as likely (5 % a
# month against 1 %), cuts churn from 9 % to 3 % a month and makes former members come back
# more often. A categorical covariate reports the trait in classes, so the fitted score's
# bands are the trait's levels.
SPEC = """
[model]
name = "joins-by-band"
discount = { annual_rate = 0.10 }

[axes.market]
kind = "fixed"
levels = ["north", "south"]

[axes.status]
kind = "status"
levels = ["prospect", "lapsed", "basic"]
members = ["basic"]
given = ["market", "status", "band"]
[[axes.status.table]]
when = { status = "prospect", band = "b0" }
probs = { prospect = 0.99, basic = 0.01 }
[[axes.status.table]]
when = { status = "prospect", band = "b1" }
probs = { prospect = 0.95, basic = 0.05 }
[[axes.status.table]]
when = { status = "lapsed", band = "b0" }
probs = { lapsed = 0.97, basic = 0.03 }
[[axes.status.table]]
when = { status = "lapsed", band = "b1" }
probs = { lapsed = 0.90, basic = 0.10 }
[[axes.status.table]]
when = { status = "basic", band = "b0" }
probs = { lapsed = 0.09, basic = 0.91 }
[[axes.status.table]]
when = { status = "basic", band = "b1" }
probs = { lapsed = 0.03, basic = 0.97 }

[axes.band]
kind = "chance"
levels = ["b0", "b1"]
given = ["band"]
propensity = { covariates = ["segment"], categorical = ["segment"] }
[[axes.band.table]]
when = { band = "b0" }
probs = { b0 = 1.0 }
[[axes.band.table]]
when = { band = "b1" }
probs = { b1 = 1.0 }

[rewards.revenue]
price = { basic = 20.0 }
"""


@pytest.fixture(scope="module")
def spec():
    return parse_spec(tomllib.loads(SPEC))


@pytest.fixture(scope="module")
def files(spec, tmp_path_factory):
    d = tmp_path_factory.mktemp("pop")
    sim = simulate_panel(spec, 20000, 24, seed=4, sample=2000, band_shares=[0.85, 0.15])
    p, m = write_simulation(sim, d / "panel.parquet")
    return sim, str(p), str(m), str(population_path_for(p)), d


def _acq(v: Valuer, market: str, band: str):
    return v.acquisition({"market": market, "status": "prospect", "band": band}, "basic")


def test_simulated_sample_is_a_survey_of_everyone(files):
    sim, p, m, pop, _ = files
    df = pd.read_csv(pop)
    assert list(df.columns) == ["market", "segment"] and len(df) == 2000
    # about 15 % of people hold the trait (classes high/top), members and never-members alike
    share = df["segment"].isin(["high", "top"]).mean()
    assert 0.12 < share < 0.18


def test_acquisition_by_band_recovered_with_population_and_missed_without(spec, files):
    sim, p, m, pop, _ = files
    truth = Valuer.build(compile_model(spec))
    with_pop = fit_panel(spec, p, m, FitOptions(draws=100, seed=2), population=pop)
    without = fit_panel(spec, p, m, FitOptions(draws=100, seed=2))
    v1, v0 = Valuer.build(with_pop.model), Valuer.build(without.model)
    for market in ("north", "south"):
        for band in ("b0", "b1"):
            # the true acquisition value: V(basic) - V(prospect) solved on the spec's own tables
            t = _acq(truth, market, band).value
            lo, hi = _acq(v1, market, band).interval
            assert lo <= t <= hi, (market, band, t, lo, hi)
            lo0, hi0 = _acq(v0, market, band).interval
            assert not (lo0 <= t <= hi0), (market, band, t, lo0, hi0)
            assert abs(_acq(v0, market, band).value - t) > 0.15 * t  # visibly off, not just narrowly
    j = with_pop.diagnostics["joins"]
    bb = j["by_band"]
    assert bb["shares"]["north"]["b1"] == pytest.approx(0.15, abs=0.04)
    # the hazard the model uses in each band, from its own never-member rows
    tab = with_pop.model.tables["status"]  # (market, status, band, next status)
    for mi, mk in enumerate(("north", "south")):
        for bi, b in enumerate(("b0", "b1")):
            assert bb["hazard"][mk][b] == pytest.approx(1 - tab[mi, 0, bi, 0], rel=1e-9)
    assert bb["hazard"]["north"]["b1"] == pytest.approx(0.05, rel=0.25)
    assert bb["hazard"]["north"]["b0"] == pytest.approx(0.01, rel=0.25)
    text = summary_text(with_pop.diagnostics)
    assert "population sample" in text and "does not depend" not in text
    # without a sample, fit says plainly what per-band acquisition values assume
    assert "does not depend on the propensity band" in summary_text(without.diagnostics)


@pytest.mark.parametrize("case", ["missing", "market", "unsized", "negative", "nan", "text", "few", "shares"])
def test_bad_population_is_one_line_naming_file_row_or_column(files, tmp_path, capsys, case):
    sim, p, m, pop, d = files
    df = pd.read_csv(pop)
    if case == "missing":
        df = df.drop(columns=["segment"])
        expect = ["bad.csv", "missing column(s) segment"]
    elif case == "market":
        df.loc[3, "market"] = "east"
        expect = ["bad.csv: row 4, column market", "'east' is not a level"]  # data rows count from 1
    elif case == "unsized":
        # a panel and a size table of north only; the sample also surveys south
        panel = pd.read_parquet(p)
        panel[panel["market"].astype(str) == "north"].to_parquet(tmp_path / "north.parquet")
        p = str(tmp_path / "north.parquet")
        mk = pd.read_csv(m)
        mk[mk["market"] == "north"].to_csv(tmp_path / "north.markets.csv", index=False)
        m = str(tmp_path / "north.markets.csv")
        row = int(np.argmax(df["market"] == "south")) + 1
        expect = [f"bad.csv: row {row}, column market", "'south' has no row in the market-size table"]
    elif case == "negative":
        df["weight"] = 1.0
        df.loc[5, "weight"] = -2.0
        expect = ["bad.csv: row 6, column weight", "'-2.0' must be a finite number >= 0"]
    elif case == "nan":
        df["weight"] = 1.0
        df.loc[7, "weight"] = np.nan
        expect = ["bad.csv: row 8, column weight", "must be a finite number >= 0"]
    elif case == "text":
        df = df.assign(segment=df["segment"].astype(object))
        df.loc[9, "segment"] = "twelve"
        expect = ["bad.csv: row 10, column segment", "'twelve' is not a value the panel shows"]
    elif case == "few":
        df = pd.concat([df[df["market"] == "north"].head(2 * MIN_ROWS_PER_BAND - 1), df[df["market"] == "south"]])
        expect = ["bad.csv, column market", f"'north' has {2 * MIN_ROWS_PER_BAND - 1} row(s)",
                  f"at least {2 * MIN_ROWS_PER_BAND} ({MIN_ROWS_PER_BAND} per band level of band)"]
    else:  # almost no one in north holds the trait: fewer b1 never-members than the panel tracks
        north, b1 = df["market"] == "north", df["segment"].isin(["high", "top"])
        df = pd.concat([df[~(north & b1)], df[north & b1].head(3)])
        expect = ["bad.csv: column market", "market 'north', band b1", "fewer than the"]
    bad = tmp_path / "bad.csv"
    df.to_csv(bad, index=False)
    out = tmp_path / "model"
    rc = main(["fit", _spec_file(tmp_path), "--panel", p, "--markets", m, "--population", str(bad), "-o", str(out),
               "--draws", "0", "--quiet"])
    err = capsys.readouterr().err.strip()
    assert rc == 1, err
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    for e in expect:
        assert e in err, (e, err)
    assert not out.exists()


def _spec_file(tmp_path) -> str:
    path = tmp_path / "joins_by_band.toml"
    path.write_text(SPEC)
    return str(path)


def test_population_needs_a_band_the_status_factor_is_given(files, tmp_path):
    sim, p, m, pop, _ = files
    d = tomllib.loads(SPEC)
    d["axes"]["status"]["given"] = ["market", "status"]
    d["axes"]["status"]["table"] = [{k: v for k, v in r.items()} for r in d["axes"]["status"]["table"]]
    for r in d["axes"]["status"]["table"]:
        r["when"] = {k: v for k, v in r["when"].items() if k != "band"}
    spec = parse_spec(d)
    with pytest.raises(PanelError) as ei:
        fit_panel(spec, p, m, FitOptions(draws=0), population=pop)
    assert ei.value.where == "--population" and "band" in ei.value.message


def test_weights_shift_the_band_mix(spec, files, tmp_path):
    sim, p, m, pop, _ = files
    df = pd.read_csv(pop)
    df["weight"] = np.where(df["segment"].isin(["high", "top"]), 1.5, 1.0)
    path = tmp_path / "weighted.parquet"
    write_table(__import__("pyarrow").Table.from_pandas(df, preserve_index=False), path)
    res = fit_panel(spec, p, m, FitOptions(draws=0), population=str(path))
    raw = pd.read_csv(pop)
    n1 = raw[raw["market"] == "north"]["segment"].isin(["high", "top"]).sum()
    n = (raw["market"] == "north").sum()
    # weighted share: trait holders count 1.5 times (computed by hand from the sample's rows)
    want = 1.5 * n1 / (1.5 * n1 + (n - n1))
    assert res.diagnostics["joins"]["by_band"]["shares"]["north"]["b1"] == pytest.approx(want, rel=1e-12)
