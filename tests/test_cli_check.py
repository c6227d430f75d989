"""``stateworth check`` and ``stateworth solve`` on good and bad specs: exit codes and messages."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from stateworth.rules.artifact import model_files
from stateworth.clients.cli import main

ROOT = Path(__file__).resolve().parents[1]

BAD_RATE = """
[model]
name = "bad"
discount = { annual_rate = 10 }

[axes.status]
kind = "status"
levels = ["out", "in"]
members = ["in"]
given = ["status"]
[[axes.status.table]]
probs = { out = 0.5, in = 0.5 }
"""


def test_check_example_ok(example_spec_path, capsys):
    assert main(["check", str(example_spec_path)]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"{example_spec_path}: ok, ")
    assert "states, version " in out


def test_check_example_json(example_spec_path, capsys):
    import json
    assert main(["check", str(example_spec_path), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["problems"] == []
    assert summary["states"] == 4 * 13 * 12 * 5 * 4
    assert "member_months" in summary["streams"]


def test_check_bad_spec_one_line(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(BAD_RATE)
    assert main(["check", str(path)]) == 1
    cap = capsys.readouterr()
    lines = cap.err.strip().splitlines()
    assert lines == [f"problem: {path}: model.discount.annual_rate: must lie strictly between 0 and 1 (got 10.0); "
                     "write 10 % a year as 0.10", "1 problem(s) found"]
    assert "Traceback" not in cap.err + cap.out


def test_check_lists_every_problem(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(BAD_RATE.replace('members = ["in"]', 'members = ["in", "vip"]'))
    assert main(["check", str(path)]) == 1
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 3 and lines[-1] == "2 problem(s) found"
    assert any("axes.status.members: 'vip' is not a level of status" in ln for ln in lines)


def test_check_not_toml(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text("this is = = not toml")
    assert main(["check", str(path)]) == 1
    err = capsys.readouterr().err
    assert f"problem: {path}: not valid TOML" in err and "Traceback" not in err


def test_check_spec_without_tables(tmp_path, capsys):
    """A spec whose tables come from a panel is valid; check says so and sizes the grid."""
    path = tmp_path / "panel.toml"
    path.write_text(BAD_RATE.replace("annual_rate = 10", "annual_rate = 0.1").split("[[axes.status.table]]")[0])
    assert main(["check", str(path), "--json"]) == 0
    assert "factor tables come from a panel" in capsys.readouterr().out


def test_check_grid_over_memory_limit(tmp_path, capsys, monkeypatch):
    path = tmp_path / "big.toml"
    path.write_text(BAD_RATE.replace("annual_rate = 10", "annual_rate = 0.1")
                    + '\n[axes.age]\nkind = "counter"\nsize = 1000\n')
    monkeypatch.setenv("STATEWORTH_MEMORY_LIMIT_GB", "0.0001")
    assert main(["check", str(path)]) == 1
    err = capsys.readouterr().err
    assert "the grid has 2,000 states and would need about" in err and "over the limit of 0.0 GB" in err


def test_solve_bad_spec_is_one_error_line(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(BAD_RATE)
    assert main(["solve", str(path)]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith(f"error: {path}: model.discount.annual_rate:")


def test_solve_missing_file(tmp_path, capsys):
    assert main(["solve", str(tmp_path / "none.toml")]) == 1
    assert "no such file" in capsys.readouterr().err


def _env():
    env = dict(os.environ)
    env.pop("STATEWORTH_DEBUG", None)
    return env


def test_console_script_and_module(example_spec_path, tmp_path):
    """The installed console script and ``python -m stateworth`` both run the same CLI."""
    script = Path(sys.executable).with_name("stateworth")
    if not script.exists():
        pytest.fail(f"console script {script} is not installed; run `pip install -e .`")
    ok = subprocess.run([str(script), "check", str(example_spec_path)], capture_output=True, text=True,
                        env=_env(), cwd=ROOT, timeout=120)
    assert ok.returncode == 0, ok.stderr
    assert ": ok, " in ok.stdout
    bad = tmp_path / "bad.toml"
    bad.write_text(BAD_RATE)
    res = subprocess.run([sys.executable, "-m", "stateworth", "check", str(bad)], capture_output=True,
                         text=True, env=_env(), cwd=ROOT, timeout=120)
    assert res.returncode == 1
    assert "model.discount.annual_rate" in res.stderr and "Traceback" not in res.stderr


# ---------------------------------------------------------------------------------------------
# check is as strict as fit

MINI = ROOT / "tests" / "data" / "mini_fitness.toml"

THREE_MISTAKES = BAD_RATE.replace('given = ["status"]', 'given = ["status"]\nmoves.out = ["out", "inn"]\ngiveen = []')


def test_check_lists_three_mistakes_at_once(tmp_path, capsys):
    """A misspelt key, an unknown level in moves and a rate of 12 (here 10): all three listed."""
    path = tmp_path / "three.toml"
    path.write_text(THREE_MISTAKES)
    assert main(["check", str(path)]) == 1
    lines = capsys.readouterr().err.strip().splitlines()
    assert lines[-1] == "3 problem(s) found"
    assert any("axes.status.giveen: unknown key; check its spelling" in ln for ln in lines)
    assert any("axes.status.moves.out: 'inn' is not a level of status; levels are out, in" in ln for ln in lines)
    assert any("model.discount.annual_rate: must lie strictly between 0 and 1 (got 10.0)" in ln for ln in lines)
    # other commands stop at the spec too, naming the first problem and how many more there are
    assert main(["solve", str(path)]) == 1
    assert "(and 2 more problem(s); `stateworth check` lists them all)" in capsys.readouterr().err


def _panel(tmp_path, spec=MINI, accounts="600", periods="8"):
    panel = tmp_path / "panel.csv"
    assert main(["simulate", str(spec), "--accounts", accounts, "--periods", periods, "--seed", "3",
                 "-o", str(panel)]) == 0
    return panel, tmp_path / "panel.markets.csv"


def test_check_refuses_a_forbidden_move_as_fit_does(tmp_path, capsys):
    import pandas as pd

    panel, markets = _panel(tmp_path)
    df = pd.read_csv(panel, dtype=str)
    # a south account's later row in plus: plus is not sold in south, so the move into it is forbidden
    later = df.duplicated("account") & (df["market"] == "south")
    row = int(df.index[later][0])
    df.loc[row, "status"] = "plus"
    # the error names the row the move starts from: the account's row before (0-based here)
    prev = df.index[(df["account"] == df.loc[row, "account"]) & (df.index < row)]
    row = int(prev[-1])
    bad = tmp_path / "forbidden.csv"
    df.to_csv(bad, index=False)
    capsys.readouterr()
    assert main(["check", str(MINI), "--panel", str(bad), "--markets", str(markets)]) == 1
    err = capsys.readouterr().err
    assert "forbidden by the spec's move rules" in err and f"forbidden.csv: row {row + 1} (line {row + 2})" in err
    assert main(["fit", str(MINI), "--panel", str(bad), "--markets", str(markets), "-o", str(tmp_path / "m"),
                 "--draws", "0", "--quiet"]) == 1
    fit_err = capsys.readouterr().err
    assert "forbidden by the spec's move rules" in fit_err and f"row {row + 1} (line {row + 2})" in fit_err
    # the clean panel passes both
    assert main(["check", str(MINI), "--panel", str(panel), "--markets", str(markets)]) == 0
    assert f"{MINI}: ok" in capsys.readouterr().out


def test_check_takes_gaps_like_fit(tmp_path, capsys):
    import pandas as pd

    panel, markets = _panel(tmp_path)
    df = pd.read_csv(panel, dtype=str)
    long = df.groupby("account")["period"].count()
    rows = df.index[df["account"] == long[long >= 4].index[0]]
    gap = tmp_path / "gap.csv"
    df.drop(index=rows[1]).to_csv(gap, index=False)
    assert main(["check", str(MINI), "--panel", str(gap), "--markets", str(markets)]) == 1
    assert "a gap in the account's history" in capsys.readouterr().err
    assert main(["check", str(MINI), "--panel", str(gap), "--markets", str(markets), "--gaps", "non_member"]) == 0


CLOSED_PLUS = (MINI.read_text()
               .replace('moves.prospect = ["prospect", "basic", "plus"]', 'moves.prospect = ["prospect", "basic"]')
               .replace('moves.lapsed = ["lapsed", "basic", "plus"]', 'moves.lapsed = ["lapsed", "basic"]')
               .replace('moves.basic = ["lapsed", "basic", "plus"]', 'moves.basic = ["lapsed", "basic"]')
               .replace("probs = { prospect = 0.97, basic = 0.02, plus = 0.01 }", "probs = { prospect = 0.97, basic = 0.03 }")
               .replace("probs = { lapsed = 0.95, basic = 0.04, plus = 0.01 }", "probs = { lapsed = 0.95, basic = 0.05 }")
               .replace("probs = { lapsed = 0.06, basic = 0.91, plus = 0.03 }", "probs = { lapsed = 0.06, basic = 0.94 }")
               .replace("probs = { lapsed = 0.03, basic = 0.93, plus = 0.04 }", "probs = { lapsed = 0.03, basic = 0.97 }"))


def test_a_plan_with_no_way_in_and_no_data_is_a_warning(tmp_path, capsys):
    import json

    import pandas as pd

    spec = tmp_path / "closed.toml"
    spec.write_text(CLOSED_PLUS)
    assert main(["check", str(spec)]) == 0
    cap = capsys.readouterr()
    assert "warning: " in cap.err and "plan 'plus' has no way in" in cap.err and ": ok" in cap.out
    panel, markets = _panel(tmp_path, spec)
    capsys.readouterr()
    assert main(["check", str(spec), "--panel", str(panel), "--markets", str(markets)]) == 0
    assert "plan 'plus' has no way in" in capsys.readouterr().err and "and no panel row holds it"
    out = tmp_path / "model"
    assert main(["fit", str(spec), "--panel", str(panel), "--markets", str(markets), "-o", str(out), "--draws", "0"]) == 0
    assert "warning: axes.status: plan 'plus' has no way in" in capsys.readouterr().out
    assert any("'plus' has no way in" in w for w in json.loads((model_files(out) / "diagnostics.json").read_text())["warnings"])
    # customers already in the plan when the panel starts (no join, no change: left-censored) are data
    df = pd.read_csv(panel, dtype=str)
    first = df.groupby("account")["period"].transform("min") == df["period"].min()
    acc = df.loc[first & (df["market"] == "north"), "account"].iloc[0]
    df.loc[df["account"] == acc, "status"] = "plus"
    held = tmp_path / "held.csv"
    df.to_csv(held, index=False)
    assert main(["check", str(spec), "--panel", str(held), "--markets", str(markets), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["warnings"] == []
