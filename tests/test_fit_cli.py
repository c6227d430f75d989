"""`stateworth simulate` and `stateworth fit` end to end through the command line."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from stateworth.clients.cli import main
from stateworth.rules import load_model

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
    diag = json.loads((out / "diagnostics.json").read_text())
    assert diag["version"] == model.version and (out / "diagnostics.txt").is_file()
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
    for r in data["acquisition"]["rows"]:
        # more never-members at risk (the high size) make each less likely to join: a prospect is
        # worth less, so acquiring one is worth more; the low size the other way round
        assert r["honest_low_size"] < r["honest"] < r["honest_high_size"], r
    page = (tmp_path / "report" / "report.html").read_text()
    assert "at the high .. low market size" in page and "raw join rate" in page
