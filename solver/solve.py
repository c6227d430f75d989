"""``solve``: policy evaluation ``(I - beta P) V = r`` on a compiled model or any operator.

Methods:

* ``sparse``: a sparse LU of ``I - beta P`` per fixed block on the host (:mod:`.sparse`; no JAX,
  no compile): small and medium grids;
* ``dense``: LU on the dense matrix (references, a few thousand states);
* ``gmres``: restarted GMRES with the two-level preconditioner of :mod:`.preconditioner` when the
  operator is a grid operator (Krylov with aggregation over the slow member/non-member modes);
* ``value_iteration``: sweeps with McQueen-Porteus extrapolation (robust, slow: rate beta);
* ``auto``: :func:`choose_method`: sparse where :func:`.sparse.prefer_sparse` says the LU is
  cheap, else gmres; it says what it picked in ``Solution.method`` and ``Solution.notes``.

This module imports no JAX: the jitted kernels (:mod:`.kernels`) load when a method needs them.

Also: many right-hand sides at once (``(n, k)``), warm starts (``x0``), the transpose system
``(I - beta P^T) x = mu`` for adjoints (``transpose=True``), finite horizons (``horizon=H``), and
``beta = 1`` where P is sub-stochastic (absorbing chains).
"""

from __future__ import annotations

import time

import numpy as np

from stateworth import config
from stateworth.errors import GridTooLargeError, QueryError
from stateworth.solver.result import Solution, Status

METHODS = ("auto", "sparse", "dense", "gmres", "value_iteration")
PRECISIONS = ("auto", "float64", "float32")


def memory_needed(n: int, k: int, method: str, restart: int = 40, nnz: int = 0) -> int:
    """Bytes a solve plans to hold beyond the model: the Krylov basis (restart + 1 vectors per
    column in flight, and restart preconditioned vectors for flexible GMRES, float32 when the
    preconditioner is), work vectors, for ``dense`` the n x n matrix twice, for ``sparse`` the
    matrix (``nnz`` non-zeros) and its LU (a few times that)."""
    if method == "dense":
        return 8 * (2 * n * n + 6 * n * k)
    if method == "sparse":
        return 16 * 6 * nnz + 8 * 6 * n * k
    return 8 * n * ((2 * restart + 8) + 6 * k)  # Z counted as float64: the float64 preconditioner's case


def choose_method(model, devices: int | None = None) -> str:
    """What ``method="auto"`` solves ``model`` with: ``sparse`` (LU on the host) for a compiled
    model whose fixed blocks and transition matrix are small enough
    (:func:`.sparse.prefer_sparse`), ``gmres`` otherwise and whenever the solve is sharded.
    One policy for point solves, posterior draws and the long-run mix."""
    from stateworth.rules.compiled import CompiledModel

    if devices is None and isinstance(model, CompiledModel):
        from stateworth.solver.sparse import prefer_sparse
        if prefer_sparse(model):
            return "sparse"
    return "gmres"


def _resolve_inputs(model, rewards, beta):
    """``(model or None, operator or None, r (n, k), beta, names)``. The operator of a compiled
    model is not touched here (building it imports JAX; the sparse path never needs it)."""
    from stateworth.rules.compiled import CompiledModel

    if isinstance(model, CompiledModel):
        beta = model.beta if beta is None else beta
        if rewards is None:
            names = tuple(model.streams)
            r = np.stack([model.rewards[s] for s in names], axis=1)
        elif isinstance(rewards, str):
            names = (rewards,)
            r = model.reward(rewards)[:, None]
        elif isinstance(rewards, (list, tuple)) and all(isinstance(s, str) for s in rewards):
            names = tuple(rewards)
            r = np.stack([model.reward(s) for s in names], axis=1)
        else:
            r = np.asarray(rewards, dtype=np.float64)
            r = r[:, None] if r.ndim == 1 else r
            names = tuple(f"rhs{j}" for j in range(r.shape[1]))
        return model, None, r, float(beta), names
    if beta is None:
        raise QueryError("beta is required when solving on a bare operator", field="beta")
    r = np.asarray(rewards, dtype=np.float64)
    r = r[:, None] if r.ndim == 1 else r
    return None, model, r, float(beta), tuple(f"rhs{j}" for j in range(r.shape[1]))


def _explicit(compiled, op):
    """P as a scipy matrix: the compiled model's, or a bare operator's ``csr()``."""
    if compiled is not None:
        return compiled.csr()
    if hasattr(op, "csr"):
        return op.csr()
    raise QueryError("the sparse method needs a compiled model or an operator with an explicit matrix (csr())",
                     field="method")


def solve(model, rewards=None, *, beta: float | None = None, method: str = "auto", tol: float = 1e-10,
          x0: np.ndarray | None = None, transpose: bool = False, horizon: int | None = None,
          max_iter: int | None = None, restart: int = 40, raise_on_failure: bool = True,
          stochastic: bool = True, preconditioner: str = "auto", devices: int | None = None,
          preconditioner_precision: str = "auto") -> Solution:
    """Solve the discounted Bellman (policy-evaluation) equation ``(I - beta P) V = r``.

    ``model``: a :class:`~stateworth.rules.CompiledModel` or any operator with ``mv``/``transpose``.
    ``rewards``: stream name(s) of the model (default all), or an array ``(n,)`` / ``(n, k)`` in
    money per period. Returns a :class:`Solution` whose ``values`` are ``(n, k)`` in money (the
    discounted sum of the stream from each state). ``stochastic=False`` declares that rows of P
    may sum to less than 1 (needed for the value-iteration bracket to stay valid).
    ``devices=N`` shards the grid along its first fixed axis over N local devices
    (:mod:`stateworth.solver.sharding`); the answer is the same to rounding.
    ``preconditioner_precision``: the two-level preconditioner (its smoothing applies of P are
    4 of every 5 applies) runs in ``"float32"`` or ``"float64"``; ``"auto"`` is float32. GMRES
    itself, its basis and the residual that decides convergence stay float64, so the answer's
    accuracy does not change; a float32 apply reads and writes half the bytes.
    A solve that does not reach ``tol`` raises :class:`~stateworth.errors.ConvergenceError`
    (unless ``raise_on_failure=False``)."""
    t0 = time.perf_counter()
    if method not in METHODS:
        raise QueryError(f"unknown method '{method}'; choose one of {', '.join(METHODS)}", field="method")
    if preconditioner_precision not in PRECISIONS:
        raise QueryError(f"unknown preconditioner precision '{preconditioner_precision}'; choose one of "
                         f"{', '.join(PRECISIONS)}", field="preconditioner_precision")
    if preconditioner not in ("auto", "two_level", "none"):
        raise QueryError(f"unknown preconditioner '{preconditioner}'; choose auto, two_level or none",
                         field="preconditioner")
    compiled, op, r, beta, names = _resolve_inputs(model, rewards, beta)
    n, k = r.shape
    size = compiled.n_states if compiled is not None else int(op.shape[0])
    if size != n:
        raise QueryError(f"rewards have {n} rows but the operator has {size} states", field="rewards")
    if not (0.0 < beta <= 1.0):
        raise QueryError(f"beta must lie in (0, 1] (got {beta})", field="beta")
    if not np.all(np.isfinite(r)):
        raise QueryError("rewards contain NaN or infinite values", field="rewards")
    if horizon is not None and int(horizon) < 0:
        raise QueryError(f"horizon must be a non-negative number of periods (got {horizon})", field="horizon")
    notes: list[str] = []
    chosen = method
    if method == "auto":
        chosen = choose_method(compiled, devices) if compiled is not None else "gmres"
        notes.append(f"auto picked {chosen} for {n:,} states")
    if devices is not None and chosen in ("dense", "sparse"):
        raise QueryError(f"the {chosen} method runs on one device; use method='gmres' with devices", field="devices")
    if chosen == "sparse":
        return _solve_sparse(compiled, op, r, beta, names, tol, transpose, horizon, notes, t0, raise_on_failure)
    return _solve_jax(model, compiled, op, r, beta, names, chosen, tol=tol, x0=x0, transpose=transpose,
                      horizon=horizon, max_iter=max_iter, restart=restart, raise_on_failure=raise_on_failure,
                      stochastic=stochastic, preconditioner=preconditioner, devices=devices,
                      preconditioner_precision=preconditioner_precision, notes=notes, t0=t0)


def _solve_sparse(compiled, op, r, beta, names, tol, transpose, horizon, notes, t0, raise_on_failure) -> Solution:
    from stateworth.solver.sparse import fixed_blocks, solve_sparse

    P = _explicit(compiled, op)
    n, k = r.shape
    if horizon is not None:
        Pt = P.T.tocsr() if transpose else P
        v = np.zeros_like(r)
        for _ in range(int(horizon)):
            v = r + beta * (Pt @ v)
        return Solution(values=v, streams=names, method="horizon", status=Status.CONVERGED,
                        iterations=int(horizon), operator_applies=int(horizon), residual=0.0, bound=0.0,
                        seconds=time.perf_counter() - t0, beta=beta, transpose=transpose,
                        horizon=int(horizon), notes=notes + [f"exact {horizon}-period sum"])
    need = memory_needed(n, k, "sparse", nnz=P.nnz)
    limit = config.memory_limit_bytes()
    if need > limit:
        raise GridTooLargeError(f"a sparse solve of {n:,} states ({P.nnz:,} non-zeros) needs about "
                                f"{need / 1024**3:.1f} GB, over the limit of {limit / 1024**3:.1f} GB; use "
                                "method='gmres' or raise STATEWORTH_MEMORY_LIMIT_GB")
    blocks = fixed_blocks(compiled) if compiled is not None else 1
    res = solve_sparse(P, r, beta, transpose=transpose, blocks=blocks, tol=tol)
    status = res.status
    notes.append(f"sparse LU of {blocks} fixed block(s), {P.nnz:,} non-zeros")
    sol = Solution(values=res.x, streams=names, method="sparse", status=status, iterations=1,
                   operator_applies=1, residual=res.residual, bound=None, seconds=time.perf_counter() - t0,
                   beta=beta, transpose=transpose, notes=notes)
    if raise_on_failure:
        sol.raise_for_status(tol)
    return sol


def _solve_jax(model, compiled, op, r, beta, names, chosen, *, tol, x0, transpose, horizon, max_iter, restart,
               raise_on_failure, stochastic, preconditioner, devices, preconditioner_precision, notes,
               t0) -> Solution:
    config.use_jax()
    import jax.numpy as jnp

    from stateworth.solver import kernels

    if compiled is not None:
        op = compiled.operator
    n, k = r.shape
    shard = None
    n_orig = n
    if devices is not None:
        from stateworth.solver import sharding
        if compiled is None:
            raise QueryError("devices needs a compiled model (its fixed axes say how to shard)", field="devices")
        shard = sharding.shard_model(compiled, int(devices))
        notes.append(shard.note)
        compiled = shard.model
        op = sharding.put_operator(shard, compiled.operator)
        r = shard.pad_vector(r)
        if x0 is not None:
            x0 = shard.pad_vector(np.asarray(x0, dtype=np.float64).reshape(n_orig, k))
        n = r.shape[0]
    A = op.transpose() if transpose else op

    def place(a):
        a = config.device(a)
        return a if shard is None else sharding.put_sharded(shard, a)

    if horizon is not None:
        v = kernels.horizon_jit(A, place(r), beta, int(horizon))
        v = np.asarray(v)[:n_orig]
        return Solution(values=v, streams=names, method="horizon", status=Status.CONVERGED,
                        iterations=int(horizon), operator_applies=int(horizon), residual=0.0, bound=0.0,
                        seconds=time.perf_counter() - t0, beta=beta, transpose=transpose,
                        horizon=int(horizon), notes=notes + [f"exact {horizon}-period sum"])
    need = memory_needed(n, k, chosen, restart)
    limit = config.memory_limit_bytes()
    if need > limit:
        raise GridTooLargeError(f"a {chosen} solve of {n:,} states x {k} right-hand sides needs about "
                                f"{need / 1024**3:.1f} GB, over the limit of {limit / 1024**3:.1f} GB; use "
                                "method='gmres' or raise STATEWORTH_MEMORY_LIMIT_GB")
    rj = place(r)
    xj = place(np.zeros_like(r) if x0 is None else np.asarray(x0, dtype=np.float64).reshape(n, k))
    bound = None
    bracket = None
    per_column = None
    if chosen == "dense":
        from stateworth.solver.dense import solve_dense
        x, res_vec, status = solve_dense(A, rj, beta)
        x = np.asarray(x)
        rn = np.maximum(np.max(np.abs(r), axis=0), np.finfo(float).tiny)
        residual = float(np.max(np.max(np.abs(np.asarray(res_vec)), axis=0) / rn))
        iterations, applies = 1, n
        status = Status(int(status))
    elif chosen == "gmres":
        from stateworth.solver.preconditioner import two_level
        mi = max_iter or 3000
        pc = None
        if preconditioner != "none" and compiled is not None:
            pc = two_level(compiled, beta, transpose=transpose, frozen=shard is None,  # see sharding.py
                           dtype=jnp.float64 if preconditioner_precision == "float64" else jnp.float32)
            if shard is not None:
                pc = sharding.put_preconditioner(shard, pc)
            notes.append(f"two-level preconditioner: coarse blocks {pc.inv.shape[0]} x {pc.coarse.block}"
                         + ("" if preconditioner_precision == "float64" else ", float32"))
        elif preconditioner == "two_level":
            raise QueryError("the two-level preconditioner needs a compiled model, not a bare operator",
                             field="preconditioner")
        low = pc is not None and preconditioner_precision != "float64"
        x, iterations, applies, residual, status, most = kernels.gmres_jit(A, rj, xj, beta, tol, restart, mi, pc,
                                                                           A.astype(jnp.float32) if low else None)
        x = np.asarray(x)
        iterations, applies, residual, status = int(iterations), int(applies), float(residual), Status(int(status))
        per_column = int(most)
    else:  # value_iteration
        mi = max_iter or 50000
        x, lower, upper, iterations, residual, status, half = kernels.vi_jit(A, rj, xj, beta, tol, mi, stochastic)
        x = np.asarray(x)
        iterations, residual, status = int(iterations), float(residual), Status(int(status))
        applies = 2 * iterations + 1
        bound = float(np.max(np.asarray(half)))
        bracket = (np.asarray(lower), np.asarray(upper))
    if shard is not None:
        x = x[:n_orig]
        if bracket is not None:
            bracket = (bracket[0][:n_orig], bracket[1][:n_orig])
    sol = Solution(values=x, streams=names, method=chosen, status=status, iterations=iterations,
                   operator_applies=applies, residual=residual, bound=bound,
                   seconds=time.perf_counter() - t0, beta=beta, transpose=transpose, notes=notes,
                   bracket=bracket, iterations_per_column=per_column)
    if raise_on_failure:
        sol.raise_for_status(tol)
    return sol
