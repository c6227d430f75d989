"""Linear operators: small pytree objects with ``mv`` (apply) and ``transpose``.

Solvers take any object with the :class:`LinearOperator` interface, so the same Krylov code runs
on the structured grid operator of a compiled model
(:class:`stateworth.rules.grid_operator.GridOperator`) and on the explicit matrices of reference
tests (absorbing chains, textbook examples). What each operator provides:

* ``GridOperator`` is a :class:`StructuredOperator`: ``shape``, ``mv``, ``transpose``, and
  ``astype`` (the float32 copy the two-level preconditioner smooths with) and ``with_tables``
  (posterior draws, changed models, marginal values); every solver method, the preconditioner
  and sharding take it;
* :class:`MatrixOperator` and :class:`SparseOperator` are :class:`LinearOperator` s with
  ``csr()``: the dense, value-iteration and GMRES methods (without the preconditioner, which
  needs a compiled model) and the sparse method (through ``csr()``) take them.

Each is a dataclass registered with :func:`jax.tree_util.register_dataclass`: its arrays are
the pytree's leaves (so an operator is an ordinary argument of a jitted function, and a stack of
them can be mapped over) and its static structure the pytree's metadata.

Shapes: an operator is ``(n, n)``; ``mv`` takes ``(n,)`` or ``(n, k)`` (k right-hand sides) and
returns the same shape. All arithmetic is float64 unless ``astype`` says otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial
from typing import Mapping, Protocol, runtime_checkable

import jax
import jax.numpy as jnp
import numpy as np

from stateworth import config


@runtime_checkable
class LinearOperator(Protocol):
    """A square linear map ``x -> A x`` on float64 vectors of length ``shape[0]``."""

    @property
    def shape(self) -> tuple[int, int]:  # pragma: no cover - protocol
        ...

    def mv(self, x: jax.Array) -> jax.Array:  # pragma: no cover - protocol
        ...

    def transpose(self) -> "LinearOperator":  # pragma: no cover - protocol
        ...


@runtime_checkable
class StructuredOperator(LinearOperator, Protocol):
    """A transition operator built from factor tables (the grid operator of a compiled model):
    a :class:`LinearOperator` that can also change the type or the values of its tables while
    keeping its structure (and so its compiled program)."""

    def astype(self, dtype) -> "StructuredOperator":  # pragma: no cover - protocol
        """The same operator on tables of ``dtype`` (float32 for the preconditioner); applies then
        take and return vectors of that type."""
        ...

    def with_tables(self, tables: Mapping[str, jax.Array]) -> "StructuredOperator":  # pragma: no cover
        """The same structure with other factor tables, by axis name (a changed or drawn model)."""
        ...


@partial(jax.tree_util.register_dataclass, data_fields=["matrix"], meta_fields=[])
@dataclass(frozen=True, eq=False)
class MatrixOperator:
    """An explicit dense matrix as an operator (small models and textbook references).

    ``matrix`` is ``(n, n)`` (made float64). ``mv(x) = matrix @ x``. Rows need not sum to one: a
    sub-stochastic matrix models absorption (leaving the chain with value 0), which is what lets
    ``beta = 1`` be solved for episodic examples.
    """

    matrix: jax.Array

    def __post_init__(self) -> None:
        config.use_jax()
        object.__setattr__(self, "matrix", jnp.asarray(self.matrix, dtype=jnp.float64))

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.matrix.shape)  # type: ignore[return-value]

    def mv(self, x: jax.Array) -> jax.Array:
        return self.matrix @ x

    def transpose(self) -> "MatrixOperator":
        return MatrixOperator(self.matrix.T)

    def csr(self):
        """The matrix as scipy CSR (for the host's sparse LU)."""
        import scipy.sparse as sp
        return sp.csr_matrix(np.asarray(self.matrix))


@partial(jax.tree_util.register_dataclass, data_fields=["rows", "cols", "data"], meta_fields=["n"])
@dataclass(frozen=True, eq=False)
class SparseOperator:
    """A sparse matrix in coordinate form (e.g. from ``scipy.sparse``) applied with a segment sum.

    ``rows``, ``cols``, ``data``: the non-zeros ``A[rows[i], cols[i]] = data[i]`` of an ``(n, n)``
    matrix (made int32, int32, float64). Used for explicit references; compiled models use the
    structured grid operator instead.
    """

    rows: jax.Array
    cols: jax.Array
    data: jax.Array
    n: int

    def __post_init__(self) -> None:
        config.use_jax()
        object.__setattr__(self, "rows", jnp.asarray(self.rows, dtype=jnp.int32))
        object.__setattr__(self, "cols", jnp.asarray(self.cols, dtype=jnp.int32))
        object.__setattr__(self, "data", jnp.asarray(self.data, dtype=jnp.float64))
        object.__setattr__(self, "n", int(self.n))

    @classmethod
    def from_scipy(cls, m) -> "SparseOperator":
        coo = m.tocoo()
        return cls(np.asarray(coo.row), np.asarray(coo.col), np.asarray(coo.data), m.shape[0])

    @property
    def shape(self) -> tuple[int, int]:
        return (self.n, self.n)

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
