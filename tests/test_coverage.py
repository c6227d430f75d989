"""Coverage of fitted models' intervals on the bundled example: a small run of
bench/coverage_bench.py (panels simulated from examples/fitness.toml, fitted, solved with their
posterior draws, and asked the benchmark's questions beside the spec's own answers)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))

from coverage_bench import run  # noqa: E402

LEVEL = 0.9


@pytest.mark.slow
def test_fitted_intervals_cover_the_example_truth():
    res = run(repeats=4, accounts=20000, periods=24, draws=100, level=LEVEL, seed0=1000, log=lambda s: None)
    classes = res["classes"]
    assert set(classes) == {"acquisition", "upgrade", "member_value", "lift"}
    hits = sum(c["coverage"] * c["figures"] for c in classes.values())
    k = sum(c["figures"] for c in classes.values())
    cover = hits / k
    # nominal 90 %: within three binomial standard errors over the k (figure, panel) pairs
    # (Efron & Tibshirani 1993's coverage check, docs/references.md; figures of one panel are
    # correlated, so the real error is larger and the band is a loose one)
    se = np.sqrt(LEVEL * (1 - LEVEL) / k)
    assert LEVEL - 3 * se <= cover <= LEVEL + 3 * se, (cover, classes)
    for name, c in classes.items():
        # the point estimates are honest too: mean bias well inside the intervals
        assert abs(c["mean_bias"]) < 0.5 * c["mean_half_width"], (name, c)
