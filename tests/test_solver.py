"""Solver behaviour on compiled models: scipy cross-checks, many right-hand sides, warm starts,
transposes, horizons, the preconditioner's coarse operator, and clear failures."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as sla

from stateworth.errors import ConvergenceError, GridTooLargeError, QueryError
from stateworth.rules import compile_model, parse_spec
from stateworth.rules.factors import factors_of, move_mask
from stateworth.solver import solve
from stateworth.solver.preconditioner import choose_key, coarse_matrix, two_level


def random_model(seed: int, markets: int = 2, tenure: int = 4, bands: int = 3, moves: dict | None = None):
    """A small model with every axis kind and random tables that respect the move rules
    (``moves``: status move rules added to the default ones)."""
    rng = np.random.default_rng(seed)
    spec = parse_spec({
        "model": {"name": f"r{seed}", "discount": {"annual_rate": float(rng.uniform(0.05, 0.3)),
                                                  "cash": "start" if seed % 2 else "end"}},
        "axes": {
            "market": {"kind": "fixed", "levels": [f"m{i}" for i in range(markets)]},
            "tenure": {"kind": "counter", "size": tenure, "advance_while": "member", "reset_on": ["join", "lapse"]},
            "season": {"kind": "cycle", "size": 2},
            "status": {"kind": "status", "levels": ["never", "former", "p1", "p2"], "members": ["p1", "p2"],
                       "given": ["market", "tenure", "season", "status", "band"],
                       "moves": {"never": ["never", "p1"], "p2": ["former", "p1", "p2"], **(moves or {})},
                       "not_sold": {"p2": ["m0"]}},
            "band": {"kind": "chance", "levels": [f"b{i}" for i in range(bands)], "given": ["next.status", "band"]},
        },
        "rewards": {"rev": {"price": {"p1": 10.0, "p2": {f"m{i}": 20.0 + i for i in range(1, markets)}},
                            "on_join": -4.0, "fees_share": 0.1}},
    })
    tables = {}
    for f in factors_of(spec):
        dims, mask = move_mask(spec, f.axis)
        t = rng.random(f.shape) ** 3 + 1e-3
        # apply the mask by broadcasting it into the table's dims
        tdims = [g[5:] + "'" if g.startswith("next.") else g for g in f.given] + [f.axis + "'"]
        mshape = [mask.shape[dims.index(d)] if d in dims else 1 for d in tdims]
        order = [dims.index(d) for d in tdims if d in dims]
        t = t * np.transpose(mask, order).reshape(mshape)
        tables[f.axis] = t / t.sum(axis=-1, keepdims=True)
    return compile_model(spec, tables)


@pytest.fixture(scope="module")
def models():
    return [random_model(s) for s in range(3)]


def test_matches_scipy_spsolve(models):
    # scipy.sparse.linalg.spsolve on the CSR export: reference library, computed at test time.
    for m in models:
        A = (sp.identity(m.n_states) - m.beta * m.csr()).tocsc()
        R = np.stack([m.rewards[s] for s in m.rewards], axis=1)
        ref = sla.spsolve(A, R)
        for method in ("dense", "sparse", "gmres", "value_iteration"):
            sol = solve(m, method=method, tol=1e-12)
            assert sol.converged and sol.residual <= 1e-12
            np.testing.assert_allclose(sol.values, ref, rtol=1e-9, atol=1e-9 * np.abs(ref).max())


def test_transpose_solve_matches_scipy(models):
    m = models[0]
    mu = np.random.default_rng(0).random(m.n_states)
    A = (sp.identity(m.n_states) - m.beta * m.csr().T).tocsc()
    ref = sla.spsolve(A, mu)
    for method in ("dense", "sparse", "gmres"):
        x = solve(m, mu, method=method, transpose=True, tol=1e-12).value(0)
        np.testing.assert_allclose(x, ref, rtol=1e-9)


def test_horizon_equals_explicit_sum(models):
    m = models[1]
    P = m.csr()
    r = m.rewards["rev"]
    acc, term = np.zeros_like(r), r.copy()
    for _ in range(7):
        acc += term
        term = m.beta * (P @ term)
    np.testing.assert_allclose(solve(m, "rev", horizon=7).value(0), acc, rtol=1e-12)
    assert np.all(solve(m, "rev", horizon=0).values == 0)


def test_many_rhs_and_warm_start(models):
    m = models[2]
    cold = solve(m, method="gmres", tol=1e-11, preconditioner="none")
    assert cold.values.shape == (m.n_states, len(m.rewards))
    # a small change to the tables: the old solution is a good start
    t = {k: v.copy() for k, v in m.tables.items()}
    b = t["band"]
    b = b * (1 + 0.01 * np.random.default_rng(1).random(b.shape) * (b > 0))
    t["band"] = b / b.sum(-1, keepdims=True)
    m2 = m.with_tables(t)
    cold2 = solve(m2, method="gmres", tol=1e-11, preconditioner="none")
    warm2 = solve(m2, method="gmres", tol=1e-11, preconditioner="none", x0=cold.values)
    np.testing.assert_allclose(warm2.values, cold2.values, rtol=1e-9)
    assert warm2.operator_applies < cold2.operator_applies


def test_preconditioner_coarse_operator_is_galerkin(models):
    # R P Q from the factor einsum equals the same product formed from the explicit matrix.
    for m in models:
        for max_block in (4, 12, 500):
            key = choose_key(m, max_block=max_block, counter_bins=2)
            C = np.asarray(coarse_matrix(m, key))
            pc = two_level(m, m.beta, max_block=max_block, counter_bins=2)
            n = m.n_states
            # Q: prolongation columns, R = Q^T / aggregate size
            F, K = C.shape[0], C.shape[1]
            Q = np.zeros((n, F * K))
            for j in range(F * K):
                e = np.zeros((F, K))
                e.flat[j] = 1.0
                Q[:, j] = np.asarray(pc.prolong(e.reshape(-1)))
            R = Q.T / Q.sum(axis=0)[:, None]
            ref = R @ (m.csr() @ Q)
            got = np.zeros((F * K, F * K))
            for f in range(F):
                got[f * K:(f + 1) * K, f * K:(f + 1) * K] = C[f]
            np.testing.assert_allclose(got, ref, atol=1e-12)


def test_preconditioned_gmres_needs_fewer_iterations(example_model):
    # iterations, not applies: the smoother spends applies to save iterations, whose basis
    # orthogonalisation is the dearer part on large grids (solver/preconditioner.py)
    m = example_model
    plain = solve(m, "revenue", method="gmres", tol=1e-10, preconditioner="none")
    pre = solve(m, "revenue", method="gmres", tol=1e-10)
    np.testing.assert_allclose(pre.values, plain.values, rtol=1e-8)
    assert 2 * pre.iterations < plain.iterations
    assert any("two-level" in note for note in pre.notes)


def test_failure_is_a_clear_error(models):
    m = models[0]
    with pytest.raises(ConvergenceError, match="ran out of iterations"):
        solve(m, "rev", method="value_iteration", tol=1e-12, max_iter=3)
    sol = solve(m, "rev", method="value_iteration", tol=1e-12, max_iter=3, raise_on_failure=False)
    assert sol.status.name == "MAX_ITERATIONS" and sol.residual > 1e-12


def test_bad_arguments(models):
    m = models[0]
    with pytest.raises(QueryError, match="unknown method"):
        solve(m, method="magic")
    with pytest.raises(QueryError, match="unknown reward stream"):
        solve(m, "nope")
    with pytest.raises(QueryError, match="beta"):
        solve(m.operator, np.ones(m.n_states))
    with pytest.raises(QueryError, match="NaN"):
        solve(m, np.full(m.n_states, np.nan))


def test_memory_limit_refuses_before_allocating(models, monkeypatch):
    monkeypatch.setenv("STATEWORTH_MEMORY_LIMIT_GB", "0.000001")
    with pytest.raises(GridTooLargeError, match="GB"):
        solve(models[0], "rev", method="dense")


def test_float32_preconditioner_keeps_float64_accuracy(models):
    # scipy.sparse.linalg.spsolve on the CSR export: reference library, computed at test time.
    m = models[1]
    A = (sp.identity(m.n_states) - m.beta * m.csr()).tocsc()
    ref = sla.spsolve(A, m.rewards["rev"])
    sols = {p: solve(m, "rev", method="gmres", tol=1e-12, preconditioner_precision=p) for p in ("float32", "float64")}
    for p, sol in sols.items():
        assert sol.converged and sol.residual <= 1e-12, p
        np.testing.assert_allclose(sol.value(0), ref, rtol=1e-10, atol=1e-10 * np.abs(ref).max())
    assert "float32" in sols["float32"].notes[-1] and "float32" not in sols["float64"].notes[-1]
    # flexible GMRES keeps the Krylov relation exact: no extra iterations for the rounding
    assert sols["float32"].iterations <= sols["float64"].iterations + 2
    with pytest.raises(QueryError, match="unknown preconditioner precision 'half'"):
        solve(m, "rev", preconditioner_precision="half")


def test_flexible_gmres_converges_with_a_changing_preconditioner():
    """FGMRES (Saad 1993) with M^{-1} a different map at every call (a Jacobi step perturbed by
    5 % noise): the true float64 residual still reaches the tolerance, and the solution equals
    scipy's direct solve (computed at test time)."""
    import jax
    import jax.numpy as jnp

    from stateworth.solver.gmres import gmres

    rng = np.random.default_rng(4)
    n = 300
    M = sp.random(n, n, density=0.02, random_state=5, format="csr")
    M = sp.diags(rng.uniform(1.0, 3.0, n)) + 0.3 * M / max(1.0, abs(M).sum(axis=1).max())
    b = rng.random((n, 1))
    ref = sla.spsolve(M.tocsc(), b[:, 0])
    Md = jnp.asarray(M.toarray())
    diag = jnp.asarray(M.diagonal())
    key = jax.random.PRNGKey(0)

    def precond(v):
        noise = 1.0 + 0.05 * jax.random.normal(jax.random.fold_in(key, jnp.int32(jnp.sum(v * 1e3) % 1e6)), v.shape)
        return v / diag * noise

    def run(flexible):
        return jax.jit(lambda b: gmres(lambda v: Md @ v, b, jnp.zeros_like(b), tol=1e-12, restart=30, max_iter=500,
                                       precond=precond, flexible=flexible))(jnp.asarray(b))

    x, it, ap, res, st, _ = run(True)
    assert int(st) == 0 and float(res) <= 1e-12
    np.testing.assert_allclose(np.asarray(x)[:, 0], ref, rtol=1e-9)
    # plain right-preconditioned GMRES assumes one fixed M: its updates lose accuracy, it needs more
    it_plain = int(run(False)[1])
    assert int(it) < it_plain, (int(it), it_plain)


def test_a_shared_horizon_cache_bounds_every_model_together():
    """Scoped views of one HorizonCache (a server's models) share its byte bound; keys of
    different scopes never collide."""
    import numpy as np

    from stateworth.valuation.solved import HorizonCache

    shared = HorizonCache(max_bytes=3 * 8000)
    a, b = shared.scoped("model-a"), shared.scoped("model-b")
    assert a.get(("point", 5), lambda: np.ones(1000)).sum() == 1000
    assert b.get(("point", 5), lambda: np.zeros(1000)).sum() == 0  # same key, other model
    assert a.get(("point", 5), lambda: np.zeros(1000)).sum() == 1000  # a hit
    for h in range(6, 10):
        b.get(("point", h), lambda: np.zeros(1000))
    st = shared.stats()
    assert st["bytes"] <= 3 * 8000 and st["entries"] == 3 and st["evictions"] == 3
