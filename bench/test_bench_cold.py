"""Smoke run of the cold/warm benchmark (bench/cold_bench.py) on one small model.

Run with ``.venv/bin/python -m pytest bench/test_bench_cold.py`` (not part of ``make test``: it
starts a dozen fresh processes, one of them compiling the GMRES path). It checks that every
measurement ran and that the rows hold what the README's table is made from; it never checks a
time against a bound (benchmarks report times, tests do not assert on them)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def test_cold_bench_rows(tmp_path):
    out = subprocess.run([sys.executable, str(HERE / "cold_bench.py"), "--models", "flat-small", "--no-serve",
                          "--out", str(tmp_path)], capture_output=True, text=True, timeout=900)
    assert out.returncode == 0, out.stderr[-2000:]
    doc = json.loads((tmp_path / "cold.json").read_text())
    assert doc["help"]["help"]["wall_s"] > 0 and doc["help"]["value_help"]["wall_s"] > 0
    (row,) = doc["rows"]
    assert row["model"] == "flat-small" and row["states"] == 1080  # 5 x 6 x 3 x 4 x 3 (bench/models.py)
    # the two scipy scripts solve the same system: spsolve's answer and BiCGStab's (to a max-norm
    # relative residual of 1e-8) agree on state 0 (scipy against scipy, computed here)
    sp, bi = row["script_spsolve"], row["script_bicgstab"]
    assert sp["rel_residual"] < 1e-10 and bi["rel_residual"] <= 1e-8
    np.testing.assert_allclose(bi["value0"], sp["value0"], rtol=1e-6)
    # auto solves a grid this small by sparse LU, so the compiled path is measured too
    for key in ("solve_cold", "solve_warm_cache", "solve_gmres_cold", "solve_gmres_warm_cache"):
        assert "skipped" not in row[key], row[key]
        assert row[key]["wall_s"] > 0 and row[key]["residual"] <= 1e-10
    assert row["solve_cold"]["method"] == "sparse" and row["solve_gmres_cold"]["method"] == "gmres"
    # the value query read the values the solve stored, for a state the chain can reach
    assert "skipped" not in row["value"] and row["value"]["state"].startswith("tenure=")
    warm = row["warm"]
    assert warm["auto"]["method"] == "sparse" and warm["gmres"]["method"] == "gmres"
    assert warm["gmres"]["residual"] <= 1e-8 and warm["gmres_iterations_max"] >= 1
    assert warm["gmres_all_streams"]["iterations"] >= warm["gmres_iterations_max"]
    ra = row["ratios"]
    for key in ("solve_cold_over_script", "value_over_script", "script_over_solve_cold", "scipy_over_warm"):
        assert np.isfinite(ra[key]) and ra[key] > 0
    assert ra["script_reference"] in ("spsolve", "bicgstab")
    assert "GMRES it." in out.stdout and "flat-small" in out.stdout


def test_serve_ready_with_stored_values(tmp_path):
    sys.path.insert(0, str(HERE))
    import cold_bench

    info = cold_bench.prepare("flat-small", tmp_path / "models", 600, rebuild=False)
    solved = cold_bench.solve_row(Path(info["dir"]), None, tmp_path / "cache", 600)
    assert "skipped" not in solved, solved
    s = cold_bench.serve_ready([Path(info["dir"])], tmp_path, 300)
    assert "skipped" not in s, s
    assert 0 < s["listening_s"] <= s["serving_s"] and s["health_checks"] >= 1
    assert s["versions"] == [f"flat-small@{info['version']}"]
