"""The jitted solver kernels: one compiled function per method, each a pure function of the
operator (a pytree), the right-hand sides and the start, returning the iterate with an integer
:class:`~stateworth.solver.result.Status` and its statistics. Imported by :func:`.solve.solve`
only when a method needs JAX (the sparse LU on the host does not)."""

from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp

from stateworth.solver.gmres import gmres
from stateworth.solver.horizon import horizon_values
from stateworth.solver.preconditioner import low_precision
from stateworth.solver.value_iteration import value_iteration


@partial(jax.jit, static_argnames=("horizon",))
def horizon_jit(A, r, beta, horizon):
    return horizon_values(A.mv, r, beta, horizon)


@partial(jax.jit, static_argnames=("tol", "restart", "max_iter"))
def gmres_jit(A, r, x0, beta, tol, restart, max_iter, pc, A32=None):
    def matvec(v):
        return v - beta * A.mv(v)
    if pc is None:
        return gmres(matvec, r, x0, tol=tol, restart=restart, max_iter=max_iter)
    return gmres(matvec, r, x0, tol=tol, restart=restart, max_iter=max_iter,
                 precond=low_precision(pc, A, A32, beta), precond_cost=pc.cost, flexible=A32 is not None,
                 z_dtype=jnp.float32 if A32 is not None else jnp.float64)


@partial(jax.jit, static_argnames=("tol", "max_iter", "stochastic", "beta"))
def vi_jit(A, r, x0, beta, tol, max_iter, stochastic):
    return value_iteration(A.mv, r, x0, beta, tol=tol, max_iter=max_iter, stochastic=stochastic)
