"""Linear operators: small pytree objects with ``mv`` (apply) and ``transpose``.

Solvers take any object with this interface, so the same Krylov code runs on the structured grid
operator of a compiled model (:class:`stateworth.rules.operator.GridOperator`) and on explicit
matrices used by reference tests (absorbing chains, textbook examples).

Shapes: an operator is ``(n, n)``; ``mv`` takes ``(n,)`` or ``(n, k)`` (k right-hand sides) and
returns the same shape. All arithmetic is float64.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import jax
import jax.numpy as jnp
import numpy as np

from stateworth import config


@runtime_checkable
class LinearOperator(Protocol):
    """A square linear map ``x -> A x`` on float64 vectors of length ``shape[0]``."""

    shape: tuple[int, int]

    def mv(self, x: jax.Array) -> jax.Array:  # pragma: no cover - protocol
        ...

    def transpose(self) -> "LinearOperator":  # pragma: no cover - protocol
        ...


@jax.tree_util.register_pytree_node_class
class MatrixOperator:
    """An explicit dense matrix as an operator (small models and textbook references).

    ``matrix`` is ``(n, n)``. ``mv(x) = matrix @ x``. Rows need not sum to one: a sub-stochastic
    matrix models absorption (leaving the chain with value 0), which is what lets ``beta = 1``
    be solved for episodic examples.
    """

    def __init__(self, matrix: jax.Array) -> None:
        config.use_jax()
        self.matrix = jnp.asarray(matrix, dtype=jnp.float64)
        self.shape = tuple(self.matrix.shape)  # type: ignore[assignment]

    def mv(self, x: jax.Array) -> jax.Array:
        return self.matrix @ x

    def transpose(self) -> "MatrixOperator":
        return MatrixOperator(self.matrix.T)

    def csr(self):
        """The matrix as scipy CSR (for the host's sparse LU)."""
        import scipy.sparse as sp
        return sp.csr_matrix(np.asarray(self.matrix))

    def tree_flatten(self):
        return (self.matrix,), None

    @classmethod
    def tree_unflatten(cls, aux, children):
        return cls(children[0])


@jax.tree_util.register_pytree_node_class
class SparseOperator:
    """A CSR matrix (e.g. from ``scipy.sparse``) applied with a segment sum.

    ``indptr``/``indices``/``data`` follow the CSR convention for an ``(n, n)`` matrix. Used for
    explicit references; compiled models use the structured grid operator instead.
    """

    def __init__(self, rows: jax.Array, cols: jax.Array, data: jax.Array, n: int) -> None:
        config.use_jax()
        self.rows = jnp.asarray(rows, dtype=jnp.int32)
        self.cols = jnp.asarray(cols, dtype=jnp.int32)
        self.data = jnp.asarray(data, dtype=jnp.float64)
        self.n = int(n)
        self.shape = (self.n, self.n)

    @classmethod
    def from_scipy(cls, m) -> "SparseOperator":
        coo = m.tocoo()
        return cls(np.asarray(coo.row), np.asarray(coo.col), np.asarray(coo.data), m.shape[0])

    def mv(self, x: jax.Array) -> jax.Array:
        vals = self.data.reshape((-1,) + (1,) * (x.ndim - 1)) * x[self.cols]
        return jax.ops.segment_sum(vals, self.rows, num_segments=self.n)

    def transpose(self) -> "SparseOperator":
        return SparseOperator(self.cols, self.rows, self.data, self.n)

    def csr(self):
        """The matrix as scipy CSR (for the host's sparse LU)."""
        import scipy.sparse as sp
        return sp.csr_matrix((np.asarray(self.data), (np.asarray(self.rows), np.asarray(self.cols))),
                             shape=(self.n, self.n))

    def tree_flatten(self):
        return (self.rows, self.cols, self.data), self.n

    @classmethod
    def tree_unflatten(cls, n, children):
        return cls(children[0], children[1], children[2], n)
