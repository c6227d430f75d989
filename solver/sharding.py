"""Solving across devices: the grid sharded along its first fixed axis.

Fixed axes (markets, channels) never change, so P is block-diagonal over their levels and the
operator apply needs no communication when each device holds whole blocks: every step of the
apply (einsum, gather) keeps the fixed dimensions as batch dimensions. The only cross-device
traffic per iteration is the solver's global reductions (dot products and norms in GMRES, the
max-norm residual), which XLA turns into all-reduces. The same code runs on one CPU, on several
local devices (``XLA_FLAGS=--xla_force_host_platform_device_count=N`` on a CPU host), and on several
hosts after ``jax.distributed.initialize`` (see README, "Past one machine").

Uneven blocks: when the first fixed axis's size is not a multiple of the device count it is
*padded* with copies of its last level (valid tables, zero rewards) up to the next multiple; the
padded states are dropped from the answer. Padding is reported in the solution notes. A fixed
axis with fewer levels than devices is refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import jax
import numpy as np
from jax.sharding import Mesh, NamedSharding, PartitionSpec

from stateworth.errors import QueryError
from stateworth import config


@dataclass
class ShardPlan:
    """What :func:`shard_model` did: the (possibly padded) model, the mesh and how to map back."""

    model: object  # CompiledModel on the padded grid
    mesh: Mesh
    axis: str
    original_size: int
    padded_size: int
    keep: np.ndarray  # flat indices of the padded grid that are real states, in original order

    @property
    def note(self) -> str:
        d = self.mesh.devices.size
        if self.padded_size == self.original_size:
            return f"sharded over {d} devices along '{self.axis}' ({self.original_size // d} levels each)"
        return (f"sharded over {d} devices along '{self.axis}': padded it from {self.original_size} to "
                f"{self.padded_size} levels (copies of the last level, zero rewards) so that each device "
                f"holds {self.padded_size // d}")

    def pad_vector(self, x: np.ndarray) -> np.ndarray:
        out = np.zeros((self.model.n_states,) + x.shape[1:])
        out[self.keep] = x
        return out

    def row_sharding(self) -> NamedSharding:
        return NamedSharding(self.mesh, PartitionSpec("blocks"))


def local_devices(count: int):
    devs = jax.devices()
    if count < 1:
        raise QueryError(f"devices must be at least 1 (got {count})", field="devices")
    if count > len(devs):
        raise QueryError(
            f"asked for {count} devices but only {len(devs)} {devs[0].platform.upper()} device(s) are present; "
            f"use --devices {len(devs)} or fewer (on a CPU host, XLA_FLAGS=--xla_force_host_platform_device_count="
            f"{count} makes {count} host devices)", field="devices")
    return devs[:count]


def shard_model(model, count: int) -> ShardPlan:
    """Pad ``model`` along its first fixed axis to a multiple of ``count`` and build the mesh."""
    config.use_jax()
    from stateworth.rules import compile_model, parse_spec

    devices = local_devices(count)
    fixed = [a for a in model.grid.axes if a.kind == "fixed"]
    if not fixed:
        raise QueryError("the model has no fixed axis to shard along; solve it on one device "
                         "(omit --devices) or add a fixed axis such as market", field="devices")
    ax = fixed[0]
    if ax.size < count:
        raise QueryError(f"fixed axis '{ax.name}' has {ax.size} levels, too few to shard over {count} devices; "
                         f"use --devices {ax.size} or fewer", field="devices")
    padded = -(-ax.size // count) * count
    mesh = Mesh(np.array(devices), ("blocks",))
    if padded == ax.size:
        return ShardPlan(model, mesh, ax.name, ax.size, padded, np.arange(model.n_states))
    extra = [f"_pad{i}" for i in range(padded - ax.size)]
    doc = model.spec.canonical()
    doc["axes"][ax.name]["levels"] = list(ax.levels) + extra
    last = ax.levels[-1]
    for stream in doc.get("rewards", {}).values():
        for plan, val in stream.get("price", {}).items():
            if isinstance(val, dict) and last in val:
                for e in extra:
                    val[e] = val[last]
    spec = parse_spec(doc, source=f"{model.name} (padded for sharding)")
    idx = np.minimum(np.arange(padded), ax.size - 1)
    tables = {}
    for f in model.factors:
        t = model.tables[f.axis]
        for d, g in enumerate(f.given):
            if g == ax.name:
                t = np.take(t, idx, axis=d)
        tables[f.axis] = t
    big = compile_model(spec, tables, source=spec.model.name, check=False)
    # real states of the padded grid, in the original flat order (the fixed axis leads)
    keep = np.arange(model.n_states)
    return ShardPlan(big, mesh, ax.name, ax.size, padded, keep)


def put_sharded(plan: ShardPlan, x):
    """Place a ``(n, ...)`` array with its rows split across the mesh."""
    return jax.device_put(x, plan.row_sharding())


def put_operator(plan: ShardPlan, op):
    """Place the operator's tables: sharded along the first fixed axis where they have it."""
    from stateworth.rules.grid_operator import GridOperator

    arrays = {}
    given = {f"table.{f.axis}": op.plan.stored_dims(f"table.{f.axis}", tuple(f.given) + (f"next.{f.axis}",))
             for f in plan.model.factors}
    for k, v in op.arrays.items():
        g = given.get(k, ())
        if plan.axis in g:
            spec = [None] * v.ndim
            spec[list(g).index(plan.axis)] = "blocks"
            arrays[k] = jax.device_put(v, NamedSharding(plan.mesh, PartitionSpec(*spec)))
        else:
            arrays[k] = jax.device_put(v, NamedSharding(plan.mesh, PartitionSpec()))
    return GridOperator(op.plan, arrays, op.transposed)


def put_preconditioner(plan: ShardPlan, pc):
    """The coarse inverse blocks ``(F, K, K)`` split along F (the fixed cells) like the grid."""
    from stateworth.solver.preconditioner import TwoLevel

    inv = jax.device_put(pc.inv, NamedSharding(plan.mesh, PartitionSpec("blocks")))
    return TwoLevel(pc.coarse, inv, pc.smooth)
