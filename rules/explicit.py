"""The transition matrix P written out as a scipy CSR matrix, and its data for other tables.

Independent of the structured operator (:mod:`.operator`): it walks the draws forward, state by
state, so it doubles as the cross-check of the structured apply. It needs neither JAX nor a
compile, which makes it the fast route to a solve on small and medium grids (a sparse LU of
``I - beta P`` per fixed block, :mod:`stateworth.solver.sparse`).

:class:`Pattern` keeps, for every non-zero of P, the flat index of the table entry each factor
contributes, so the matrix of *other* tables on the same grid (a posterior draw, a changed
table) is one gather and product per factor: ``data = prod_f T_f.flat[index_f]``, with no new
enumeration. Tables that put zero on an allowed move keep an explicit zero in the pattern.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from stateworth.rules.counters import counter_index
from stateworth.rules.factors import Factor
from stateworth.rules.grid import Grid


@dataclass(frozen=True)
class Pattern:
    """The non-zeros of P on a grid, with the table entries that make each of them.

    ``indptr``/``indices`` are P's CSR structure (n x n); ``entries[axis]`` holds, for every
    non-zero in CSR order, the flat index into factor ``axis``'s table of the entry that
    factor contributes; P's value there is the product of those entries over the factors."""

    n: int
    indptr: np.ndarray
    indices: np.ndarray
    entries: dict[str, np.ndarray]

    @property
    def nnz(self) -> int:
        return int(self.indices.size)

    def data(self, tables: dict[str, np.ndarray]) -> np.ndarray:
        """P's non-zero values ``(nnz,)`` under ``tables`` (axis -> table of the factor's shape)."""
        out = np.ones(self.nnz)
        for axis, idx in self.entries.items():
            out *= np.asarray(tables[axis], dtype=np.float64).reshape(-1)[idx]
        return out

    def matrix(self, tables: dict[str, np.ndarray]) -> sp.csr_matrix:
        """P under ``tables`` as a CSR matrix on this pattern (explicit zeros kept)."""
        return sp.csr_matrix((self.data(tables), self.indices, self.indptr), shape=(self.n, self.n))


def pattern(spec, grid: Grid, factors: list[Factor], supports: list[dict[str, np.ndarray]],
            max_states: int = 3_000_000, chunk_entries: int = 4_000_000) -> Pattern:
    """The :class:`Pattern` of P for every table set in ``supports`` at once: an entry is kept
    where its product is non-zero under at least one factor-by-factor support (a table entry is
    in a factor's support when any of the given tables, e.g. a point table and its posterior
    draws stacked as ``(D, *shape)``, is non-zero there). Enumerates every (state, next random
    levels) pair, ``chunk_entries`` at a time; refused above ``max_states`` states."""
    n = grid.size
    if n > max_states:
        from stateworth.errors import GridTooLargeError
        raise GridTooLargeError(f"explicit matrix export is for grids up to {max_states:,} states; this one has {n:,}")
    support = {}
    for f in factors:
        m = np.zeros(f.shape, dtype=bool)
        for t in supports:
            if f.axis not in t:  # e.g. posterior draws of some factors only
                continue
            a = np.asarray(t[f.axis])
            m |= (a != 0) if a.shape == tuple(f.shape) else np.any(a != 0, axis=0)
        support[f.axis] = m.reshape(-1)
    names = list(grid.names)
    kinds = {a.name: a.kind for a in grid.axes}
    status = spec.status_axis
    rnd = [f.axis for f in factors]
    rsizes = [grid.axis(r).size for r in rnd]
    K = int(np.prod(rsizes))
    combos = [c.reshape(-1) for c in np.indices(rsizes)]  # next levels of random axes, (K,)
    nxt = {r: combos[i][None, :] for i, r in enumerate(rnd)}
    counters = {a.name: counter_index(spec, a.name) for a in grid.axes if a.kind == "counter"}
    B = max(1, chunk_entries // K)
    rows_all, cols_all = [], []
    ent_all: dict[str, list[np.ndarray]] = {f.axis: [] for f in factors}
    for start in range(0, n, B):
        flat = np.arange(start, min(n, start + B))
        cur_codes = np.unravel_index(flat, grid.shape)
        cur = {nm: cur_codes[i][:, None] for i, nm in enumerate(names)}
        keep = np.ones((len(flat), K), dtype=bool)
        ent = {}
        for f in factors:
            idx = [nxt[g[5:]] if g.startswith("next.") else cur[g] for g in f.given] + [nxt[f.axis]]
            e = np.ravel_multi_index(tuple(np.broadcast_arrays(*idx)), f.shape)
            ent[f.axis] = np.broadcast_to(e, keep.shape)
            keep &= support[f.axis][ent[f.axis]]
        next_codes = []
        for nm in names:
            k = kinds[nm]
            if k == "fixed":
                next_codes.append(np.broadcast_to(cur[nm], keep.shape))
            elif k == "cycle":
                size = grid.axis(nm).size
                next_codes.append(np.broadcast_to((cur[nm] + 1) % size, keep.shape))
            elif k == "counter":
                next_codes.append(np.broadcast_to(counters[nm][cur[nm], cur[status], nxt[status]], keep.shape))
            else:
                next_codes.append(np.broadcast_to(nxt[nm], keep.shape))
        col = np.ravel_multi_index(next_codes, grid.shape)
        rows_all.append(np.broadcast_to(flat[:, None], keep.shape)[keep])
        cols_all.append(col[keep])
        for a, e in ent.items():
            ent_all[a].append(e[keep].astype(np.int64))
    rows = np.concatenate(rows_all)
    cols = np.concatenate(cols_all)
    # rows come in order; within a row, the column order of CSR (each (row, col) pair is unique:
    # the next state fixes every random axis's next level)
    order = np.lexsort((cols, rows))
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n), out=indptr[1:])
    biggest = max([n] + [int(np.prod(f.shape, dtype=np.int64)) for f in factors])
    idx_dtype = np.int32 if biggest < 2**31 else np.int64
    entries = {a: np.concatenate(e)[order].astype(idx_dtype) for a, e in ent_all.items()}
    return Pattern(n=n, indptr=indptr, indices=cols[order].astype(idx_dtype), entries=entries)


def explicit_csr(spec, grid: Grid, factors: list[Factor], tables: dict[str, np.ndarray],
                 max_states: int = 3_000_000, chunk_entries: int = 4_000_000) -> sp.csr_matrix:
    """P as a scipy CSR matrix (its non-zeros only), built by enumerating every (state, next
    random levels) pair: see :func:`pattern`. Memory grows with the number of non-zeros;
    refused above ``max_states``."""
    m = pattern(spec, grid, factors, [tables], max_states, chunk_entries).matrix(tables)
    m.eliminate_zeros()
    return m
