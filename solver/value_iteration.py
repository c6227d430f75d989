"""Value iteration with McQueen-Porteus bounds and extrapolation: the robust fallback.

Sweeps ``V_{k+1} = r + beta P V_k``. For a stochastic P (rows sum to 1) the exact solution lies in
``[V_k + c_lo, V_k + c_hi]`` with ``c = beta / (1 - beta) * (min, max)(V_k - V_{k-1})``
(McQueen 1966; Porteus 1971; Puterman 1994, section 6.6). The midpoint is the extrapolated
estimate and half the bracket width its max-norm error bound. For a sub-stochastic P the bracket
does not hold; the bound is then ``beta / (1 - beta) * ||V_k - V_{k-1}||_inf``.
Convergence alone is at rate beta per sweep (about 1,900 sweeps to 1e-8 at 10 % a year monthly);
the bracket removes the slowest (constant) mode only.
"""

from __future__ import annotations

from typing import Callable

import jax
import jax.numpy as jnp

from stateworth.solver.result import Status


def value_iteration(apply: Callable, r: jax.Array, x0: jax.Array, beta: float, *, tol: float,
                    max_iter: int = 20000, stochastic: bool = True):
    """``apply(v)`` is ``P v`` on ``(n, k)``. Returns
    ``(x, lower, upper, iterations, residual, status)`` with per-column bracket offsets."""
    rnorm = jnp.maximum(jnp.max(jnp.abs(r), axis=0), jnp.finfo(jnp.float64).tiny)
    k = beta / (1.0 - beta) if beta < 1.0 else jnp.inf

    def extrapolate(v_new, v_old):
        d = v_new - v_old
        lo, hi = jnp.min(d, axis=0), jnp.max(d, axis=0)
        if stochastic and beta < 1.0:
            mid = v_new + k * 0.5 * (lo + hi)
            half = k * 0.5 * (hi - lo)
        else:
            mid = v_new
            half = k * jnp.max(jnp.abs(d), axis=0)
        return mid, half, lo, hi

    def cond(s):
        v, v_old, it, res, _ = s
        return (it < max_iter) & (res > tol) & jnp.isfinite(res)

    def body(s):
        v, _, it, _, _ = s
        v_new = r + beta * apply(v)
        mid, half, lo, hi = extrapolate(v_new, v)
        resid = mid - beta * apply(mid) - r
        res = jnp.max(jnp.max(jnp.abs(resid), axis=0) / rnorm)
        return v_new, v, it + 1, res, half

    v1 = r + beta * apply(x0)
    s0 = (v1, x0, 1, jnp.float64(1e300), jnp.full(r.shape[1], jnp.inf))
    v, v_old, it, res, half = jax.lax.while_loop(cond, body, s0)
    mid, half, lo, hi = extrapolate(v, v_old)
    status = jnp.where(res <= tol, Status.CONVERGED,
                       jnp.where(jnp.isfinite(res), Status.MAX_ITERATIONS, Status.NONFINITE)).astype(jnp.int32)
    lower = v + k * lo if stochastic and beta < 1.0 else v - half
    upper = v + k * hi if stochastic and beta < 1.0 else v + half
    return mid, lower, upper, it, res, status, half
