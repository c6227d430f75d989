"""The structured transition operator of a compiled model.

``(P x)(s) = E[x(s') | s]`` is applied backwards through the draw order, never forming P:

1. start from ``x`` viewed on the grid, with every axis at its *next* value (fixed axes are the
   same now and next, so they are batch dimensions throughout);
2. for each random axis in reverse draw order, multiply by its factor table and sum out the
   axis's next value; the table brings in the current axes it is given;
3. counters and cycles are index maps: ``c' = g(c, status, status')`` is a gather, done at the
   latest point that still has ``status'`` (before the status factor is summed out) or when a
   table needs the current counter;
4. transpose to the grid order.

A factor with a small axis (at most ``PAIR_LIMIT`` level pairs after the move rules) is applied
pair by pair (:mod:`stateworth.rules.pairwise`): elementwise products of slices, which XLA
compiles into one loop over the result; the status factor resolves the counters in the same
loop (for a pair of statuses a counter's next level is a shift or a reset, not a gather). A
larger axis whose move rules keep it banded (a band that moves at most two levels a period) is
applied offset by offset (``Offsets`` steps: a few shifted products); other large
axes are one einsum over named dimensions (``Contract``), and a counter that another table needs
before the status step is a gather along its axis (``CounterGather``). An apply costs about (grid size) x (sum of the sizes of
the contracted axes) and a few grid-sized arrays of memory. Tables are stored in the order their
step reads them (``Plan.layouts``; ``with_tables`` takes the spec's order). Each kind of step is
a small class with its own apply and transpose (:mod:`stateworth.rules.steps`); the transpose
runs the steps' transposes backwards: pairwise steps by their written-out transpose, the others
(offsets steps as the dense contraction they stand for) by :func:`jax.linear_transpose` (the
gather becomes a scatter-add).

Shapes: ``mv`` takes ``(n,)`` or ``(n, k)`` and returns the same shape (k right-hand sides).
"""

from __future__ import annotations

import collections
import threading
from dataclasses import dataclass, replace
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from stateworth import config
from stateworth.rules.counters import counter_index
from stateworth.rules.factors import Factor
from stateworth.rules.grid import Grid
from stateworth.rules.pairwise import PairStep, classify
from stateworth.rules.steps import Contract, CounterGather, CycleRoll, Finish, Offsets, Step


@dataclass(frozen=True)
class Plan:
    """The static part of an operator: shapes and the sequence of steps (hashable)."""

    grid_shape: tuple[int, ...]
    steps: tuple[Step, ...]
    #: ``(key, perm)``: the operator stores table ``key`` as ``np.transpose(table, perm)`` (the
    #: order its pairwise step reads); tables not listed are stored as given
    layouts: tuple[tuple[str, tuple[int, ...]], ...] = ()

    @property
    def size(self) -> int:
        return int(np.prod(self.grid_shape, dtype=np.int64))

    def stored(self, key: str, table):
        """``table`` (a factor's table in its own order: given axes, then the next level) as
        the operator stores it."""
        perm = dict(self.layouts).get(key)
        if perm is None or perm == tuple(range(len(perm))):
            return table
        if isinstance(table, np.ndarray):  # known now: numpy, no compile of a transpose kernel
            return np.ascontiguousarray(np.transpose(table, perm))
        return jnp.transpose(table, perm)

    def stored_dims(self, key: str, dims: tuple) -> tuple:
        """The names ``dims`` of a table's axes (its own order) in the stored order."""
        perm = dict(self.layouts).get(key)
        return dims if perm is None else tuple(dims[p] for p in perm)


def build_plan(spec, grid: Grid, factors: list[Factor]) -> Plan:
    """Work out the step sequence symbolically (named dimensions) for a checked spec.

    The frame's dimension order is whatever the steps leave; contractions are einsums over named
    dimensions (no explicit transposes), counters shift in place, and the last step transposes
    to the grid order."""
    kinds = {a.name: a.kind for a in grid.axes}
    status = spec.status_axis

    dims = [a.name if a.kind == "fixed" else a.name + "'" for a in grid.axes]
    pending = [a.name for a in grid.axes if a.kind in ("counter", "cycle")]
    steps: list[Step] = []
    letters: dict[str, str] = {}

    def letter(d: str) -> str:
        if d not in letters:
            letters[d] = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"[len(letters)]
        return letters[d]

    def resolve(d: str) -> None:
        nonlocal dims
        pos = dims.index(d + "'")
        if kinds[d] == "cycle":
            steps.append(CycleRoll(pos))
            dims = dims[:pos] + [d] + dims[pos + 1:]
        else:
            new = [d if x == d + "'" else x for x in dims]
            if status not in new:
                new.insert(new.index(status + "'"), status)
            steps.append(CounterGather(f"index.{d}", pos, new.index(status), new.index(status + "'"),
                                       None if status in dims else new.index(status)))
            dims = new
        pending.remove(d)

    for f in reversed(factors):
        tdims = [g[5:] + "'" if g.startswith("next.") else g for g in f.given] + [f.axis + "'"]
        here = [d for d in pending if d in tdims or (f.axis == status and kinds[d] == "counter")]
        for d in here:
            # a cycle is a roll; a counter needed by a table of another axis is a gather
            if kinds[d] == "cycle" or f.axis != status:
                resolve(d)
        step = _pair_step(spec, f, tdims, dims, [d for d in here if d in pending], status, list(grid.names))
        if step is not None:
            steps.append(step)
            for c, _ in step.counters:
                pending.remove(c)
            dims = list(step.dims_out)
            continue
        for d in [d for d in here if d in pending]:
            resolve(d)
        nxt = f.axis + "'"
        out = [x for x in dims if x != nxt] + [x for x in tdims[:-1] if x not in dims]
        expr = "".join(letter(x) for x in dims) + "," + "".join(letter(x) for x in tdims) + "->" + \
            "".join(letter(x) for x in out)
        # (an axis whose current level an earlier step already brought in is left to einsum)
        offsets = _offsets(spec, f, tdims) if f.axis not in dims else None
        if offsets is not None:
            steps.append(Offsets(f"table.{f.axis}", f.axis, tuple(dims), tuple(tdims), tuple(out), offsets, expr))
        else:
            steps.append(Contract(f"table.{f.axis}", expr))
        dims = out
    for d in list(pending):
        resolve(d)
    # missing current dims: the value does not depend on them -> broadcast
    target = list(grid.names)
    missing = [x for x in target if x not in dims]
    dims_full = dims + missing
    perm = tuple(dims_full.index(x) for x in target)
    steps.append(Finish(perm, len(missing), grid.shape))
    layouts = tuple((st.key, st.perm) for st in steps if isinstance(st, PairStep))
    return Plan(grid.shape, tuple(steps), layouts)


#: a factor too large for pairs whose move rules allow at most this share of its levels as
#: offsets ``j - i`` is applied diagonal by diagonal (:class:`~stateworth.rules.steps.Offsets`). Measured at 3.6 x
#: 10^5 states, float32, a 20-level band moving up to two levels (5 offsets): 0.11 ms a step
#: against 0.29 ms for the einsum, which was then 60 % of an apply
OFFSET_SHARE = 0.5
#: the most level pairs a factor is unrolled into (:mod:`stateworth.rules.pairwise`); a larger
#: axis is contracted by one einsum (compile time grows with the pairs, and the einsum's matrix
#: blocks are no longer tiny)
PAIR_LIMIT = 64


def _pair_step(spec, f: Factor, tdims: list[str], dims: list[str], counters: list[str],
               status: str, grid_names: list[str]) -> PairStep | None:
    """The factor of ``f.axis`` as a :class:`~stateworth.rules.pairwise.PairStep` resolving
    ``counters`` (only for the status factor), or None when it has too many level pairs."""
    a, an = f.axis, f.axis + "'"
    K = len(spec.axis_levels(a))
    res = [x[:-1] if x.endswith("'") and x[:-1] in counters else x for x in dims]
    if counters and status not in res:
        res.insert(res.index(status + "'"), status)
    out = [x for x in res if x != an] + [x for x in tdims[:-1] if x not in res]
    # the result in grid order (a next level just after its current one): the last step then
    # needs no transpose to the grid order, which costs as much as a step when the flat
    # result is a reshape of it
    out.sort(key=lambda x: (grid_names.index(x.rstrip("'")), x.endswith("'")))
    has_i = a in out
    moves = spec.axes[a].moves or {}
    levels = spec.axis_levels(a)
    allowed = np.ones((K, K), dtype=bool)
    if has_i and moves and a in tdims:
        # the table is zero off the allowed moves (checked at compile), so those terms vanish
        for frm, tos in moves.items():
            allowed[levels.index(frm)] = np.isin(levels, tos)
    pairs = [(i, j) for i in (range(K) if has_i else [-1]) for j in range(K) if i < 0 or allowed[i, j]]
    if len(pairs) > PAIR_LIMIT:
        return None
    maps = tuple((c, tuple(classify(counter_index(spec, c)[:, i, j]) for i, j in pairs)) for c in counters)
    # the table is stored with the pair's levels first and the rest in the result's order, so
    # that every term reads a contiguous block in the order it writes
    stored = ([a] if a in tdims else []) + [an] + [d for d in out if d in tdims and d != a]
    perm = tuple(tdims.index(d) for d in stored)
    return PairStep(a, K, tuple(dims), tuple(out), tuple(stored), tuple(pairs), maps, f"table.{a}", perm)


def _offsets(spec, f: Factor, tdims: list[str]) -> tuple[int, ...] | None:
    """The level offsets ``j - i`` that the move rules of ``f.axis`` allow (``i -> j``), when
    the factor is better applied diagonal by diagonal (:class:`~stateworth.rules.steps.Offsets`) than by one einsum:
    the axis is given itself, every level has a move rule, and the distinct offsets are at most
    :data:`OFFSET_SHARE` of its levels. Else None."""
    a = f.axis
    moves = spec.axes[a].moves or {}
    levels = spec.axis_levels(a)
    K = len(levels)
    if a not in tdims[:-1] or set(moves) != set(levels):
        return None
    offs = sorted({levels.index(t) - levels.index(frm) for frm, tos in moves.items() for t in tos})
    if len(offs) > OFFSET_SHARE * K:
        return None
    return tuple(offs)


def _apply_single(plan: Plan, arrays: dict, x: jax.Array) -> jax.Array:
    """``x`` is ``(n,)``: one apply of P."""
    frame = x.reshape(plan.grid_shape)
    for st in plan.steps:
        frame = st.apply(arrays, frame)
    return frame.reshape(-1)


def _apply_transpose_single(plan: Plan, arrays: dict, y: jax.Array) -> jax.Array:
    """``y`` is ``(n,)``: one apply of P^T, the steps' transposes in reverse order."""
    before = []  # the frame each step is applied to (shape and dtype)
    frame = jax.ShapeDtypeStruct(plan.grid_shape, y.dtype)
    for st in plan.steps:
        before.append(frame)
        frame = jax.eval_shape(partial(st.apply, arrays), frame)
    cot = y.reshape(plan.grid_shape)
    for st, b in zip(reversed(plan.steps), reversed(before)):
        cot = st.transpose(arrays, cot, b)
    return cot.reshape(-1)


def _columns(f, x: jax.Array) -> jax.Array:
    """Apply a single-vector map to each column of ``(n, k)``; sequential columns measured
    faster on CPU than a batched frame (the batch dimension defeats XLA's fusion)."""
    if x.ndim == 1:
        return f(x)
    return jax.lax.map(f, x.T).T


# jitted on their own (the plan static): a solver program applies P in several places (the
# Krylov step, the residual, the smoother, the frozen-cluster correction) and in two precisions;
# as nested jits each apply is traced once per precision and lowered as one shared function
@partial(jax.jit, static_argnums=0)
def _apply(plan: Plan, arrays: dict, x: jax.Array) -> jax.Array:
    return _columns(partial(_apply_single, plan, arrays), x)


@partial(jax.jit, static_argnums=0)
def _apply_transpose(plan: Plan, arrays: dict, y: jax.Array) -> jax.Array:
    return _columns(partial(_apply_transpose_single, plan, arrays), y)


@partial(jax.tree_util.register_dataclass, data_fields=["arrays"], meta_fields=["plan", "transposed"])
@dataclass(frozen=True, eq=False)
class GridOperator:
    """The transition operator P of a compiled model (or its transpose), ``(n, n)``: a
    :class:`stateworth.operators.StructuredOperator`.

    ``arrays`` holds the factor tables (``table.<axis>``) and counter index maps
    (``index.<axis>``): the pytree leaves, so a stack of operators from posterior draws can be
    ``vmap``-ed. ``plan`` and ``transposed`` are static (the pytree's structure)."""

    plan: Plan
    arrays: dict[str, jax.Array]
    transposed: bool = False

    @property
    def shape(self) -> tuple[int, int]:
        return (self.plan.size, self.plan.size)

    def mv(self, x: jax.Array) -> jax.Array:
        if self.transposed:
            return _apply_transpose(self.plan, self.arrays, x)
        return _apply(self.plan, self.arrays, x)

    def transpose(self) -> "GridOperator":
        return replace(self, transposed=not self.transposed)

    def astype(self, dtype) -> "GridOperator":
        """The same operator with its factor tables in ``dtype`` (float32 for the inner solves of
        mixed precision); applies then take and return vectors of that type."""
        arrays = {k: (v.astype(dtype) if jnp.issubdtype(v.dtype, jnp.floating) else v) for k, v in self.arrays.items()}
        return replace(self, arrays=arrays)

    def with_tables(self, tables: dict) -> "GridOperator":
        """The same structure with other factor tables (a changed or drawn model)."""
        arrays = dict(self.arrays)
        for k, v in tables.items():
            arrays[f"table.{k}"] = self.plan.stored(f"table.{k}", config.device(v, jnp.float64))
        return replace(self, arrays=arrays)


#: recent (spec, plan, counter index arrays) by (id(spec), grid, factors): a transition change
#: restricted to one fixed cell builds the same block's operator on every query, and working
#: out its plan took ~5 ms of a ~70 ms change at 3.6 x 10^5 states
_PLANS: "collections.OrderedDict[tuple, tuple]" = collections.OrderedDict()
_PLANS_MAX = 32
_PLANS_LOCK = threading.Lock()


def _plan_for(spec, grid: Grid, factors: list[Factor]) -> tuple[Plan, dict]:
    key = (id(spec), grid, tuple(factors))
    with _PLANS_LOCK:
        hit = _PLANS.get(key)
        if hit is not None and hit[0] is spec:  # the same object, not a new one at a reused id
            _PLANS.move_to_end(key)
            return hit[1], hit[2]
    plan = build_plan(spec, grid, factors)
    index = {f"index.{a.name}": config.device(counter_index(spec, a.name)) for a in grid.axes if a.kind == "counter"}
    with _PLANS_LOCK:
        _PLANS[key] = (spec, plan, index)
        while len(_PLANS) > _PLANS_MAX:
            _PLANS.popitem(last=False)
    return plan, index


def make_operator(spec, grid: Grid, factors: list[Factor], tables: dict[str, np.ndarray], *,
                  reuse_plan: bool = False) -> GridOperator:
    """The operator of ``tables`` on ``grid``; ``reuse_plan``: take the plan from a small cache of
    recent ones (for operators built again and again on the same spec object and grid)."""
    config.use_jax()
    if reuse_plan:
        plan, index = _plan_for(spec, grid, factors)
    else:
        plan = build_plan(spec, grid, factors)
        index = {f"index.{a.name}": config.device(counter_index(spec, a.name)) for a in grid.axes if a.kind == "counter"}
    arrays = {f"table.{k}": config.device(plan.stored(f"table.{k}", np.asarray(v, dtype=np.float64)))
              for k, v in tables.items()}
    arrays.update(index)
    return GridOperator(plan, arrays)
