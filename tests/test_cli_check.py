"""``stateworth check`` and ``stateworth solve`` on good and bad specs: exit codes and messages."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

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
