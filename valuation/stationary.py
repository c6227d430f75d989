"""Long-run state mix: the stationary distribution of the chain, members and non-members alike.

pi solves pi P = pi, sum(pi) = 1. Fixed axes never change, so the chain splits into one block
per fixed cell and pi is not unique; we take each block's own stationary distribution, weighted
by a given share of the population per block. Within a block the chain is assumed unichain (one
recurrent class; transient states such as never-members that, once joined, never return get
mass 0): then the bordered system

    (I - P^T) x + u (1_b^T x)_b = u,     u = 1 / block size on each block,

is nonsingular and its solution is each block's stationary distribution (sum the rows of a block:
P is block-diagonal and stochastic, so 1_b^T x = 1, which leaves (I - P^T) x = 0 on every block);
the blocks are then scaled by their weights. Solved densely for small
grids, else by GMRES on the structured operator. A block with several recurrent classes makes the
system singular: the solve then fails or returns a non-distribution, reported as QueryError.
"""

from __future__ import annotations

import numpy as np

from stateworth import config
from stateworth.errors import QueryError

DENSE_MAX = 2500
_BORDERED = {}


#: the long-run solve is preconditioned by the two-level preconditioner of the *discounted*
#: transpose system at this discount (beta = 1 has no inverse): close enough to 1 that its coarse
#: space holds the slow modes of I - P^T, far enough that its coarse blocks are well conditioned
PRECONDITIONER_BETA = 0.999


def _bordered_pc(op, pc, u, blocks, tol, max_iter):
    """The bordered system by flexible GMRES, right-preconditioned by ``pc`` (float32)."""
    if "pc" not in _BORDERED:
        from functools import partial

        import jax
        import jax.numpy as jnp

        from stateworth.solver.gmres import gmres
        from stateworth.solver.preconditioner import low_precision

        @partial(jax.jit, static_argnames=("blocks", "tol", "max_iter"))
        def fn(op, pc, u, blocks, tol, max_iter):
            n = u.shape[0]
            A = op.transpose()

            def matvec(x):
                s = jnp.sum(x.reshape(blocks, -1), axis=1)
                return x - A.mv(x) + u * jnp.repeat(s, n // blocks)

            M = low_precision(pc, A, A.astype(jnp.float32), PRECONDITIONER_BETA)
            x, it, ap, res, st, _ = gmres(matvec, u[:, None], u[:, None], tol=tol, restart=40, max_iter=max_iter,
                                          precond=M, precond_cost=pc.cost, flexible=True, z_dtype=jnp.float32)
            return x[:, 0], res, st, it

        _BORDERED["pc"] = fn
    return _BORDERED["pc"](op, pc, u, blocks, tol, max_iter)


def _bordered_gmres(op, u, blocks, tol, max_iter):
    if "fn" not in _BORDERED:
        from functools import partial

        import jax
        import jax.numpy as jnp

        from stateworth.solver.gmres import gmres

        @partial(jax.jit, static_argnames=("blocks", "tol", "max_iter"))
        def fn(op, u, blocks, tol, max_iter):
            n = u.shape[0]

            def matvec(x):
                s = jnp.sum(x.reshape(blocks, -1), axis=1)
                return x - op.transpose().mv(x) + u * jnp.repeat(s, n // blocks)

            x, it, ap, res, st, _ = gmres(matvec, u[:, None], u[:, None], tol=tol, restart=60, max_iter=max_iter)
            return x[:, 0], res, st

        _BORDERED["fn"] = fn
    return _BORDERED["fn"](op, u, blocks, tol, max_iter)


def long_run_mix(model, block_weights: np.ndarray | None = None) -> np.ndarray:
    """pi ``(n,)`` of a compiled model, each fixed cell's mass its weight (default equal): by the
    method the point solve uses (:func:`stateworth.solver.solve.choose_method`): a sparse LU of the
    bordered system per block on the host, or GMRES on the structured operator."""
    from stateworth.solver.solve import choose_method
    from stateworth.solver.sparse import fixed_blocks, stationary_sparse

    F = fixed_blocks(model)
    w = np.ones(F) if block_weights is None else np.asarray(block_weights, dtype=np.float64)
    if len(w) != F:
        raise QueryError(f"{len(w)} fixed-cell weights for {F} fixed cells", field="fixed_weights")
    if (w < 0).any() or not w.sum() > 0:
        raise QueryError("fixed-cell weights must be non-negative and not all zero", field="fixed_weights")
    if choose_method(model) == "sparse":
        try:
            pi = stationary_sparse(model.csr(), w)
        except ValueError:
            raise QueryError("the chain has more than one recurrent class within a fixed cell; its long-run "
                             "mix depends on the starting state", field="stationary") from None
        if not np.all(np.isfinite(pi)) or np.min(pi) < -1e-8:
            raise QueryError("the stationary distribution could not be determined (the chain may have more than "
                             "one recurrent class within a fixed cell)", field="stationary")
        pi = np.clip(pi, 0.0, None).reshape(F, -1)
        return (pi / np.maximum(pi.sum(axis=1, keepdims=True), 1e-300) * (w / w.sum())[:, None]).reshape(-1)
    return stationary_distribution(model.operator, w, model=model)


def stationary_distribution(op, block_weights: np.ndarray | None = None, *, tol: float = 1e-11,
                            max_iter: int = 20000, model=None) -> np.ndarray:
    """pi ``(n,)`` of the operator ``op`` (any object with ``mv``/``transpose`` and ``shape``).

    ``block_weights`` ``(F,)``: the grid is F equal consecutive blocks (the fixed cells, which
    lead the grid order) with these population shares (normalised); default one block. With the
    compiled ``model`` (whose operator ``op`` is), GMRES is preconditioned by the model's
    two-level preconditioner for ``I - b P^T`` at ``b =`` :data:`PRECONDITIONER_BETA` (without it,
    plain GMRES took minutes at 10^5 states: the chain mixes slowly)."""
    config.use_jax()
    import jax.numpy as jnp

    n = int(op.shape[0])
    w = np.ones(1) if block_weights is None else np.asarray(block_weights, dtype=np.float64)
    F = len(w)
    if n % F:
        raise QueryError(f"{F} blocks do not divide {n} states", field="fixed_weights")
    if (w < 0).any() or not w.sum() > 0:
        raise QueryError("fixed-cell weights must be non-negative and not all zero", field="fixed_weights")
    w = w / w.sum()
    u = np.full(n, F / n)
    if n <= DENSE_MAX:
        P = np.asarray(op.mv(jnp.eye(n)))
        B = np.zeros((n, n))
        for b in range(F):
            sl = slice(b * (n // F), (b + 1) * (n // F))
            B[:, sl] = u[:, None]
        A = np.eye(n) - P.T + B * (np.arange(n)[None, :] // (n // F) == np.arange(n)[:, None] // (n // F))
        try:
            x = np.linalg.solve(A, u)
        except np.linalg.LinAlgError:
            raise QueryError("the chain has more than one recurrent class within a fixed cell; its long-run "
                             "mix depends on the starting state", field="stationary") from None
        res = float(np.max(np.abs(A @ x - u)) / np.max(np.abs(u)))
        ok = np.isfinite(res) and res < 1e-8
    elif model is not None:
        import jax.numpy as jnp

        from stateworth.solver.preconditioner import two_level

        pc = two_level(model, PRECONDITIONER_BETA, transpose=True, frozen=True, dtype=jnp.float32)
        x, res, st, _ = _bordered_pc(op, pc, config.device(u), F, tol, min(max_iter, 3000))
        x = np.asarray(x)
        ok = int(st) == 0
    else:
        x, res, st = _bordered_gmres(op, config.device(u), F, tol, max_iter)
        x = np.asarray(x)
        ok = int(st) == 0
    if not ok or np.min(x) < -1e-8 or not np.all(np.isfinite(x)):
        raise QueryError("the stationary distribution could not be determined (the chain may have more than one "
                         "recurrent class within a fixed cell)", field="stationary")
    x = np.clip(x, 0.0, None).reshape(F, -1)
    x = x / np.maximum(x.sum(axis=1, keepdims=True), 1e-300) * w[:, None]
    return x.reshape(-1)
