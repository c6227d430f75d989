"""The servicers: ValuationService (queries) and ModelAdminService (loads), on a ModelStore.

Every call takes the store's current snapshot once and answers from it (the version that
answered is in every response). Lookups (values, contrasts, cohort contrasts) are answered in
the calling thread from the solved arrays; calls that must solve (transition changes, marginal
values, read-outs, first use of a finite horizon) go through the bounded :class:`WorkPool`,
cached by the answering version and the request's canonical bytes.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from functools import wraps
from typing import Any, Callable

import numpy as np

from stateworth.errors import QueryError
from stateworth.server import convert as cv
from stateworth.server.errors import LoadError, ServiceError, UnavailableError, invalid, to_status
from stateworth.server.interceptors import gone_code
from stateworth.server.metrics import Metrics
from stateworth.server.store import FAILED, KEPT, LOADED, PREFIX, REMOVED, ModelStore, Served, parse_name
from stateworth.server.work import WorkPool
from stateworth.v1 import admin_service_pb2 as apb
from stateworth.v1 import admin_service_pb2_grpc as agrpc
from stateworth.v1 import valuation_service_pb2 as pb
from stateworth.v1 import valuation_service_pb2_grpc as vgrpc

log = logging.getLogger("stateworth.server")


@dataclass(frozen=True)
class Limits:
    """Request limits: states per batch, stream chunk or cohort; ranked entries per page."""

    max_batch: int = 1_000_000
    max_page: int = 1000


def _note(context, **fields: Any) -> None:
    """Fields for the call's access-log line (model, version, offending field name)."""
    try:
        cur = getattr(context, "_stateworth_fields", None)
        if cur is None:
            cur = {}
            setattr(context, "_stateworth_fields", cur)
        cur.update(fields)
    except AttributeError:  # a context type without attribute support: skip the extra fields
        pass


def _abort(context, err: BaseException) -> None:
    gone = gone_code(context)
    if gone is not None:  # the caller cancelled or its deadline passed: nobody to answer, no fault of ours
        context.abort(gone, "the caller cancelled the call or its deadline passed")
    status, field = to_status(err)
    if field:
        _note(context, field=field)
    if not isinstance(err, (QueryError, ServiceError)):
        log.error("internal error", extra={"fields": {"event": "internal_error", "exception": err.__class__.__name__}},
                  exc_info=False)
    context.abort_with_status(status)


def unary(fn: Callable) -> Callable:
    @wraps(fn)
    def call(self, request, context):
        try:
            return fn(self, request, context)
        except Exception as e:  # noqa: BLE001 - every failure becomes a status, never a crash
            err = e
        _abort(context, err)
    return call


def streaming(fn: Callable) -> Callable:
    @wraps(fn)
    def call(self, request_iterator, context):
        err = None
        try:
            yield from fn(self, request_iterator, context)
            return
        except Exception as e:  # noqa: BLE001
            err = e
        _abort(context, err)
    return call


def _key(kind: str, served: Served, request) -> tuple:
    return (kind, served.name, served.version, request.SerializeToString(deterministic=True))


class ValuationServicer(vgrpc.ValuationServiceServicer):
    def __init__(self, store: ModelStore, pool: WorkPool, limits: Limits) -> None:
        self.store = store
        self.pool = pool
        self.limits = limits

    def _resolve(self, request, context) -> Served:
        served = self.store.snapshot.resolve(request.name, request.version)
        _note(context, model=served.name, version=served.version)
        return served

    def _horizon(self, served: Served, stream: str, horizon: int | None, level: float | None, context) -> None:
        """Solve a finite horizon's values (and draws) once, in the pool; later calls find them."""
        if horizon is None:
            return
        v = served.valuer
        v.unit(stream)  # validates the stream before any work is queued

        def work() -> bool:
            empty = np.zeros(0, dtype=np.int64)
            v.values(empty, stream, horizon)
            if level is not None and v.has_intervals:
                v.draw_values(empty, stream, horizon)
            return True

        self.pool.run(("horizon", served.name, served.version, stream, horizon, level is not None and v.has_intervals),
                      work, context)

    # ---- models -------------------------------------------------------------------------------
    @unary
    def ListModels(self, request, context):
        snap = self.store.snapshot
        out = pb.ListModelsResponse()
        for name in sorted(snap.models):
            versions = sorted(snap.models[name].values(), key=lambda s: (-s.mtime, s.artifact))
            m = out.models.add(name="models/" + name, default_version=snap.defaults[name],
                               default_reason=snap.default_reasons.get(name, ""))
            for s in versions:
                m.versions.append(cv.model_version(s, s.version == snap.defaults[name], full=False))
        return out

    @unary
    def GetModel(self, request, context):
        snap = self.store.snapshot
        served = snap.resolve(request.name, request.version)
        _note(context, model=served.name, version=served.version)
        return pb.GetModelResponse(model=cv.model_version(served, served.version == snap.defaults[served.name]))

    # ---- values -------------------------------------------------------------------------------
    @unary
    def GetValue(self, request, context):
        served = self._resolve(request, context)
        v = served.valuer
        stream, horizon, level = cv.stream_of(served, request.stream), cv.horizon_of(request), cv.level_of(request)
        unit = served.unit(stream)  # validates the stream
        # the map itself is looked up (no dict copy); anything off goes the long way, whose
        # errors name the field, axis or level
        i = served.quick_index(request.state.levels)
        if i is None:
            i = v.index(cv.coords(request.state, "state"))
        self._horizon(served, stream, horizon, level, context)
        interval = None
        if horizon is None and level is None:
            val = float(served.column(stream)[i])
        else:
            idx = np.array([i], dtype=np.int64)
            val = float(served.column(stream)[i] if horizon is None else v.values(idx, stream, horizon)[0])
            if level is not None and v.has_intervals:
                lo, hi = cv.percentile_interval(v.draw_values(idx, stream, horizon), level)
                interval = (float(lo[0]), float(hi[0]))
        resp = pb.GetValueResponse(name=served.resource, version=served.version, stream=stream,
                                   value=cv.figure(val, unit, interval, level), state_index=i,
                                   caution=cv.CAUTION_TEXT)
        if horizon is not None:
            resp.horizon = horizon
        return resp

    @unary
    def BatchGetValues(self, request, context):
        served = self._resolve(request, context)
        v = served.valuer
        stream, horizon, level = cv.stream_of(served, request.stream), cv.horizon_of(request), cv.level_of(request)
        unit = v.unit(stream)
        idx = cv.flat_indices(v, request.states, "states", self.limits.max_batch)
        self._horizon(served, stream, horizon, level, context)
        resp = pb.BatchGetValuesResponse(name=served.resource, version=served.version, stream=stream, unit=unit)
        cv.batch_values(v, idx, stream, horizon, level, resp)
        if level is not None and v.has_intervals:
            resp.interval_level = level
        if horizon is not None:
            resp.horizon = horizon
        return resp

    @streaming
    def StreamValues(self, request_iterator, context):
        served = None
        offset = 0
        for k, chunk in enumerate(request_iterator):
            if served is None:
                served = self._resolve(chunk, context)
                v = served.valuer
                stream, horizon, level = cv.stream_of(served, chunk.stream), cv.horizon_of(chunk), cv.level_of(chunk)
                unit = v.unit(stream)
                self._horizon(served, stream, horizon, level, context)
            elif chunk.name and parse_name(chunk.name) != served.name:
                raise invalid(f"chunk {k} names another model; a stream answers one model (leave name empty after "
                              "the first chunk)", "name")
            elif chunk.version and chunk.version != served.version:
                raise invalid(f"chunk {k} pins version {chunk.version} but the stream is answered by "
                              f"{served.version}", "version")
            idx = cv.flat_indices(v, chunk.states, "states", self.limits.max_batch)
            out = pb.StreamValuesResponse(name=served.resource, version=served.version, offset=offset, unit=unit)
            cv.batch_values(v, idx, stream, horizon, level, out)
            offset += idx.size
            yield out

    # ---- contrasts ----------------------------------------------------------------------------
    @unary
    def GetContrast(self, request, context):
        served = self._resolve(request, context)
        v = served.valuer
        stream, horizon, level = cv.stream_of(served, request.stream), cv.horizon_of(request), cv.level_of(request)
        which = request.WhichOneof("move")
        if which is None:
            raise invalid("move is required: give one of acquisition, plan_change, win_back, engagement_change, "
                          "state_move", "move")
        v.unit(stream)
        self._horizon(served, stream, horizon, level, context)
        m = getattr(request, which)
        kw = dict(stream=stream, horizon=horizon, level=level if level is not None else 0.9)
        if which == "acquisition":
            ans = v.acquisition(cv.coords(m.state, "acquisition.state"), _req(m.plan, "acquisition.plan"), **kw)
        elif which == "plan_change":
            ans = v.plan_change(cv.coords(m.state, "plan_change.state"), _req(m.plan, "plan_change.plan"), **kw)
        elif which == "win_back":
            ans = v.win_back(cv.coords(m.state, "win_back.state"), _req(m.plan, "win_back.plan"), **kw)
        elif which == "engagement_change":
            ans = v.engagement_change(cv.coords(m.state, "engagement_change.state"),
                                      _req(m.axis, "engagement_change.axis"),
                                      _req(m.level, "engagement_change.level"), **kw)
        else:
            ans = v.contrast(cv.coords(m.before, "state_move.before"), cv.coords(m.after, "state_move.after"), **kw)
        resp = pb.GetContrastResponse(name=served.resource, version=served.version, stream=stream, kind=ans.kind,
                                      value=cv.answer_figure(ans, level), details=cv.struct(ans.details),
                                      caution=cv.CAUTION_TEXT)
        if horizon is not None:
            resp.horizon = horizon
        return resp

    @unary
    def GetCohortContrast(self, request, context):
        served = self._resolve(request, context)
        v = served.valuer
        stream, horizon, level = cv.stream_of(served, request.stream), cv.horizon_of(request), cv.level_of(request)
        if not request.after:
            raise invalid("after is required: the axis -> level the cohort moves to (e.g. status: duo)", "after")
        w = cv.weights(v, request.cohort, "cohort", self.limits.max_batch)
        v.unit(stream)
        self._horizon(served, stream, horizon, level, context)
        ans = v.cohort_contrast(w, dict(request.after), stream=stream, horizon=horizon,
                                level=level if level is not None else 0.9)
        resp = pb.GetCohortContrastResponse(name=served.resource, version=served.version, stream=stream,
                                            value=cv.answer_figure(ans, level), details=cv.struct(ans.details),
                                            caution=cv.CAUTION_TEXT)
        if horizon is not None:
            resp.horizon = horizon
        return resp

    # ---- solving calls --------------------------------------------------------------------------
    @unary
    def ComputeTransitionChange(self, request, context):
        from stateworth.valuation import TransitionChange

        served = self._resolve(request, context)
        v = served.valuer
        stream, level = cv.stream_of(served, request.stream), cv.level_of(request)
        if not request.HasField("change"):
            raise invalid("change is required: axis, to, delta and the cells (when)", "change")
        c = request.change
        when: dict[str, list[str]] = {}
        for k, sel in enumerate(c.when):
            if not sel.axis or not sel.levels:
                raise invalid(f"change.when[{k}] needs an axis and at least one level", f"change.when[{k}]")
            when.setdefault(sel.axis, []).extend(sel.levels)
        change = TransitionChange(axis=_req(c.axis, "change.axis"), to=_req(c.to, "change.to"), delta=float(c.delta),
                                  when=when)
        w = cv.weights(v, request.cohort, "cohort", self.limits.max_batch, required=False)
        idx = (cv.flat_indices(v, request.states, "states", self.limits.max_batch)
               if request.states.columns else np.zeros(0, dtype=np.int64))
        v.unit(stream)
        key = _key("change", served, pb.ComputeTransitionChangeRequest(stream=stream, change=c, cohort=request.cohort,
                                                                       interval_level=level or 0.9))
        res = self.pool.run(key, lambda: v.transition_change(change, stream=stream, weights=w,
                                                             level=level if level is not None else 0.9), context)
        resp = pb.ComputeTransitionChangeResponse(
            name=served.resource, version=served.version, changed_version=res.changed_version, stream=stream,
            max_abs_delta=float(np.max(np.abs(res.delta))) if res.delta.size else 0.0, unit=res.unit,
            caution=cv.CAUTION_TEXT, details=cv.struct({"change": res.change, "stats": res.stats}))
        if res.weighted is not None:
            resp.weighted_delta.CopyFrom(cv.figure(res.weighted, res.unit, res.interval, level))
        if idx.size:
            cv.set_doubles(resp, "deltas", res.delta[idx])
            if level is not None and res.state_interval is not None:
                cv.set_doubles(resp, "lower", res.state_interval[0][idx])
                cv.set_doubles(resp, "upper", res.state_interval[1][idx])
        return resp

    def _marginal(self, served: Served, request, stream: str, top: int, context):
        v = served.valuer
        w = cv.weights(v, request.cohort, "cohort", self.limits.max_batch)
        v.unit(stream)
        key = ("marginal", served.name, served.version, stream, top,
               request.cohort.SerializeToString(deterministic=True))
        return self.pool.run(key, lambda: v.marginal(w, stream=stream, top=top), context)

    @unary
    def ListMarginalValues(self, request, context):
        served = self._resolve(request, context)
        stream = cv.stream_of(served, request.stream)
        top = int(request.page_size) or 20
        if top < 0:
            raise invalid(f"page_size must be positive (got {top})", "page_size")
        if top > self.limits.max_page:
            raise cv.LimitError(f"page_size {top} is over this server's limit of {self.limits.max_page}",
                                field="page_size")
        res = self._marginal(served, request, stream, top, context)
        resp = pb.ListMarginalValuesResponse(name=served.resource, version=served.version, stream=stream,
                                             objective=cv.figure(res.objective, res.unit, None, None),
                                             caution=cv.CAUTION_TEXT)
        for rank, e in enumerate(res.entries, start=1):
            resp.entries.add(axis=e.axis, cell=e.cell, to=e.to, probability=e.probability, per_point=e.per_point,
                             gradient=e.gradient, rank=rank)
        return resp

    @unary
    def GetMarginalValue(self, request, context):
        served = self._resolve(request, context)
        v = served.valuer
        stream = cv.stream_of(served, request.stream)
        which = request.WhichOneof("target")
        if which is None:
            raise invalid("target is required: give an entry (axis, cell, to) or a transition (from_state, to_state)",
                          "target")
        if which == "entry":
            cell = _entry_cell(v.model, request.entry)
        else:
            i = v.index(cv.coords(request.transition.from_state, "transition.from_state"))
            j = v.index(cv.coords(request.transition.to_state, "transition.to_state"))
        res = self._marginal(served, request, stream, 1, context)
        resp = pb.GetMarginalValueResponse(name=served.resource, version=served.version, stream=stream,
                                           objective=cv.figure(res.objective, res.unit, None, None),
                                           caution=cv.CAUTION_TEXT)
        if which == "entry":
            from stateworth.valuation.marginal import per_point
            e = request.entry
            table, grad = v.model.tables[e.axis], res.gradients[e.axis]
            resp.entry.CopyFrom(pb.MarginalEntry(axis=e.axis, cell=dict(e.cell), to=e.to,
                                                 probability=float(table[cell]),
                                                 per_point=float(per_point(table, grad)[cell]),
                                                 gradient=float(grad[cell]), rank=0))
        else:
            resp.transition_gradient = res.d_transition(i, j)
        return resp

    @unary
    def ComputeReadout(self, request, context):
        from stateworth.valuation import readout

        snap = self.store.snapshot
        if request.seed < 0:
            raise invalid(f"seed must be 0 or more (got {request.seed}); it picks the pairing of the two arms' draws",
                          "seed")
        if not request.control_version:
            raise invalid("control_version is required (the version fitted on the control arm)", "control_version")
        if not request.treatment_version:
            raise invalid("treatment_version is required (the version fitted on the treatment arm)",
                          "treatment_version")
        control = snap.resolve(request.name, request.control_version, version_field="control_version")
        treatment = snap.resolve(request.name, request.treatment_version, version_field="treatment_version")
        _note(context, model=control.name, version=f"{control.version}..{treatment.version}")
        stream = cv.stream_of(control, request.stream)
        level = cv.level_of(request, 0.9)
        w = cv.weights(control.valuer, request.cohort, "cohort", self.limits.max_batch)
        key = ("readout", control.name, control.version, treatment.version, stream, level, int(request.seed),
               request.cohort.SerializeToString(deterministic=True))
        res = self.pool.run(key, lambda: readout(control.valuer, treatment.valuer, w, stream=stream, level=level,
                                                 seed=int(request.seed)), context)
        explicit = request.HasField("interval_level")
        lv = level if explicit or res.interval is not None else None
        return pb.ComputeReadoutResponse(
            name=control.resource, control_version=control.version, treatment_version=treatment.version,
            stream=stream, difference=cv.figure(res.value, res.unit, res.interval, lv),
            control=cv.figure(res.control_value, res.unit, res.control_interval, lv),
            treatment=cv.figure(res.treatment_value, res.unit, res.treatment_interval, lv),
            long_run=cv.struct(res.long_run), caution=cv.CAUTION_TEXT)


def _req(value: str, field: str) -> str:
    if not value:
        raise invalid(f"{field} is required", field)
    return value


def _entry_cell(model, entry) -> tuple:
    """Index of a factor entry (given levels..., next level) in its table; QueryError names the
    axis, given axis or level at fault."""
    from stateworth.valuation.change import _allowed  # the move rules aligned to the table

    factor = next((f for f in model.factors if f.axis == entry.axis), None)
    if factor is None:
        raise invalid(f"'{entry.axis}' is not a random axis; random axes are "
                      f"{', '.join(f.axis for f in model.factors)}", "entry.axis")
    spec = model.spec
    extra = [k for k in entry.cell if k not in factor.given]
    if extra:
        raise invalid(f"the {entry.axis} factor is not given '{extra[0]}'; its given axes are "
                      f"{', '.join(factor.given) or 'none'}", f"entry.cell[{extra[0]}]")
    idx = []
    for g in factor.given:
        levels = spec.axis_levels(g[5:] if g.startswith("next.") else g)
        if g not in entry.cell:
            raise invalid(f"entry.cell needs a level for every given axis of the {entry.axis} factor; '{g}' is "
                          f"missing ({', '.join(factor.given)})", f"entry.cell[{g}]")
        lv = entry.cell[g]
        if lv not in levels:
            raise invalid(f"'{lv}' is not a level of {g}; levels are {', '.join(levels)}", f"entry.cell[{g}]")
        idx.append(levels.index(lv))
    to_levels = spec.axis_levels(entry.axis)
    if entry.to not in to_levels:
        raise invalid(f"'{entry.to}' is not a level of {entry.axis}; levels are {', '.join(to_levels)}", "entry.to")
    cell = tuple(idx) + (to_levels.index(entry.to),)
    if not bool(_allowed(model, factor)[cell]):
        raise invalid(f"the move to {entry.axis}'={entry.to} is forbidden by the rules in that cell; it has no "
                      "marginal value", "entry.to")
    return cell


class AdminServicer(agrpc.ModelAdminServiceServicer):
    """Admin loads. In a worker of ``stateworth serve --workers N`` (``peers`` set) each load runs
    on every worker through the supervisor and answers once all are done (:mod:`.peers`)."""

    def __init__(self, store: ModelStore, metrics: Metrics, peers=None, timeout: float = 300.0) -> None:
        self.store = store
        self.metrics = metrics
        self.peers = peers
        self.timeout = timeout

    def _default(self, served: Served) -> bool:
        return self.store.snapshot.defaults.get(served.name) == served.version

    def run_local(self, op: str, artifact: str):
        """Do a load in this process: ``"load"`` one artifact, ``"reload"`` the directory."""
        try:
            out = self.store.load_one(artifact) if op == "load" else self.store.reload_all()
        except (LoadError, ServiceError, QueryError) as e:
            self.metrics.reload(False)
            log.warning(f"{op} failed", extra={"fields": {"event": f"{op}_failed", "error": e.__class__.__name__}})
            raise
        # a reload that left a folder on its previous version counts as failed too
        self.metrics.reload(op == "load" or not out.failed)
        return out

    def _run(self, op: str, artifact: str = ""):
        if self.peers is None:
            return self.run_local(op, artifact)
        local, results = self.peers.coordinate(op, artifact, self.timeout)
        if results is None or local is None:
            raise UnavailableError(f"the workers did not all finish the {op} within {self.timeout:.0f} s; "
                                   "retry, or see the server log")
        kind, value = local
        failed = [r for r in results if not r.get("ok")]
        if failed and len(failed) < len(results):  # mixed: say so, whichever side this worker is on
            r = failed[0]
            raise UnavailableError(f"the {op} succeeded on {len(results) - len(failed)} of {len(results)} workers; "
                                   f"worker {r.get('worker')}: {r.get('error')}; the failed workers restart from the "
                                   "model directory; retry to confirm")
        if kind == "err":  # failed everywhere: nothing changed, the error is this worker's own
            raise value
        return value

    @unary
    def LoadModel(self, request, context):
        served, replaced = self._run("load", request.artifact)
        _note(context, model=served.name, version=served.version)
        return apb.LoadModelResponse(model=cv.model_version(served, self._default(served)), replaced=replaced)

    @unary
    def ReloadModels(self, request, context):
        report = self._run("reload")
        snap = report.snapshot
        resp = apb.ReloadModelsResponse(loaded_count=report.loaded, kept_count=report.kept,
                                        dropped_count=report.dropped, failed_count=report.failed)
        for s in snap.all():
            resp.models.append(cv.model_version(s, snap.defaults[s.name] == s.version, full=False))
        for o in report.outcomes:
            resp.outcomes.add(artifact=o.artifact, result=_RESULTS[o.result], name=PREFIX + o.name if o.name else "",
                              version=o.version, error=o.error)
        if report.failed:
            _note(context, failed=report.failed)
        return resp


_RESULTS = {LOADED: apb.RELOAD_RESULT_LOADED, KEPT: apb.RELOAD_RESULT_KEPT, FAILED: apb.RELOAD_RESULT_FAILED,
            REMOVED: apb.RELOAD_RESULT_REMOVED}
