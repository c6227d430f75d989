"""Conversions between stateworth.v1 messages and the valuation layer's inputs and answers.

Request parsing validates shapes and fields (naming the request field at fault); the valuation
layer validates meaning (axes, levels, moves) and names the axis or level. No valuation
mathematics here: states become flat indices, cohorts become weight vectors, answers become
messages.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np
from google.protobuf import struct_pb2, timestamp_pb2

from stateworth.server.errors import LimitError, invalid
from stateworth.v1 import model_pb2, valuation_service_pb2 as pb
from stateworth.v1.packed import set_doubles
from stateworth.valuation import CAUTION, percentile_interval

DEFAULT_STREAM = "revenue"
#: longest finite horizon served (periods); longer ones are refused as a work limit
MAX_HORIZON = 1200


def _json_ready(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _json_ready(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_json_ready(v) for v in x]
    if isinstance(x, np.ndarray):
        return _json_ready(x.tolist())
    if isinstance(x, np.generic):
        return _json_ready(x.item())
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def struct(doc: Mapping[str, Any] | None) -> struct_pb2.Struct:
    s = struct_pb2.Struct()
    if doc:
        s.update(_json_ready(dict(doc)))
    return s


def stream_of(served, stream: str) -> str:
    """The request's stream, or the default ("revenue", else the first solved stream)."""
    if stream:
        return stream
    streams = served.valuer.streams
    return DEFAULT_STREAM if DEFAULT_STREAM in streams else streams[0]


def horizon_of(request) -> int | None:
    if not request.HasField("horizon"):
        return None
    h = int(request.horizon)
    if h < 0:
        raise invalid(f"horizon must be a non-negative number of periods (got {h}); leave it unset for the "
                      "infinite horizon", "horizon")
    if h > MAX_HORIZON:
        raise LimitError(f"horizon {h} is longer than this server serves ({MAX_HORIZON} periods); leave it unset "
                         "for the infinite horizon", field="horizon")
    return h


def level_of(request, default: float | None = None) -> float | None:
    """The interval coverage asked for (None: no interval)."""
    if not request.HasField("interval_level"):
        return default
    x = float(request.interval_level)
    if not (0.0 < x < 1.0) or not math.isfinite(x):
        raise invalid(f"interval_level must lie strictly between 0 and 1, e.g. 0.9 (got {x})", "interval_level")
    return x


def coords(state: pb.State, field: str) -> dict[str, str]:
    if not state.levels:
        raise invalid(f"{field} is required: give one level per axis (levels: {{axis: level}})", field)
    return dict(state.levels)


def flat_indices(valuer, batch: pb.StateBatch, field: str, max_states: int) -> np.ndarray:
    """Flat state indices of a columnar batch (validated; INVALID_ARGUMENT names the column)."""
    grid = valuer.model.grid
    cols: dict[str, np.ndarray | list] = {}
    length = None
    for k, col in enumerate(batch.columns):
        where = f"{field}.columns[{k}]"
        if col.axis in cols:
            raise invalid(f"axis '{col.axis}' has two columns; give each axis once", f"{where}.axis")
        if col.levels and col.codes:
            raise invalid(f"column for '{col.axis}' has both levels and codes; give one of them", where)
        n = len(col.codes) if col.codes else len(col.levels)
        if length is None:
            length = n
        elif n != length:
            raise invalid(f"column for '{col.axis}' has {n} entries but the first column has {length}; give one "
                          "level per state on every axis", where)
        if n > max_states:
            raise LimitError(f"{n} states in one request, over this server's batch limit of {max_states}; split "
                             "the batch or use StreamValues", field=field)
        cols[col.axis] = np.asarray(col.codes, dtype=np.int64) if col.codes else list(col.levels)
    if not cols:
        raise invalid(f"{field} is required: one column per axis ({', '.join(grid.names)})", field)
    if length == 0:
        return np.zeros(0, dtype=np.int64)
    return valuer.index_many(cols)


def weights(valuer, cohort: pb.Cohort, field: str, max_states: int, required: bool = True) -> np.ndarray | None:
    """Cohort -> dense ``(n,)`` weights for the valuation layer (which normalises them)."""
    if not cohort.states.columns:
        if required:
            raise invalid(f"{field} is required: give the cohort's states (and optional weights)", field)
        return None
    idx = flat_indices(valuer, cohort.states, f"{field}.states", max_states)
    if idx.size == 0:
        raise invalid(f"{field}.states is empty; a cohort needs at least one state", f"{field}.states")
    if cohort.weights:
        w = np.asarray(cohort.weights, dtype=np.float64)
        if w.size != idx.size:
            raise invalid(f"{field}.weights has {w.size} entries for {idx.size} states; give one weight per state "
                          "or none", f"{field}.weights")
        bad = ~np.isfinite(w) | (w < 0)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise invalid(f"weight {i} is {w[i]}; weights must be finite and non-negative", f"{field}.weights[{i}]")
        if not w.sum() > 0:
            raise invalid("the weights are all zero; give some state a positive weight", f"{field}.weights")
    else:
        w = np.ones(idx.size)
    return np.bincount(idx, weights=w, minlength=valuer.model.n_states)


def figure(value: float, unit: str, interval: tuple[float, float] | None, level: float | None) -> pb.Figure:
    f = pb.Figure(value=float(value), unit=unit)
    if interval is not None and level is not None:
        f.interval.CopyFrom(pb.Interval(lower=float(interval[0]), upper=float(interval[1]), level=float(level)))
    return f


def answer_figure(ans, level: float | None) -> pb.Figure:
    return figure(ans.value, ans.unit, ans.interval, level)


def batch_values(valuer, idx: np.ndarray, stream: str, horizon: int | None, level: float | None, msg,
                 lower: str = "lower", upper: str = "upper") -> None:
    """Fill ``values`` (and intervals) of ``msg`` for flat states ``idx`` (vectorised)."""
    set_doubles(msg, "values", valuer.values(idx, stream, horizon))
    if level is not None and valuer.has_intervals and idx.size:
        lo, hi = percentile_interval(valuer.draw_values(idx, stream, horizon), level)
        set_doubles(msg, lower, lo)
        set_doubles(msg, upper, hi)


# ---- model descriptions -------------------------------------------------------------------------
def model_version(served, default: bool, full: bool = True) -> model_pb2.ModelVersion:
    v = served.valuer
    m = v.model
    sol = v.solve_stats
    mv = model_pb2.ModelVersion(name=served.resource, version=served.version, content_hash=m.hash,
                                artifact=served.artifact, default_version=default, state_count=m.n_states,
                                currency=m.currency)
    if full:
        for ax in m.grid.axes:
            mv.axes.add(name=ax.name, kind=ax.kind, levels=list(ax.levels))
        for s in v.streams:
            mv.reward_streams.add(name=s, unit=m.unit(s))
        spec = m.spec
        mv.discounting.CopyFrom(model_pb2.Discounting(beta=float(m.beta), period=spec.model.period,
                                                      spec=struct(spec.model.discount.model_dump())))
        mv.solve_statistics.CopyFrom(model_pb2.SolveStatistics(
            method=str(sol.get("method", "")), status=str(sol.get("status", "")),
            iterations=int(sol.get("iterations", 0)), operator_applies=int(sol.get("operator_applies", 0)),
            residual=float(sol.get("residual") or 0.0),
            build_seconds=float(served.build_seconds), draw_count=int(v.n_draws)))
        mv.fit_diagnostics.CopyFrom(struct(summary(served.diagnostics)))
    ts = timestamp_pb2.Timestamp()
    ts.FromNanoseconds(int(served.load_time * 1e9))
    mv.load_time.CopyFrom(ts)
    return mv


def summary(doc: Mapping[str, Any], depth: int = 0) -> dict[str, Any]:
    """A compact summary of fit diagnostics: scalars and short lists kept, long arrays reduced to
    their length (the artifact holds the full document)."""
    out: dict[str, Any] = {}
    for k, v in doc.items():
        if isinstance(v, Mapping):
            out[k] = summary(v, depth + 1) if depth < 2 else f"{len(v)} entries"
        elif isinstance(v, (list, tuple)):
            out[k] = _json_ready(list(v)) if len(v) <= 20 and all(
                isinstance(x, (int, float, str, bool)) or x is None for x in v) else f"{len(v)} entries"
        elif isinstance(v, (int, float, str, bool)) or v is None:
            out[k] = _json_ready(v)
    return out


CAUTION_TEXT = CAUTION
