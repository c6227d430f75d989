"""Direct solve on the dense matrix: for small grids (a few thousand states) and references."""

from __future__ import annotations

import jax
import jax.numpy as jnp

from stateworth.solver.result import Status
from stateworth import config


def dense_matrix(operator, n: int) -> jax.Array:
    """The operator as a dense ``(n, n)`` array, built by applying it to the identity."""
    config.use_jax()
    return operator.mv(jnp.eye(n))


@jax.jit
def _dense_solve(P: jax.Array, beta: jax.Array, b: jax.Array):
    n = P.shape[0]
    A = jnp.eye(n) - beta * P
    x = jnp.linalg.solve(A, b)
    r = A @ x - b
    status = jnp.where(jnp.all(jnp.isfinite(x)), Status.CONVERGED, Status.NONFINITE).astype(jnp.int32)
    return x, r, status


def solve_dense(operator, b: jax.Array, beta: float):
    """Solve ``(I - beta A) x = b`` for ``b`` of shape ``(n, k)``. Returns ``(x, residual, status)``."""
    config.use_jax()
    P = dense_matrix(operator, b.shape[0])
    return _dense_solve(P, jnp.float64(beta), b)
