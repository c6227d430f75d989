"""`stateworth simulate` and `stateworth fit` end to end through the command line."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from stateworth.clients.cli import main
from stateworth.rules import load_model, model_files

SPEC = str(Path(__file__).parent / "data" / "mini_fitness.toml")


def test_simulate_then_fit(tmp_path, capsys):
    panel = tmp_path / "panel.parquet"
    assert main(["simulate", SPEC, "--accounts", "1500", "--periods", "10", "--seed", "2", "-o", str(panel)]) == 0
    markets = tmp_path / "panel.markets.csv"
    assert panel.is_file() and markets.is_file()
    out = tmp_path / "model"
    assert main(["fit", SPEC, "--panel", str(panel), "--markets", str(markets), "-o", str(out), "--draws", "20"]) == 0
    text = capsys.readouterr().out
    assert "join hazard" in text and "raw" in text and "used" in text and "not accounting figures" in text
    model, extra = load_model(out)
    assert model.draws["status"].shape[0] == 20
    assert {"sensitivity.size_low.table.status", "sensitivity.size_high.table.status"} <= set(extra)
    files = model_files(out)  # the current version's folder: out/versions/<version>-<stamp>
    assert files.parent.name == "versions" and files.name.startswith(model.version)
    diag = json.loads((files / "diagnostics.json").read_text())
    assert diag["version"] == model.version and (files / "diagnostics.txt").is_file()
    # the same inputs give the same model (content hash)
    out2 = tmp_path / "model2"
    assert main(["fit", SPEC, "--panel", str(panel), "--markets", str(markets), "-o", str(out2), "--draws", "20",
                 "--quiet"]) == 0
    assert load_model(out2)[0].hash == model.hash


def test_fit_user_error_exits_1_and_writes_nothing(tmp_path, capsys):
    panel = tmp_path / "p.csv"
    assert main(["simulate", SPEC, "--accounts", "300", "--periods", "4", "-o", str(panel)]) == 0
    mk = pd.read_csv(tmp_path / "p.markets.csv")
    mk[mk["market"] == "north"].to_csv(tmp_path / "bad.csv", index=False)
    out = tmp_path / "model"
    rc = main(["fit", SPEC, "--panel", str(panel), "--markets", str(tmp_path / "bad.csv"), "-o", str(out)])
    err = capsys.readouterr().err
    assert rc == 1 and "bad.csv, column market" in err and "south" in err and "Traceback" not in err
    assert not out.exists()
    assert main(["fit", SPEC, "--panel", str(panel), "--markets", str(tmp_path / "p.markets.csv"), "-o", str(out),
                 "--strength", "lots"]) == 1
    assert main(["check", SPEC, "--panel", str(panel), "--markets", str(tmp_path / "bad.csv")]) == 1


WEEKLY = str(Path(__file__).parent / "data" / "mini_weekly.toml")


def test_weekly_spec_end_to_end(tmp_path, capsys):
    """simulate writes ISO weeks, check and fit read them; the never-member join hazard follows
    the weeks and the two-week pay cycle: prospects join three times as often in pay weeks."""
    panel = tmp_path / "weekly.csv"
    assert main(["simulate", WEEKLY, "--accounts", "3000", "--periods", "30", "--seed", "5", "-o", str(panel)]) == 0
    df = pd.read_csv(panel, dtype=str)
    assert df["period"].min() == "2024-W01" and df["period"].max() == "2024-W30"
    markets = tmp_path / "weekly.markets.csv"
    assert main(["check", WEEKLY, "--panel", str(panel), "--markets", str(markets)]) == 0
    out = tmp_path / "model"
    assert main(["fit", WEEKLY, "--panel", str(panel), "--markets", str(markets), "-o", str(out), "--draws", "0"]) == 0
    text = capsys.readouterr().out
    assert "2024-W01..2024-W30" in text and "consecutive-week moves" in text and "join hazard per week" in text
    diag = json.loads((model_files(out) / "diagnostics.json").read_text())
    assert diag["panel"]["period"] == "week" and diag["panel"]["first_period"] == "2024-W01"
    model, _ = load_model(out)
    assert model.metadata["fitted_from"]["periods"] == ["2024-W01", "2024-W30"]
    # status table (market, payweek, status, status'): prospect rows, all joins pooled over plans
    joins = 1.0 - model.tables["status"][:, :, 0, 0]
    true = np.array([[0.01, 0.03], [0.01, 0.03]])  # tests/data/mini_weekly.toml
    assert np.all(np.abs(joins / true - 1.0) < 0.25), joins
    # a monthly-labelled copy of the same panel is refused with the row, line and expected form
    bad = df.assign(period="2024-01")
    bad.to_csv(tmp_path / "monthly.csv", index=False)
    assert main(["fit", WEEKLY, "--panel", str(tmp_path / "monthly.csv"), "--markets", str(markets), "-o",
                 str(tmp_path / "m2")]) == 1
    err = capsys.readouterr().err
    assert err.startswith(f"error: {tmp_path / 'monthly.csv'}: row 1 (line 2), column period: holds a month YYYY-MM, "
                          "but the spec's model.period is 'week'")
    assert err.count("\n") == 1 and not (tmp_path / "m2").exists()


def test_fit_refuses_fewer_draws_than_a_90_percent_interval_needs(tmp_path, capsys):
    panel = tmp_path / "p.parquet"
    assert main(["simulate", SPEC, "--accounts", "300", "--periods", "4", "-o", str(panel)]) == 0
    out = tmp_path / "model"
    # an equal-tailed 90 % interval needs 2 / (1 - 0.9) = 20 draws, one in each tail
    # (docs/references.md: common practice, no source)
    rc = main(["fit", SPEC, "--panel", str(panel), "--markets", str(tmp_path / "p.markets.csv"), "-o", str(out),
               "--draws", "19"])
    err = capsys.readouterr().err.strip()
    assert rc == 1 and "--draws" in err and "at least 20" in err and len(err.splitlines()) == 1
    assert not out.exists()
    assert main(["simulate", SPEC, "--accounts", "300", "--periods", "4", "--population-sample", "50",
                 "-o", str(panel)]) == 1  # the mini spec has no propensity band to survey
    assert "--population-sample" in capsys.readouterr().err


def test_report_shows_acquisition_at_both_ends_of_the_size_range(tmp_path):
    panel = tmp_path / "panel.parquet"
    assert main(["simulate", SPEC, "--accounts", "3000", "--periods", "12", "--seed", "3", "-o", str(panel)]) == 0
    model = tmp_path / "model"
    assert main(["fit", SPEC, "--panel", str(panel), "--markets", str(tmp_path / "panel.markets.csv"), "-o", str(model),
                 "--draws", "20", "--quiet"]) == 0
    assert main(["report", str(model), "-o", str(tmp_path / "report")]) == 0
    data = json.loads((tmp_path / "report" / "report.json").read_text())
    assert data["acquisition"]["size_range"]
    for r in [r for r in data["acquisition"]["rows"] if r.get("sold")]:
        # more never-members at risk (the high size) make each less likely to join: a prospect is
        # worth less, so acquiring one is worth more; the low size the other way round
        assert r["honest_low_size"] < r["honest"] < r["honest_high_size"], r
    page = (tmp_path / "report" / "report.html").read_text()
    assert "at the high .. low market size" in page and "raw join rate" in page
