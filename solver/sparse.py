"""Sparse direct solves on the host: a sparse LU of ``I - beta P`` per fixed block (SuperLU).

Why: on small and medium grids the explicit transition matrix is cheap to write out (about a
million non-zeros for the 12,480-state example takes 0.03 s) and its LU is exact and quick
(0.03-0.05 s per fixed block of the example), while a Krylov solve on the structured operator
first pays JAX's import and a compile of several seconds. A command-line call, which pays that
every time, is several times faster this way. Larger grids, and grids whose chance axes
multiply into millions of non-zeros per thousand states, go to the preconditioned GMRES on the
structured operator instead (:func:`prefer_sparse` decides).

Fixed axes lead the grid order and never change, so P is block-diagonal over fixed cells: each
block ``b`` (``n / F`` consecutive states) is factorised alone, which keeps the fill-in of the LU
to its block. Not traceable (scipy on the host): batched and sharded callers use the jitted
methods of :mod:`.solve`.

Numbers: values ``(n, k)`` in the units of the right-hand sides (money per period in, money
out); the residual is the max-norm relative residual ``max_j ||A x_j - b_j||_inf / ||b_j||_inf``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spl

from stateworth.solver.result import Status

#: auto uses the sparse LU for grids whose fixed blocks have at most this many states ...
BLOCK_MAX = 20_000
#: ... and whose transition matrix has at most this many non-zeros (estimated from the tables)
NNZ_MAX = 2_000_000


@dataclass(frozen=True)
class SparseResult:
    """``x`` ``(n, k)``; ``residual`` max-norm relative; ``status`` CONVERGED, BREAKDOWN (a block
    is singular: beta = 1 with a chain that never leaves) or NONFINITE."""

    x: np.ndarray
    residual: float
    status: Status
    blocks: int


class BlockSystem:
    """The structure of ``A = I - beta P`` on P's non-zero pattern plus the diagonal, split into
    ``blocks`` diagonal blocks, so that P's values under other tables (a posterior draw) make A's
    without any sparse arithmetic: ``A.data[p_pos] = -beta P.data``, ``A.data[diag_pos] += 1``.

    Each block's rows are consecutive and its columns stay inside it, so a block is a slice of
    A's CSR arrays; its CSC structure (what SuperLU takes) and the permutation from CSR order are
    worked out once, so a draw's block is one gather. (Factorising the block's transpose instead,
    whose CSC arrays are the CSR arrays as they are, measured 2.4x slower: COLAMD orders the
    transpose of a transition matrix with more fill, 115,000 against 97,000 non-zeros on a block
    of the fitted example.)"""

    def __init__(self, n: int, indptr: np.ndarray, indices: np.ndarray, blocks: int = 1) -> None:
        indptr = np.asarray(indptr, dtype=np.int64)
        indices = np.asarray(indices, dtype=np.int64)
        rows = np.repeat(np.arange(n), np.diff(indptr))
        has_diag = np.zeros(n, dtype=bool)
        has_diag[rows[indices == rows]] = True
        # the pattern with every missing diagonal entry added, in CSR order
        all_rows = np.concatenate([rows, np.flatnonzero(~has_diag)])
        all_cols = np.concatenate([indices, np.flatnonzero(~has_diag)])
        order = np.lexsort((all_cols, all_rows))
        self.n, self.blocks = int(n), int(blocks)
        self.indices = all_cols[order].astype(np.int32)
        self.indptr = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(np.bincount(all_rows, minlength=n), out=self.indptr[1:])
        inverse = np.empty_like(order)
        inverse[order] = np.arange(order.size)
        self.p_pos = inverse[: rows.size]
        r_all = all_rows[order]
        self.diag_pos = np.flatnonzero(self.indices == r_all)
        self.slices = _block_slices(n, blocks)
        # per block: its CSC structure and, for each CSC position, the position in A's CSR data
        self._csc = []
        for sl in self.slices:
            lo, hi = self.indptr[sl.start], self.indptr[sl.stop]
            m = sl.stop - sl.start
            tag = sp.csr_matrix((np.arange(lo, hi, dtype=np.float64) + 1.0, self.indices[lo:hi] - sl.start,
                                 self.indptr[sl.start:sl.stop + 1] - lo), shape=(m, m)).tocsc()
            self._csc.append((tag.indices.copy(), tag.indptr.copy(), (tag.data - 1.0).astype(np.int64), m))

    @classmethod
    def of(cls, P: sp.spmatrix, blocks: int = 1) -> "BlockSystem":
        P = sp.csr_matrix(P)
        P.sort_indices()
        return cls(P.shape[0], P.indptr, P.indices, blocks)

    def data(self, p_data: np.ndarray, beta: float) -> np.ndarray:
        """A's values ``(nnz,)`` for P's values ``p_data`` (in P's CSR order)."""
        out = np.zeros(self.indices.size)
        out[self.p_pos] = -beta * np.asarray(p_data, dtype=np.float64)
        out[self.diag_pos] += 1.0
        return out

    def matrix(self, data: np.ndarray) -> sp.csr_matrix:
        return sp.csr_matrix((data, self.indices, self.indptr), shape=(self.n, self.n))

    def factor(self, data: np.ndarray) -> list:
        """SuperLU of each block (see the class doc); RuntimeError when one is singular."""
        return [spl.splu(sp.csc_matrix((data[pos], indices, indptr), shape=(m, m)))
                for indices, indptr, pos, m in self._csc]

    def solve(self, data: np.ndarray, b: np.ndarray, *, transpose: bool = False, tol: float = 1e-10,
              refine: int = 3) -> SparseResult:
        """Solve ``A x = b`` (``A^T x = b`` with ``transpose``) for ``b`` ``(n, k)`` with A's values
        ``data``: a sparse LU per block, then up to ``refine`` steps of iterative refinement
        (``x += A^{-1} (b - A x)``) while the max-norm relative residual is above ``tol``."""
        b = np.asarray(b, dtype=np.float64)
        b2 = b[:, None] if b.ndim == 1 else b
        try:
            lus = self.factor(data)
        except RuntimeError:  # "Factor is exactly singular"
            return SparseResult(x=np.full(b.shape, np.nan), residual=float("inf"), status=Status.BREAKDOWN,
                                blocks=self.blocks)
        trans = "T" if transpose else "N"

        def inverse(rhs: np.ndarray) -> np.ndarray:
            out = np.empty_like(rhs)
            for sl, lu in zip(self.slices, lus):
                out[sl] = lu.solve(np.ascontiguousarray(rhs[sl]), trans=trans)
            return out

        A = self.matrix(data)
        A = A.T.tocsr() if transpose else A
        norm = np.maximum(np.max(np.abs(b2), axis=0), np.finfo(float).tiny)
        x = inverse(b2)
        res = float("inf")
        for step in range(refine + 1):
            if not np.all(np.isfinite(x)):
                return SparseResult(x=x if b.ndim > 1 else x[:, 0], residual=float("inf"),
                                    status=Status.NONFINITE, blocks=self.blocks)
            resid = b2 - A @ x
            res = float(np.max(np.max(np.abs(resid), axis=0) / norm))
            if res <= tol or step == refine:
                break
            x = x + inverse(resid)
        status = Status.CONVERGED if res <= tol else Status.STAGNATED
        return SparseResult(x=x if b.ndim > 1 else x[:, 0], residual=res, status=status, blocks=self.blocks)


def _block_slices(n: int, blocks: int) -> list[slice]:
    size = n // blocks
    return [slice(b * size, (b + 1) * size) for b in range(blocks)]


def solve_sparse(P: sp.spmatrix, b: np.ndarray, beta: float, *, transpose: bool = False,
                 blocks: int = 1, tol: float = 1e-10, refine: int = 3) -> SparseResult:
    """Solve ``(I - beta P) x = b`` (``P^T`` with ``transpose``) for ``b`` ``(n, k)`` by a sparse LU
    of each of ``blocks`` equal diagonal blocks (the fixed cells; ``blocks`` must divide n and P
    must have no entry between blocks), with iterative refinement (:meth:`BlockSystem.solve`)."""
    P = sp.csr_matrix(P)
    P.sort_indices()
    system = BlockSystem(P.shape[0], P.indptr, P.indices, blocks)
    return system.solve(system.data(P.data, beta), b, transpose=transpose, tol=tol, refine=refine)


def stationary_sparse(P: sp.spmatrix, weights: np.ndarray) -> np.ndarray:
    """The long-run distribution ``pi`` ``(n,)`` with ``pi P = pi`` on each of ``len(weights)`` equal
    consecutive blocks, each block's mass its weight (normalised): per block, the system
    ``(I - P_b^T) x = 0`` with its last equation replaced by ``1^T x = 1`` (nonsingular for a
    unichain block: one recurrent class). Raises ``ValueError`` for a singular block."""
    w = np.asarray(weights, dtype=np.float64)
    w = w / w.sum()
    n = P.shape[0]
    pi = np.zeros(n)
    for f, sl in enumerate(_block_slices(n, len(w))):
        m = sl.stop - sl.start
        A = sp.lil_matrix(sp.identity(m, format="csr") - sp.csr_matrix(P)[sl, sl].T)
        A[m - 1, :] = np.ones(m)
        rhs = np.zeros(m)
        rhs[-1] = 1.0
        try:
            x = spl.splu(sp.csc_matrix(A)).solve(rhs)
        except RuntimeError as e:
            raise ValueError(f"block {f} of the chain has no unique long-run distribution ({e})") from None
        pi[sl] = w[f] * x
    return pi


def estimated_nnz(model) -> int:
    """An estimate of P's non-zeros from the tables alone (no enumeration): states times the
    product, over factors, of the mean number of next levels a cell of the table allows."""
    n = model.n_states
    branch = 1.0
    for f in model.factors:
        t = np.asarray(model.tables[f.axis])
        branch *= float(np.mean(np.count_nonzero(t.reshape(-1, t.shape[-1]), axis=1)))
    return int(n * branch)


def fixed_blocks(model) -> int:
    """The number of fixed cells (the diagonal blocks of P)."""
    return int(np.prod([a.size for a in model.grid.axes if a.kind == "fixed"], dtype=np.int64)) or 1


def prefer_sparse(model) -> bool:
    """Whether ``auto`` solves ``model`` by sparse LU: fixed blocks of at most :data:`BLOCK_MAX`
    states and at most :data:`NNZ_MAX` estimated non-zeros."""
    return model.n_states // fixed_blocks(model) <= BLOCK_MAX and estimated_nnz(model) <= NNZ_MAX
