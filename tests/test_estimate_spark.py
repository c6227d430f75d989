"""`fit --engine spark`: the counting query runs unchanged on Spark SQL (local mode) and gives the
embedded engine's counts row for row, hence the same model."""

from __future__ import annotations

import sys
import tomllib

import numpy as np
import pytest

from stateworth.errors import PanelError
from stateworth.rules import parse_spec
from stateworth.estimation.fit import FitOptions, fit_panel
from stateworth.estimation.simulate import simulate_panel, write_simulation

from test_simulate import BAND_SPEC  # a spec with a counter-free grid and a propensity band

TENURE = BAND_SPEC.replace("[axes.status]", """[axes.tenure]
kind = "counter"
size = 4
advance_while = "member"
reset_on = ["join", "lapse"]

[axes.month]
kind = "cycle"
size = 12

[axes.status]""")


def test_spark_missing_is_a_clear_error(monkeypatch, tmp_path):
    spec = parse_spec(tomllib.loads(TENURE))
    p, m = write_simulation(simulate_panel(spec, 300, 4, seed=1), tmp_path / "p.parquet")
    monkeypatch.setitem(sys.modules, "pyspark", None)
    monkeypatch.setitem(sys.modules, "pyspark.sql", None)
    with pytest.raises(PanelError, match="needs pyspark"):
        fit_panel(spec, str(p), str(m), FitOptions(draws=0, engine="spark"))


@pytest.mark.slow  # a Spark local-mode session: tens of seconds to start
def test_spark_counts_equal_duckdb(tmp_path):
    pytest.importorskip("pyspark")
    spec = parse_spec(tomllib.loads(TENURE))
    p, m = write_simulation(simulate_panel(spec, 3000, 14, seed=6), tmp_path / "p.parquet")
    a = fit_panel(spec, str(p), str(m), FitOptions(draws=20))
    b = fit_panel(spec, str(p), str(m), FitOptions(draws=20, engine="spark"))
    assert a.joint.total > 1000
    np.testing.assert_array_equal(a.joint.cur, b.joint.cur)
    np.testing.assert_array_equal(a.joint.nxt, b.joint.nxt)
    np.testing.assert_array_equal(a.joint.n, b.joint.n)
    assert a.model.hash == b.model.hash
