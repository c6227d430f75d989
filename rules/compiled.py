"""Compilation: spec + factor tables -> :class:`CompiledModel`.

A compiled model is everything the solver and the valuation queries need: the grid and its level
index, the structured operator P (apply and transpose, built on first use), one reward vector per
stream, the per-period discount factor, metadata and a content hash that identifies it (spec +
tables). Compiling validates the tables and hashes them; it imports neither JAX nor scipy.
"""

from __future__ import annotations

import hashlib
import json
import threading
from typing import TYPE_CHECKING, Any, Mapping

import numpy as np

from stateworth import config
from stateworth.errors import GridTooLargeError, SpecError
from stateworth.rules.factors import Factor, check_table, factors_of, row_of_cells, table_from_rows
from stateworth.rules.grid import Grid
from stateworth.rules.rewards import reward_vector
from stateworth.rules.spec import Spec

if TYPE_CHECKING:
    from stateworth.rules.grid_operator import GridOperator

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


class CompiledModel:
    """A model ready to solve: spec, grid, factor tables (``tables[axis]`` of the factor's shape:
    given sizes..., axis size), the per-period discount factor ``beta`` and the content ``hash``.

    Built on first use and kept (thread-safe): ``operator``, the structured P (imports JAX);
    ``rewards``, one ``(n,)`` vector per stream in money per period (member-months for
    ``member_months``), computed from the tables without the operator (see rules/rewards.py);
    ``csr()``, P as a scipy matrix. Loading a model and looking up stored values therefore never
    touches JAX."""

    def __init__(self, spec: Spec, grid: Grid, factors: list[Factor], tables: dict[str, np.ndarray], beta: float,
                 hash: str, metadata: dict[str, Any] | None = None, draws: dict[str, np.ndarray] | None = None,
                 operator: "GridOperator | None" = None, rewards: dict[str, np.ndarray] | None = None,
                 reuse_plan: bool = False) -> None:
        self.spec = spec
        self.grid = grid
        self.factors = factors
        self.tables = tables
        self.beta = float(beta)
        self.hash = hash
        self.metadata = dict(metadata or {})
        self.draws = dict(draws or {})  # axis -> (D, *table shape)
        self._operator = operator
        self._rewards = None if rewards is None else dict(rewards)
        self._csr = None
        self._lock = threading.Lock()
        #: build the operator's plan through the small cache of recent plans (sub-models of one
        #: spec, built again and again by transition changes)
        self.reuse_plan = bool(reuse_plan)

    def replace(self, **changes: Any) -> "CompiledModel":
        """A copy with some attributes replaced (``operator`` and ``rewards`` rebuilt on use unless
        given)."""
        kw = {"spec": self.spec, "grid": self.grid, "factors": self.factors, "tables": self.tables,
              "beta": self.beta, "hash": self.hash, "metadata": self.metadata, "draws": self.draws}
        kw.update(changes)
        return CompiledModel(**kw)

    @property
    def operator(self) -> "GridOperator":
        if self._operator is None:
            with self._lock:
                if self._operator is None:
                    from stateworth.rules.grid_operator import make_operator
                    self._operator = make_operator(self.spec, self.grid, self.factors, self.tables,
                                                   reuse_plan=self.reuse_plan)
        return self._operator

    @property
    def rewards(self) -> dict[str, np.ndarray]:
        if self._rewards is None:
            with self._lock:
                if self._rewards is None:
                    out = {name: reward_vector(self.spec, self.grid, self.factors, self.tables,
                                               self.spec.rewards[name], self.beta) for name in self.spec.rewards}
                    out["member_months"] = reward_vector(self.spec, self.grid, self.factors, self.tables, None,
                                                         self.beta)
                    self._rewards = out
        return self._rewards

    @property
    def streams(self) -> tuple[str, ...]:
        """Reward stream names: the spec's, then ``member_months``."""
        return tuple(self.spec.rewards) + ("member_months",)

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
        if stream not in self.streams:
            from stateworth.errors import QueryError
            raise QueryError(f"unknown reward stream '{stream}'; streams are {', '.join(self.streams)}",
                             field="stream")
        return self.rewards[stream]

    def csr(self):
        """P as a scipy CSR matrix (small and medium grids; references and cross-checks)."""
        if self._csr is None:
            with self._lock:
                if self._csr is None:
                    from stateworth.rules.explicit import explicit_csr
                    self._csr = explicit_csr(self.spec, self.grid, self.factors, self.tables)
        return self._csr

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
    return CompiledModel(spec=spec, grid=grid, factors=factors, tables=final, beta=spec.beta,
                         hash=content_hash(spec, final), metadata=dict(metadata or {}),
                         draws={k: np.asarray(v, dtype=np.float64) for k, v in (draws or {}).items()})
