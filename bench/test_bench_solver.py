"""pytest-benchmark timings of the operator apply and a full solve on the reference models.

Run with ``.venv/bin/python -m pytest bench/test_bench_solver.py`` (not part of ``make test``:
benchmarks report times, tests do not assert on them). The comparison against scipy and numpy
in one run is ``bench/run.py`` (``make bench``)."""

from __future__ import annotations

import sys
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
import models  # noqa: E402

from stateworth.solver import solve  # noqa: E402


@pytest.fixture(scope="module", params=["10k", "100k"])
def model(request):
    return models.build(request.param)


def test_operator_apply(benchmark, model):
    mv = jax.jit(model.operator.mv)
    x = jnp.asarray(np.random.default_rng(0).normal(size=model.n_states))
    mv(x).block_until_ready()
    benchmark(lambda: mv(x).block_until_ready())


def test_operator_transpose_apply(benchmark, model):
    mv = jax.jit(model.operator.transpose().mv)
    x = jnp.asarray(np.random.default_rng(0).normal(size=model.n_states))
    mv(x).block_until_ready()
    benchmark(lambda: mv(x).block_until_ready())


def test_solve_gmres(benchmark, model):
    solve(model, "revenue", method="gmres", tol=1e-8)
    sol = benchmark.pedantic(lambda: solve(model, "revenue", method="gmres", tol=1e-8), rounds=3, iterations=1)
    benchmark.extra_info.update(sol.stats())
