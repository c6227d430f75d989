"""Solver accuracy against outside references (docs/references.md and reference libraries).

Each check names its source and how the expected value was obtained.
"""

from __future__ import annotations

import numpy as np
import pytest

from stateworth.operators import MatrixOperator
from stateworth.solver import solve

METHODS = ["dense", "gmres", "value_iteration"]


@pytest.mark.parametrize("method", ["dense", "gmres"])
def test_drunkards_walk_fundamental_matrix(method):
    # Grinstead & Snell, Introduction to Probability, 2nd rev. ed., section 11.2: the drunkard's
    # walk on 0..4 with absorbing ends. Q is the transient part (states 1, 2, 3). N = (I - Q)^-1,
    # expected steps N 1 and absorption probabilities N R are printed in the source (exact fractions).
    Q = np.array([[0, 0.5, 0], [0.5, 0, 0.5], [0, 0.5, 0]])
    R = np.array([[0.5, 0], [0, 0], [0, 0.5]])
    op = MatrixOperator(Q)
    N = solve(op, np.eye(3), beta=1.0, method=method, tol=1e-13).values
    np.testing.assert_allclose(N, [[1.5, 1, 0.5], [1, 2, 1], [0.5, 1, 1.5]], rtol=1e-10)
    steps = solve(op, np.ones(3), beta=1.0, method=method, tol=1e-13).value(0)
    np.testing.assert_allclose(steps, [3, 4, 3], rtol=1e-10)
    B = solve(op, R, beta=1.0, method=method, tol=1e-13).values
    np.testing.assert_allclose(B, [[0.75, 0.25], [0.5, 0.5], [0.25, 0.75]], rtol=1e-10)


def test_sparse_operator_matches_dense():
    # The CSR operator (explicit references) gives the drunkard's walk N of Grinstead & Snell
    # section 11.2 too (printed in the source).
    import scipy.sparse as sp
    from stateworth.operators import SparseOperator
    Q = sp.csr_matrix(np.array([[0, 0.5, 0], [0.5, 0, 0.5], [0, 0.5, 0]]))
    op = SparseOperator.from_scipy(Q)
    N = solve(op, np.eye(3), beta=1.0, method="gmres", tol=1e-13).values
    np.testing.assert_allclose(N, [[1.5, 1, 0.5], [1, 2, 1], [0.5, 1, 1.5]], rtol=1e-10)
    np.testing.assert_allclose(np.asarray(op.transpose().mv(np.ones(3))), Q.T @ np.ones(3))


@pytest.mark.parametrize("method", METHODS)
def test_random_walk_episodic_values(method):
    # Sutton & Barto, Reinforcement Learning: An Introduction, 2nd ed. (2018), Example 6.2: states
    # A..E, left or right with probability 1/2, +1 on leaving to the right, 0 on the left.
    # True values 1/6 .. 5/6 are printed in the source. Undiscounted (beta = 1) with a
    # sub-stochastic P: leaving the row of A or E is absorption with value 0.
    P = np.zeros((5, 5))
    for i in range(5):
        if i > 0:
            P[i, i - 1] = 0.5
        if i < 4:
            P[i, i + 1] = 0.5
    r = np.zeros(5)
    r[4] = 0.5  # expected reward of a step from E
    sol = solve(MatrixOperator(P), r, beta=1.0, method=method, tol=1e-12, stochastic=False,
                max_iter=200000)
    np.testing.assert_allclose(sol.value(0), np.arange(1, 6) / 6, rtol=1e-9)


@pytest.mark.parametrize("i,r,multiple", [(0.10, 0.6, 1.20), (0.10, 0.7, 1.75), (0.10, 0.8, 2.67),
                                          (0.10, 0.9, 4.50), (0.12, 0.8, 2.50), (0.12, 0.9, 4.09),
                                          (0.14, 0.8, 2.35), (0.16, 0.8, 2.22), (0.16, 0.9, 3.46)])
def test_margin_multiples(i, r, multiple):
    # Gupta & Lehmann, Managing Customers as Investments (2005): margin multiple r / (1 + i - r).
    # Two-state chain, member retained with probability r, lost for good; start-of-period cash:
    # V = m (1 + i) / (1 + i - r), so V / m - 1 is the multiple. Table values computed from the
    # published formula (the printed table is recalled from memory), two decimals.
    P = np.array([[r, 1 - r], [0, 1.0]])
    m = 1.0
    sol = solve(MatrixOperator(P), np.array([m, 0.0]), beta=1 / (1 + i), method="gmres", tol=1e-13)
    v = sol.value(0)[0]
    np.testing.assert_allclose(v, m * (1 + i) / (1 + i - r), rtol=1e-10)
    assert abs((v / m - 1) - multiple) < 0.006


def test_perpetuity_and_annuity():
    # Brealey, Myers & Allen, Principles of Corporate Finance (any corporate finance text), by
    # formula: a constant m forever is worth m / i with cash at period end and m (1 + i) / i at
    # the start; an n-period annuity (end of period) is m (1 - (1 + i)^-n) / i.
    i, m, n = 0.08, 100.0, 24
    beta = 1 / (1 + i)
    op = MatrixOperator(np.array([[1.0]]))
    start = solve(op, np.array([m]), beta=beta, method="gmres", tol=1e-13).value(0)[0]
    np.testing.assert_allclose(start, m * (1 + i) / i, rtol=1e-10)
    end = solve(op, np.array([beta * m]), beta=beta, method="dense").value(0)[0]
    np.testing.assert_allclose(end, m / i, rtol=1e-10)
    annuity = solve(op, np.array([beta * m]), beta=beta, horizon=n).value(0)[0]
    np.testing.assert_allclose(annuity, m * (1 - (1 + i) ** -n) / i, rtol=1e-12)


def test_mcqueen_porteus_bracket_contains_exact_solution():
    # McQueen (1966); Porteus (1971); Puterman, Markov Decision Processes (1994), section 6.6:
    # after sweep k the exact V lies in [V_k + b/(1-b) min(V_k - V_{k-1}), V_k + b/(1-b) max(...)].
    # Formula; the exact solution comes from numpy.linalg.solve.
    rng = np.random.default_rng(3)
    n = 40
    P = rng.random((n, n)) ** 4
    P /= P.sum(axis=1, keepdims=True)
    r = rng.normal(size=n)
    beta = 0.97
    exact = np.linalg.solve(np.eye(n) - beta * P, r)
    for sweeps in (3, 10, 40):
        sol = solve(MatrixOperator(P), r, beta=beta, method="value_iteration", max_iter=sweeps,
                    tol=1e-15, raise_on_failure=False)
        lo, hi = sol.bracket
        assert np.all(lo[:, 0] <= exact + 1e-12) and np.all(exact <= hi[:, 0] + 1e-12)
        assert np.max(np.abs(sol.value(0) - exact)) <= sol.bound + 1e-12


def test_rate_conversion_beta():
    # Standard finance arithmetic (docs/references.md): 10 % a year, monthly: beta = 1.10^(-1/12).
    from stateworth.rules import parse_spec
    spec = parse_spec({"model": {"name": "x", "discount": {"annual_rate": 0.10}},
                       "axes": {"status": {"kind": "status", "levels": ["out", "in"], "members": ["in"],
                                           "given": ["status"]}}})
    assert abs(spec.beta - 0.9920889) < 5e-8
    assert abs((1 / spec.beta - 1) - 0.0079741) < 5e-8


def test_quantecon_evaluate_policy(example_model):
    # quantecon DiscreteDP(R, Q, beta).evaluate_policy(sigma) with one action per state is exactly
    # policy evaluation; reference library, computed at test time.
    qe = pytest.importorskip("quantecon")
    import scipy.sparse as sp
    from stateworth.rules import compile_model, parse_spec
    spec = parse_spec({
        "model": {"name": "q", "discount": {"annual_rate": 0.2}},
        "axes": {"region": {"kind": "fixed", "levels": ["a", "b"]},
                 "tenure": {"kind": "counter", "size": 4, "advance_while": "member", "reset_on": ["join"]},
                 "status": {"kind": "status", "levels": ["none", "lite", "full"], "members": ["lite", "full"],
                            "given": ["region", "status"],
                            "table": [{"probs": {"none": 0.9, "lite": 0.1}},
                                      {"when": {"status": "lite"}, "probs": {"none": 0.2, "lite": 0.6, "full": 0.2}},
                                      {"when": {"status": "full", "region": "b"},
                                       "probs": {"none": 0.1, "lite": 0.2, "full": 0.7}},
                                      {"when": {"status": "full", "region": "a"},
                                       "probs": {"none": 0.05, "full": 0.95}}]}},
        "rewards": {"rev": {"price": {"lite": 5.0, "full": {"a": 12.0, "b": 10.0}}, "on_join": -3.0}}})
    m = compile_model(spec)
    P = m.csr().toarray()
    n = m.n_states
    ddp = qe.markov.DiscreteDP(m.rewards["rev"][:, None], P[:, None, :], m.beta)
    ref = ddp.evaluate_policy(np.zeros(n, dtype=int))
    for method in METHODS:
        v = solve(m, "rev", method=method, tol=1e-12).value("rev")
        np.testing.assert_allclose(v, ref, rtol=1e-9)
    assert sp.issparse(m.csr())
