"""The steps of a grid operator's plan: one small typed class per kind.

A plan (:func:`stateworth.rules.grid_operator.build_plan`) applies ``P`` to ``x`` as a sequence
of steps on a *frame*, ``x`` viewed as an array with one named dimension per axis (``"x'"`` an
axis at its next level, ``"x"`` at its current one; fixed axes are the same now and next). Each
step is a frozen dataclass of static data (hashable: the plan is the static part of the
operator's pytree) with two methods:

* ``apply(arrays, frame)``: the step, a linear map of the frame; ``arrays`` holds the operator's
  factor tables (``"table.<axis>"``) and counter index maps (``"index.<axis>"``) by key;
* ``transpose(arrays, cotangent, before)``: its transpose, from a cotangent of the step's result
  to one of the frame it was applied to (``before``: that frame's shape and dtype, a
  :class:`jax.ShapeDtypeStruct`). ``P^T`` runs the steps' transposes in reverse order.

The kinds:

=====================  ==========================================================================
:class:`PairStep`       a small factor, level pair by level pair, with the counters that move
                        with the status resolved inside it (:mod:`stateworth.rules.pairwise`;
                        transpose written out)
:class:`Offsets`        a large banded factor, offset by offset (transpose: the dense einsum's)
:class:`Contract`       any other factor, one einsum (transpose: :func:`jax.linear_transpose`)
:class:`CounterGather`  a counter's next level as a gather along its axis, where a table other
                        than the status one needs the current counter
:class:`CycleRoll`      a cycle advancing by one (a roll)
:class:`Finish`         the result to the grid order, broadcast along axes it does not depend on
=====================  ==========================================================================
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial
import jax
import jax.numpy as jnp
import numpy as np

from stateworth.rules.pairwise import PairStep

__all__ = ["Contract", "CounterGather", "CycleRoll", "Finish", "Offsets", "PairStep", "Step"]


def _linear_transpose(apply, arrays: dict, cotangent: jax.Array, before: jax.ShapeDtypeStruct) -> jax.Array:
    """The transpose of the linear map ``frame -> apply(arrays, frame)`` at ``cotangent``."""
    return jax.linear_transpose(partial(apply, arrays), before)(cotangent)[0]


@dataclass(frozen=True)
class Contract:
    """A factor contracted by one einsum: ``expr`` reads (frame, table) and writes the result
    over named dimensions (the table's next level summed out, its given axes brought in)."""

    key: str  # "table.<axis>"
    expr: str

    def apply(self, arrays: dict, frame: jax.Array) -> jax.Array:
        return jnp.einsum(self.expr, frame, arrays[self.key])

    def transpose(self, arrays: dict, cotangent: jax.Array, before: jax.ShapeDtypeStruct) -> jax.Array:
        return _linear_transpose(self.apply, arrays, cotangent, before)


@dataclass(frozen=True)
class Offsets:
    """A factor whose move rules keep it banded, applied offset by offset:

        ``out[.., i, ..] = sum_o T[.., i, i + o] x[.., i + o, ..]``

    over the allowed ``offsets`` ``o = j - i`` (ascending), a few shifted elementwise products
    that XLA fuses into one pass over the frame, where a dense einsum costs the axis's full
    length per state. ``dims``, ``tdims``, ``out``: the frame's, the table's (its own order:
    given axes, then ``axis'``) and the result's dimension names; ``expr``: the same contraction
    as one einsum (for the transpose)."""

    key: str  # "table.<axis>"
    axis: str
    dims: tuple[str, ...]
    tdims: tuple[str, ...]
    out: tuple[str, ...]
    offsets: tuple[int, ...]
    expr: str

    def apply(self, arrays: dict, frame: jax.Array) -> jax.Array:
        table = arrays[self.key]
        dims, tdims, out, offsets = list(self.dims), list(self.tdims), list(self.out), self.offsets
        a = self.axis
        nxt = a + "'"
        K = table.shape[-1]
        lo, hi = max(0, -offsets[0]), max(0, offsets[-1])
        # the table with the current level just before the next one, padded so that every
        # diagonal has K entries (zero where i + o falls off the axis)
        t_dims = [d for d in tdims[:-1] if d != a] + [a, nxt]
        t = jnp.transpose(table, [tdims.index(d) for d in t_dims])
        t = jnp.pad(t, [(0, 0)] * (t.ndim - 1) + [(lo, hi)])
        p = dims.index(nxt)
        pad = [(0, 0)] * frame.ndim
        pad[p] = (lo, hi)
        xp = jnp.pad(frame, pad)
        x_dims = [a if d == nxt else d for d in dims]
        d_dims = t_dims[:-1]
        total = None
        for o in offsets:
            diag = jnp.diagonal(t, offset=o + lo, axis1=-2, axis2=-1)  # T[.., i, i + o], (.., K)
            shifted = jax.lax.slice_in_dim(xp, o + lo, o + lo + K, axis=p)  # x[.., i + o, ..]
            term = _arranged(shifted, x_dims, out) * _arranged(diag, d_dims, out)
            total = term if total is None else total + term
        return total

    def transpose(self, arrays: dict, cotangent: jax.Array, before: jax.ShapeDtypeStruct) -> jax.Array:
        # by the dense contraction's transpose: the shifted form's (written out, or by
        # linear_transpose) measured 1.6-3x slower than this at 3.6 x 10^5 states
        return _linear_transpose(self._dense, arrays, cotangent, before)

    def _dense(self, arrays: dict, frame: jax.Array) -> jax.Array:
        """The same map as :meth:`apply`, as one einsum over the whole axis."""
        return jnp.einsum(self.expr, frame, arrays[self.key])


def _arranged(x: jax.Array, have: list[str], out: list[str]) -> jax.Array:
    """``x`` with named dims ``have`` transposed to their order in ``out``, with size-1 dims
    where ``out`` has a name that ``have`` lacks (ready to broadcast)."""
    x = jnp.transpose(x, [have.index(d) for d in out if d in have])
    return x.reshape([x.shape[[d for d in out if d in have].index(d)] if d in have else 1 for d in out])


@dataclass(frozen=True)
class CounterGather:
    """A counter's next level as a gather along its axis: ``c' = idx[c, s, s']`` from the
    counter's index map ``(C, S, S')`` (next level from level, status, next status). Used where a
    table other than the status one needs the current counter; next to the status factor,
    :class:`PairStep` resolves counters as shifts and resets instead.

    ``pos``: the counter's dimension in the frame (its next level before, its current level
    after); ``status_pos``, ``next_status_pos``: the status dimensions in the result;
    ``insert_status``: where the current status dimension is added to the frame first, or None
    when the frame has it already."""

    key: str  # "index.<counter>"
    pos: int
    status_pos: int
    next_status_pos: int
    insert_status: int | None

    def apply(self, arrays: dict, frame: jax.Array) -> jax.Array:
        if self.insert_status is not None:
            frame = jnp.expand_dims(frame, self.insert_status)
        idx = arrays[self.key]
        shape = [1] * frame.ndim
        shape[self.pos], shape[self.status_pos], shape[self.next_status_pos] = idx.shape
        order = np.argsort([self.pos, self.status_pos, self.next_status_pos])
        idx = jnp.transpose(idx, tuple(order)).reshape(shape)
        return jnp.take_along_axis(frame, idx, axis=self.pos, mode="clip")

    def transpose(self, arrays: dict, cotangent: jax.Array, before: jax.ShapeDtypeStruct) -> jax.Array:
        # the gather becomes a scatter-add
        return _linear_transpose(self.apply, arrays, cotangent, before)


@dataclass(frozen=True)
class CycleRoll:
    """A cycle (calendar month, ...) advancing by one level a period: the value at level ``c``
    reads the frame at ``c + 1`` (mod the cycle's length) along dimension ``pos``."""

    pos: int

    def apply(self, arrays: dict, frame: jax.Array) -> jax.Array:
        return jnp.roll(frame, -1, axis=self.pos)

    def transpose(self, arrays: dict, cotangent: jax.Array, before: jax.ShapeDtypeStruct) -> jax.Array:
        return _linear_transpose(self.apply, arrays, cotangent, before)


@dataclass(frozen=True)
class Finish:
    """The last step: the frame transposed to the grid order by ``perm`` after ``n_missing``
    size-1 dimensions are appended for the current axes it does not have (the value does not
    depend on them), then broadcast to ``grid_shape``."""

    perm: tuple[int, ...]
    n_missing: int
    grid_shape: tuple[int, ...]

    def apply(self, arrays: dict, frame: jax.Array) -> jax.Array:
        if self.n_missing:
            frame = frame.reshape(frame.shape + (1,) * self.n_missing)
        frame = jnp.transpose(frame, self.perm)
        return jnp.broadcast_to(frame, self.grid_shape)

    def transpose(self, arrays: dict, cotangent: jax.Array, before: jax.ShapeDtypeStruct) -> jax.Array:
        return _linear_transpose(self.apply, arrays, cotangent, before)


#: any step of a plan
Step = PairStep | Offsets | Contract | CounterGather | CycleRoll | Finish
