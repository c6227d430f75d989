"""The frozen-cluster coarse space (solver/frozen.py): its Galerkin matrix against the explicit
matrix, its two restriction paths, and what it does to GMRES on a model whose non-member
stay probabilities differ along tenure (the case of posterior draws)."""

from __future__ import annotations

import dataclasses
import importlib

import jax.numpy as jnp
import numpy as np
import pytest

from stateworth.rules import compile_model, parse_spec
from stateworth.solver.frozen import FrozenCoarse, frozen_layout, frozen_matrix
from stateworth.solver.preconditioner import two_level

from test_solver import random_model

solve_module = importlib.import_module("stateworth.solver.solve")
precond_module = importlib.import_module("stateworth.solver.preconditioner")


@pytest.fixture(scope="module")
def models():
    return [random_model(s, tenure=5) for s in range(2)]


def _prolongation(fc: FrozenCoarse) -> np.ndarray:
    lay = fc.layout
    cols = []
    for j in range(lay.blocks * lay.block):
        e = np.zeros(lay.blocks * lay.block)
        e[j] = 1.0
        cols.append(np.asarray(fc.prolong(jnp.asarray(e.reshape(lay.blocks, lay.block)))))
    return np.stack(cols, axis=1)


def test_galerkin_matrix_equals_the_explicit_product(models):
    # R2 P Q2 formed from the explicit transition matrix (R2 = Q2^T / aggregate size) is
    # block-diagonal for these specs (frozen statuses only leave their cluster by joining,
    # which lands outside Q2's range), and equals the einsum of the factor tables
    for m in models:
        lay = frozen_layout(m)
        assert lay is not None and lay.frozen == (0, 1)  # never, former: tenure stands still
        C = np.asarray(frozen_matrix(lay, m.tables))
        fc = FrozenCoarse(lay, jnp.zeros((lay.blocks, lay.block, lay.block)))
        Q = _prolongation(fc)
        assert set(np.unique(Q)) <= {0.0, 1.0} and np.all(Q.sum(axis=1) <= 1)
        R = Q.T / Q.sum(axis=0)[:, None]
        ref = R @ (m.csr() @ Q)
        got = np.zeros_like(ref)
        K = lay.block
        for b in range(lay.blocks):
            got[b * K:(b + 1) * K, b * K:(b + 1) * K] = C[b]
        np.testing.assert_allclose(got, ref, atol=1e-12)
        # restriction is the aggregate mean
        v = np.random.default_rng(0).random(m.n_states)
        np.testing.assert_allclose(np.asarray(fc.restrict(jnp.asarray(v))).reshape(-1), R @ v, atol=1e-12)


def test_slice_and_one_hot_paths_agree(models):
    m = models[0]
    lay = frozen_layout(m)
    assert lay.span == (0, 2)
    inv = jnp.asarray(np.random.default_rng(1).random((lay.blocks, lay.block, lay.block)))
    r = jnp.asarray(np.random.default_rng(2).random(m.n_states))
    a = FrozenCoarse(lay, inv).solve(r)
    b = FrozenCoarse(dataclasses.replace(lay, span=None), inv).solve(r)
    np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-12, atol=1e-12)


def test_split_by_status_where_the_rules_keep_frozen_statuses_apart():
    """With no move between the frozen statuses (never, former) allowed, the Galerkin blocks are
    block-diagonal by status: the layout splits them, the per-status inverses are the diagonal
    blocks of the whole block's inverse (numpy.linalg.inv, reference library), and the split
    correction equals the unsplit one. Where a move between them is allowed there is no split."""
    import dataclasses as dc

    from stateworth.solver.frozen import frozen_coarse

    assert frozen_layout(random_model(0, tenure=5)).split == 1  # former may move to never
    m = random_model(0, tenure=5, moves={"former": ["former", "p1", "p2"]})
    lay = frozen_layout(m)
    assert lay.split == 2
    fc = frozen_coarse(lay, m.tables, m.beta)
    whole = frozen_coarse(dc.replace(lay, split=1), m.tables, m.beta)
    S, k = 2, lay.block // 2
    assert fc.inv.shape == (lay.blocks, S, k, k)
    C = np.asarray(frozen_matrix(lay, m.tables)).reshape(lay.blocks, S, k, S, k)
    assert np.all(C[:, 0, :, 1, :] == 0) and np.all(C[:, 1, :, 0, :] == 0)
    ref = np.linalg.inv(np.eye(lay.block) - m.beta * np.asarray(frozen_matrix(lay, m.tables)))
    for s in range(S):
        np.testing.assert_allclose(np.asarray(fc.inv[:, s]), ref[:, s * k:(s + 1) * k, s * k:(s + 1) * k],
                                   rtol=1e-10, atol=1e-12)
    r = jnp.asarray(np.random.default_rng(3).standard_normal(m.n_states))
    np.testing.assert_allclose(np.asarray(fc.solve(r)), np.asarray(whole.solve(r)), rtol=1e-10, atol=1e-12)
    t = frozen_coarse(lay, m.tables, m.beta, transpose=True)
    tw = frozen_coarse(dc.replace(lay, split=1), m.tables, m.beta, transpose=True)
    np.testing.assert_allclose(np.asarray(t.solve(r)), np.asarray(tw.solve(r)), rtol=1e-10, atol=1e-12)


def test_no_layout_without_a_standing_counter():
    spec = {
        "model": {"name": "nocounter", "discount": {"annual_rate": 0.1}},
        "axes": {
            "market": {"kind": "fixed", "levels": ["a", "b"]},
            "tenure": {"kind": "counter", "size": 3},  # advances always: nothing stands still
            "status": {"kind": "status", "levels": ["out", "in"], "members": ["in"], "given": ["status"]},
        },
        "rewards": {"rev": {"price": {"in": 1.0}}},
    }
    m = compile_model(parse_spec(spec), {"status": np.array([[0.9, 0.1], [0.2, 0.8]])})
    assert frozen_layout(m) is None
    assert two_level(m, m.beta, frozen=True).frozen is None


def _rough_model(seed: int = 3):
    """random_model with the never-members' stay probability drawn afresh at every tenure level
    (as a posterior draw does for cells no account visits)."""
    m = random_model(seed, tenure=6, bands=4)
    t = np.array(m.tables["status"])  # (market, tenure, season, status, band, status')
    rng = np.random.default_rng(seed)
    join = rng.uniform(0.002, 0.05, size=t.shape[:2] + (1,) + t.shape[4:5])
    t[:, :, :, 0, :, 0] = 1 - join
    t[:, :, :, 0, :, 2] = join
    t[:, :, :, 0, :, 1] = 0.0
    t[:, :, :, 0, :, 3] = 0.0
    return m.with_tables({"status": t})


def test_frozen_space_cuts_iterations_where_clusters_differ(monkeypatch):
    m = _rough_model()
    # reference: a dense solve of (I - beta P) v = r (numpy LAPACK, computed here)
    ref = np.linalg.solve(np.eye(m.n_states) - m.beta * m.csr().toarray(), np.asarray(m.rewards["rev"]))
    runs = {}
    for frozen in (False, True):
        monkeypatch.setattr(precond_module, "two_level",
                            lambda *a, frozen_=frozen, **k: two_level(*a, **{**k, "frozen": frozen_}))
        for transpose in (False, True):
            s = solve_module.solve(m, "rev", method="gmres", tol=1e-10, transpose=transpose,
                                   preconditioner_precision="float64")
            runs[frozen, transpose] = s
        np.testing.assert_allclose(runs[frozen, False].values[:, 0], ref, rtol=1e-8)
    for transpose in (False, True):
        assert runs[True, transpose].iterations < runs[False, transpose].iterations, (
            transpose, runs[True, transpose].iterations, runs[False, transpose].iterations)
