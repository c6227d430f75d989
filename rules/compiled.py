"""Compilation: spec + factor tables -> :class:`CompiledModel`.

A compiled model is everything the solver and the valuation queries need: the grid and its level
index, the structured operator P (apply and transpose), one reward vector per stream, the
per-period discount factor, metadata and a content hash that identifies it (spec + tables).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from stateworth import config
from stateworth.errors import GridTooLargeError, SpecError
from stateworth.rules.factors import Factor, check_table, factors_of, row_of_cells, table_from_rows
from stateworth.rules.grid import Grid
from stateworth.rules.operator import GridOperator, explicit_csr, make_operator
from stateworth.rules.rewards import reward_vector
from stateworth.rules.spec import Spec

FORMAT = "stateworth.compiled/1"


def estimate_bytes(spec: Spec) -> int:
    """Planned peak memory of an operator apply plus a Krylov solve, in bytes.

    An apply holds a few frames of up to (grid size) x (status levels) float64 values; a solve
    keeps about 40 grid-sized vectors (Krylov basis and work vectors); factor tables add the
    product of their given sizes."""
    n = int(np.prod([len(spec.axis_levels(a)) for a in spec.axes], dtype=np.int64))
    s = len(spec.axis_levels(spec.status_axis))
    tables = sum(int(np.prod(f.shape, dtype=np.int64)) for f in factors_of(spec))
    return 8 * (3 * n * s + 40 * n + 2 * tables)


def check_size(spec: Spec, source: str = "<spec>", limit: int | None = None) -> None:
    limit = config.memory_limit_bytes() if limit is None else limit
    need = estimate_bytes(spec)
    if need > limit:
        n = int(np.prod([len(spec.axis_levels(a)) for a in spec.axes], dtype=np.int64))
        raise GridTooLargeError(
            f"the grid has {n:,} states and would need about {need / 1024**3:.1f} GB, over the limit of "
            f"{limit / 1024**3:.1f} GB; shrink an axis or raise STATEWORTH_MEMORY_LIMIT_GB", where=source)


@dataclass
class CompiledModel:
    """A model ready to solve. ``rewards[k]`` is ``(n,)`` in money per period (see rewards.py)."""

    spec: Spec
    grid: Grid
    factors: list[Factor]
    tables: dict[str, np.ndarray]
    operator: GridOperator
    rewards: dict[str, np.ndarray]
    beta: float
    hash: str
    metadata: dict[str, Any] = field(default_factory=dict)
    draws: dict[str, np.ndarray] = field(default_factory=dict)  # axis -> (D, *table shape)

    @property
    def name(self) -> str:
        return self.spec.model.name

    @property
    def n_states(self) -> int:
        return self.grid.size

    @property
    def currency(self) -> str:
        return self.spec.model.currency

    @property
    def version(self) -> str:
        """Short content hash: the model version that answers queries."""
        return self.hash[:12]

    def unit(self, stream: str) -> str:
        return "member-months" if stream == "member_months" else self.currency

    def reward(self, stream: str) -> np.ndarray:
        if stream not in self.rewards:
            from stateworth.errors import QueryError
            raise QueryError(f"unknown reward stream '{stream}'; streams are {', '.join(self.rewards)}",
                             field="stream")
        return self.rewards[stream]

    def csr(self):
        """P as a scipy CSR matrix (small and medium grids; references and cross-checks)."""
        return explicit_csr(self.spec, self.grid, self.factors, self.tables)

    def with_tables(self, tables: Mapping[str, np.ndarray], check: bool = True) -> "CompiledModel":
        """A model with some factor tables replaced (re-validated, rewards and hash recomputed)."""
        merged = dict(self.tables)
        merged.update({k: np.asarray(v, dtype=np.float64) for k, v in tables.items()})
        return compile_model(self.spec, merged, metadata=self.metadata, draws=self.draws, check=check)


def content_hash(spec: Spec, tables: Mapping[str, np.ndarray]) -> str:
    h = hashlib.sha256()
    h.update(FORMAT.encode())
    h.update(json.dumps(spec.canonical(), sort_keys=True, separators=(",", ":")).encode())
    for k in sorted(tables):
        a = np.ascontiguousarray(tables[k], dtype=np.float64)
        h.update(k.encode())
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


def compile_model(spec: Spec, tables: Mapping[str, np.ndarray] | None = None, *,
                  source: str = "<spec>", metadata: dict | None = None,
                  draws: Mapping[str, np.ndarray] | None = None, check: bool = True,
                  memory_limit: int | None = None) -> CompiledModel:
    """Compile a checked spec. ``tables`` (axis -> array of the factor's shape) override the
    spec's written tables; factors with neither are an error."""
    check_size(spec, source, memory_limit)
    factors = factors_of(spec)
    given = dict(tables or {})
    unknown = [k for k in given if k not in {f.axis for f in factors}]
    if unknown:
        raise SpecError(f"table for '{unknown[0]}', which is not a random axis of the spec", where=source)
    final: dict[str, np.ndarray] = {}
    for f in factors:
        where = f"{source}: axes.{f.axis}.table"
        written = f.axis not in given
        t = table_from_rows(spec, f, source) if written else given[f.axis]
        rows = row_of_cells(spec, f) if written else None
        final[f.axis] = check_table(spec, f, t, where, rows) if check else np.asarray(t, dtype=np.float64)
    grid = Grid.from_spec(spec)
    op = make_operator(spec, grid, factors, final)
    beta = spec.beta
    rewards = {name: reward_vector(spec, grid, op, spec.rewards[name], beta) for name in spec.rewards}
    rewards["member_months"] = reward_vector(spec, grid, op, None, beta)
    return CompiledModel(spec=spec, grid=grid, factors=factors, tables=final, operator=op,
                         rewards=rewards, beta=beta, hash=content_hash(spec, final),
                         metadata=dict(metadata or {}),
                         draws={k: np.asarray(v, dtype=np.float64) for k, v in (draws or {}).items()})
