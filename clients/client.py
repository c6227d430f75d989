"""A typed Python client for the stateworth gRPC service: one method per call.

::

    from stateworth.clients.client import Client
    with Client("127.0.0.1:50051", token="...") as c:
        r = c.value("fitness-demo", {"market": "harbor", "tenure": "0", "status": "prospect", ...})
        print(r.version, r.value.value, r.value.unit)

* Every method returns the call's response message (``stateworth.v1`` types, with ``.pyi``
  stubs for editors); batch values come back as ``np.asarray(response.values)``.
* Deadlines by default: ``timeout`` (10 s) for lookups, ``solve_timeout`` (120 s) for calls that
  solve (transition changes, marginal values, read-outs, loads).
* UNAVAILABLE (server starting, restarting, or no model loaded yet) is retried by gRPC itself
  (its retry policy, given in the channel's service config: :func:`service_config`) with
  exponential backoff and jitter, ``retries`` times (at most 4: gRPC allows 5 attempts), within
  the call's deadline. Nothing else is retried, and neither is the streaming call.
* Failures raise :class:`CallError` subclasses (``InvalidArgument``, ``NotFound``...), which are
  :class:`~stateworth.errors.StateworthError` s carrying the status code, the message and the
  field violations the server attached (``err.field``, ``err.violations``).
* Several addresses (replicas) are balanced round-robin by gRPC itself (``round_robin`` in the
  same service config).

Figures are model-based estimates under the model's causal assumptions, not accounting figures.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

import grpc
import numpy as np
from google.rpc import error_details_pb2
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_status import rpc_status

from stateworth.errors import StateworthError
from stateworth.v1 import admin_service_pb2 as apb
from stateworth.v1 import admin_service_pb2_grpc as agrpc
from stateworth.v1 import model_pb2
from stateworth.v1 import valuation_service_pb2 as pb
from stateworth.v1 import valuation_service_pb2_grpc as vgrpc
from stateworth.v1.packed import field_bytes, packed_codes

Columns = Mapping[str, "Sequence[str] | np.ndarray"]


# ---- errors -----------------------------------------------------------------------------------
class CallError(StateworthError):
    """A call the server refused or could not answer. ``code`` (grpc.StatusCode), ``message``,
    ``violations`` (list of (field, description)), ``field`` (the first violation's field)."""

    def __init__(self, code: grpc.StatusCode, message: str, violations: list[tuple[str, str]] | None = None) -> None:
        self.code = code
        self.violations = list(violations or [])
        self.field = self.violations[0][0] if self.violations else None
        where = f"{code.name}" + (f" [{self.field}]" if self.field else "")
        super().__init__(message, where=where)


class InvalidArgument(CallError):
    """INVALID_ARGUMENT: the request names an unknown axis or level, or a field is wrong."""


class NotFound(CallError):
    """NOT_FOUND: unknown model, version or artifact."""


class ResourceExhausted(CallError):
    """RESOURCE_EXHAUSTED: over a batch, message or work limit."""


class Unauthenticated(CallError):
    """UNAUTHENTICATED: missing or wrong token."""


class PermissionDenied(CallError):
    """PERMISSION_DENIED: the token does not allow this call (admin calls)."""


class DeadlineExceeded(CallError):
    """DEADLINE_EXCEEDED: the deadline passed first."""


class Unavailable(CallError):
    """UNAVAILABLE after the retries: server down, starting, or without a model."""


class FailedPrecondition(CallError):
    """FAILED_PRECONDITION: e.g. a load of a bad artifact (the serving models are unchanged)."""


_BY_CODE = {grpc.StatusCode.INVALID_ARGUMENT: InvalidArgument, grpc.StatusCode.NOT_FOUND: NotFound,
            grpc.StatusCode.RESOURCE_EXHAUSTED: ResourceExhausted, grpc.StatusCode.UNAUTHENTICATED: Unauthenticated,
            grpc.StatusCode.PERMISSION_DENIED: PermissionDenied, grpc.StatusCode.DEADLINE_EXCEEDED: DeadlineExceeded,
            grpc.StatusCode.UNAVAILABLE: Unavailable, grpc.StatusCode.FAILED_PRECONDITION: FailedPrecondition}


def error_from(err: grpc.RpcError) -> CallError:
    """Map a grpc.RpcError to a :class:`CallError` subclass with the rich status' field details."""
    code = err.code() if hasattr(err, "code") else grpc.StatusCode.UNKNOWN
    message = (err.details() if hasattr(err, "details") else str(err)) or code.name
    violations: list[tuple[str, str]] = []
    try:
        st = rpc_status.from_call(err)
    except Exception:  # noqa: BLE001 - a malformed details payload must not hide the error itself
        st = None
    if st is not None:
        for d in st.details:
            if d.Is(error_details_pb2.BadRequest.DESCRIPTOR):
                br = error_details_pb2.BadRequest()
                d.Unpack(br)
                violations += [(v.field, v.description) for v in br.field_violations]
    return _BY_CODE.get(code, CallError)(code, message, violations)


# ---- request helpers --------------------------------------------------------------------------
def resource(model: str) -> str:
    """``"fitness-demo"`` or ``"models/fitness-demo"`` -> ``"models/fitness-demo"``."""
    return model if model.startswith("models/") else "models/" + model


def state(coords: Mapping[str, Any]) -> pb.State:
    return pb.State(levels={str(k): str(v) for k, v in coords.items()})


def batch(columns: Columns) -> pb.StateBatch:
    """Columns (axis -> level names, or integer level codes as a numpy array) -> StateBatch.
    Integer arrays take a fast path (packed encoding built with numpy)."""
    out = pb.StateBatch()
    for axis, col in columns.items():
        arr = col if isinstance(col, np.ndarray) else None
        if arr is not None and arr.dtype.kind in "iu":
            c = out.columns.add()
            c.MergeFromString(field_bytes(1, axis.encode()) + packed_codes(3, arr))
        else:
            out.columns.add(axis=axis, levels=[str(x) for x in col])
    return out


def cohort(columns: Columns, weights: Sequence[float] | np.ndarray | None = None) -> pb.Cohort:
    c = pb.Cohort(states=batch(columns))
    if weights is not None:
        c.weights.extend(np.asarray(weights, dtype=np.float64).tolist())
    return c


def _opt(request, **kw) -> None:
    for k, v in kw.items():
        if v is not None:
            setattr(request, k, v)


# ---- the channel's service config ---------------------------------------------------------------
#: gRPC clamps a retry policy's maxAttempts to this (the first attempt included)
MAX_ATTEMPTS = 5


def unary_methods() -> list[dict[str, str]]:
    """The service config's names of every unary method the client calls (the streaming ones
    are not retried: a retried stream would send its chunks again)."""
    return [{"service": svc.full_name, "method": m.name}
            for file in (pb.DESCRIPTOR, apb.DESCRIPTOR, health_pb2.DESCRIPTOR)
            for svc in file.services_by_name.values()
            for m in svc.methods if not (m.client_streaming or m.server_streaming)]


def _duration(seconds: float) -> str:
    return f"{seconds:.6f}s"  # a protobuf JSON Duration


def service_config(retries: int = 4, backoff: float = 0.05, max_backoff: float = 2.0,
                   balance: bool = False) -> dict[str, Any]:
    """The gRPC service config of the client's channels (passed as ``grpc.service_config``).

    ``retries`` > 0: a retry policy for UNAVAILABLE on every unary method, ``retries + 1``
    attempts (at most :data:`MAX_ATTEMPTS`), the n-th retry after a random pause in
    ``[0, min(backoff * 2**(n-1), max_backoff)]`` seconds (gRPC's jitter), all within the call's
    deadline. ``balance``: the ``round_robin`` policy over the addresses the target resolves to.
    See gRPC's "Retry design" (A6) and "Service config" documents."""
    if retries < 0 or retries >= MAX_ATTEMPTS:
        raise StateworthError(f"retries must be 0 to {MAX_ATTEMPTS - 1} (gRPC makes at most {MAX_ATTEMPTS} attempts "
                              f"of a call); got {retries}", where="retries")
    if retries and not (0 < backoff <= max_backoff):
        raise StateworthError(f"backoff must be positive and at most max_backoff ({max_backoff} s); got {backoff}",
                              where="backoff")
    config: dict[str, Any] = {}
    if balance:
        config["loadBalancingConfig"] = [{"round_robin": {}}]
    if retries:
        config["methodConfig"] = [{
            "name": unary_methods(),
            "retryPolicy": {"maxAttempts": retries + 1, "initialBackoff": _duration(backoff),
                            "maxBackoff": _duration(max_backoff), "backoffMultiplier": 2,
                            "retryableStatusCodes": ["UNAVAILABLE"]},
        }]
    return config


# ---- the client -------------------------------------------------------------------------------
class Client:
    """Client of one server, or of replicas (a sequence of addresses, balanced round-robin).

    ``tls_ca``: PEM file (or bytes) of the CA that signed the server certificate (TLS on);
    ``tls=True`` with no CA uses the system roots. ``server_name`` overrides the name checked
    against the certificate. ``token`` / ``admin_token``: bearer tokens. ``timeout`` and
    ``solve_timeout``: default deadlines in seconds; ``retries``, ``backoff``, ``max_backoff``:
    the channel's retry policy for UNAVAILABLE (:func:`service_config`)."""

    def __init__(self, target: str | Sequence[str] = "127.0.0.1:50051", *, token: str | None = None,
                 admin_token: str | None = None, tls_ca: str | bytes | Path | None = None, tls: bool = False,
                 server_name: str | None = None, timeout: float = 10.0, solve_timeout: float = 120.0,
                 retries: int = 4, backoff: float = 0.05, max_backoff: float = 2.0,
                 max_message_bytes: int = 64 * 1024 * 1024) -> None:
        if isinstance(target, str):
            address, balance = target, False
        else:
            addrs = list(target)
            if not addrs:
                raise StateworthError("no server address given", where="target")
            address = addrs[0] if len(addrs) == 1 else "ipv4:" + ",".join(addrs)
            balance = len(addrs) > 1
        config = service_config(int(retries), float(backoff), float(max_backoff), balance)
        options: list[tuple[str, Any]] = [("grpc.max_receive_message_length", max_message_bytes),
                                          ("grpc.max_send_message_length", max_message_bytes),
                                          ("grpc.enable_retries", 1),
                                          ("grpc.service_config", json.dumps(config)),
                                          # ours, not one a DNS record could bring
                                          ("grpc.service_config_disable_resolution", 1)]
        if server_name:
            options.append(("grpc.ssl_target_name_override", server_name))
        if tls_ca is not None or tls:
            ca = tls_ca
            if isinstance(ca, (str, Path)):
                try:
                    ca = Path(ca).read_bytes()
                except OSError as e:
                    raise StateworthError(f"cannot read the CA certificate ({e.strerror})", where=str(tls_ca)) from None
            self.channel = grpc.secure_channel(address, grpc.ssl_channel_credentials(root_certificates=ca), options)
        else:
            self.channel = grpc.insecure_channel(address, options)
        self.token, self.admin_token = token, admin_token
        self.timeout, self.solve_timeout = float(timeout), float(solve_timeout)
        self._v = vgrpc.ValuationServiceStub(self.channel)
        self._a = agrpc.ModelAdminServiceStub(self.channel)
        self._h = health_pb2_grpc.HealthStub(self.channel)

    def close(self) -> None:
        self.channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ---- plumbing ----------------------------------------------------------------------------
    def _metadata(self, admin: bool) -> list[tuple[str, str]]:
        tok = (self.admin_token or self.token) if admin else (self.token or self.admin_token)
        return [("authorization", f"Bearer {tok}")] if tok else []

    def _call(self, fn, request, timeout: float | None, admin: bool = False):
        """One call (the channel retries it on UNAVAILABLE within the deadline); a CallError."""
        try:
            return fn(request, timeout=self.timeout if timeout is None else timeout, metadata=self._metadata(admin))
        except grpc.RpcError as e:
            raise error_from(e) from None

    # ---- models ------------------------------------------------------------------------------
    def list_models(self, *, timeout: float | None = None) -> pb.ListModelsResponse:
        return self._call(self._v.ListModels, pb.ListModelsRequest(), timeout)

    def get_model(self, model: str, version: str = "", *, timeout: float | None = None) -> model_pb2.ModelVersion:
        return self._call(self._v.GetModel, pb.GetModelRequest(name=resource(model), version=version), timeout).model

    # ---- values ------------------------------------------------------------------------------
    def value(self, model: str, coords: Mapping[str, Any], *, stream: str = "", horizon: int | None = None,
              interval: float | None = None, version: str = "", timeout: float | None = None) -> pb.GetValueResponse:
        req = pb.GetValueRequest(name=resource(model), version=version, state=state(coords), stream=stream)
        _opt(req, horizon=horizon, interval_level=interval)
        return self._call(self._v.GetValue, req, timeout)

    def values(self, model: str, columns: Columns, *, stream: str = "", horizon: int | None = None,
               interval: float | None = None, version: str = "",
               timeout: float | None = None) -> pb.BatchGetValuesResponse:
        req = pb.BatchGetValuesRequest(name=resource(model), version=version, states=batch(columns), stream=stream)
        _opt(req, horizon=horizon, interval_level=interval)
        return self._call(self._v.BatchGetValues, req, timeout)

    def stream_values(self, model: str, chunks: Iterable[Columns], *, stream: str = "", horizon: int | None = None,
                      interval: float | None = None, version: str = "",
                      timeout: float | None = None) -> Iterator[pb.StreamValuesResponse]:
        """One response per chunk of columns, all answered by one version (not retried)."""
        def requests():
            for k, cols in enumerate(chunks):
                r = pb.StreamValuesRequest(states=batch(cols))
                if k == 0:
                    r.name, r.version, r.stream = resource(model), version, stream
                    _opt(r, horizon=horizon, interval_level=interval)
                yield r
        try:
            for resp in self._v.StreamValues(requests(), timeout=self.timeout if timeout is None else timeout,
                                             metadata=self._metadata(False)):
                yield resp
        except grpc.RpcError as e:
            raise error_from(e) from None

    # ---- contrasts ---------------------------------------------------------------------------
    def _contrast(self, model, which: str, msg, stream, horizon, interval, version, timeout) -> pb.GetContrastResponse:
        req = pb.GetContrastRequest(name=resource(model), version=version, stream=stream, **{which: msg})
        _opt(req, horizon=horizon, interval_level=interval)
        return self._call(self._v.GetContrast, req, timeout)

    def acquisition(self, model: str, coords: Mapping[str, Any], plan: str, *, stream: str = "",
                    horizon: int | None = None, interval: float | None = None, version: str = "",
                    timeout: float | None = None) -> pb.GetContrastResponse:
        return self._contrast(model, "acquisition", pb.Acquisition(state=state(coords), plan=plan), stream, horizon,
                              interval, version, timeout)

    def plan_change(self, model: str, coords: Mapping[str, Any], plan: str, *, stream: str = "",
                    horizon: int | None = None, interval: float | None = None, version: str = "",
                    timeout: float | None = None) -> pb.GetContrastResponse:
        return self._contrast(model, "plan_change", pb.PlanChange(state=state(coords), plan=plan), stream, horizon,
                              interval, version, timeout)

    def win_back(self, model: str, coords: Mapping[str, Any], plan: str, *, stream: str = "",
                 horizon: int | None = None, interval: float | None = None, version: str = "",
                 timeout: float | None = None) -> pb.GetContrastResponse:
        return self._contrast(model, "win_back", pb.WinBack(state=state(coords), plan=plan), stream, horizon,
                              interval, version, timeout)

    def engagement_change(self, model: str, coords: Mapping[str, Any], axis: str, level: str, *, stream: str = "",
                          horizon: int | None = None, interval: float | None = None, version: str = "",
                          timeout: float | None = None) -> pb.GetContrastResponse:
        return self._contrast(model, "engagement_change", pb.EngagementChange(state=state(coords), axis=axis,
                                                                              level=level),
                              stream, horizon, interval, version, timeout)

    def contrast(self, model: str, before: Mapping[str, Any], after: Mapping[str, Any], *, stream: str = "",
                 horizon: int | None = None, interval: float | None = None, version: str = "",
                 timeout: float | None = None) -> pb.GetContrastResponse:
        return self._contrast(model, "state_move", pb.StateMove(before=state(before), after=state(after)), stream,
                              horizon, interval, version, timeout)

    def cohort_contrast(self, model: str, columns: Columns, after: Mapping[str, str], *,
                        weights: Sequence[float] | None = None, stream: str = "", horizon: int | None = None,
                        interval: float | None = None, version: str = "",
                        timeout: float | None = None) -> pb.GetCohortContrastResponse:
        req = pb.GetCohortContrastRequest(name=resource(model), version=version, stream=stream,
                                          cohort=cohort(columns, weights), after=dict(after))
        _opt(req, horizon=horizon, interval_level=interval)
        return self._call(self._v.GetCohortContrast, req, timeout)

    # ---- solving calls -----------------------------------------------------------------------
    def transition_change(self, model: str, axis: str, to: str, delta: float, *,
                          when: Mapping[str, str | Sequence[str]] | None = None, cohort_columns: Columns | None = None,
                          weights: Sequence[float] | None = None, states: Columns | None = None, stream: str = "",
                          interval: float | None = None, version: str = "",
                          timeout: float | None = None) -> pb.ComputeTransitionChangeResponse:
        ch = pb.TransitionChange(axis=axis, to=to, delta=float(delta))
        for k, v in (when or {}).items():
            ch.when.add(axis=k, levels=[v] if isinstance(v, str) else list(v))
        req = pb.ComputeTransitionChangeRequest(name=resource(model), version=version, stream=stream, change=ch)
        if cohort_columns is not None:
            req.cohort.CopyFrom(cohort(cohort_columns, weights))
        if states is not None:
            req.states.CopyFrom(batch(states))
        _opt(req, interval_level=interval)
        return self._call(self._v.ComputeTransitionChange, req, self.solve_timeout if timeout is None else timeout)

    def marginal_values(self, model: str, cohort_columns: Columns, *, weights: Sequence[float] | None = None,
                        top: int = 20, stream: str = "", version: str = "",
                        timeout: float | None = None) -> pb.ListMarginalValuesResponse:
        req = pb.ListMarginalValuesRequest(name=resource(model), version=version, stream=stream,
                                           cohort=cohort(cohort_columns, weights), page_size=top)
        return self._call(self._v.ListMarginalValues, req, self.solve_timeout if timeout is None else timeout)

    def marginal_value(self, model: str, cohort_columns: Columns, *, weights: Sequence[float] | None = None,
                       entry: tuple[str, Mapping[str, str], str] | None = None,
                       transition: tuple[Mapping[str, Any], Mapping[str, Any]] | None = None, stream: str = "",
                       version: str = "", timeout: float | None = None) -> pb.GetMarginalValueResponse:
        """One factor entry ``(axis, cell, to)`` or one transition ``(from coords, to coords)``."""
        req = pb.GetMarginalValueRequest(name=resource(model), version=version, stream=stream,
                                         cohort=cohort(cohort_columns, weights))
        if entry is not None:
            req.entry.CopyFrom(pb.FactorEntry(axis=entry[0], cell=dict(entry[1]), to=entry[2]))
        if transition is not None:
            req.transition.CopyFrom(pb.StateTransition(from_state=state(transition[0]), to_state=state(transition[1])))
        return self._call(self._v.GetMarginalValue, req, self.solve_timeout if timeout is None else timeout)

    def readout(self, model: str, control_version: str, treatment_version: str, cohort_columns: Columns, *,
                weights: Sequence[float] | None = None, stream: str = "", interval: float | None = None,
                seed: int = 0, timeout: float | None = None) -> pb.ComputeReadoutResponse:
        req = pb.ComputeReadoutRequest(name=resource(model), control_version=control_version,
                                       treatment_version=treatment_version, stream=stream,
                                       cohort=cohort(cohort_columns, weights), seed=seed)
        _opt(req, interval_level=interval)
        return self._call(self._v.ComputeReadout, req, self.solve_timeout if timeout is None else timeout)

    # ---- admin and health ---------------------------------------------------------------------
    def load_model(self, artifact: str, *, timeout: float | None = None) -> apb.LoadModelResponse:
        return self._call(self._a.LoadModel, apb.LoadModelRequest(artifact=artifact),
                          self.solve_timeout if timeout is None else timeout, admin=True)

    def reload_models(self, *, timeout: float | None = None) -> apb.ReloadModelsResponse:
        return self._call(self._a.ReloadModels, apb.ReloadModelsRequest(),
                          self.solve_timeout if timeout is None else timeout, admin=True)

    def health(self, service: str = "", *, timeout: float | None = None) -> str:
        """``"SERVING"`` or ``"NOT_SERVING"`` (grpc.health.v1) for ``service`` ("" = the server)."""
        r = self._call(self._h.Check, health_pb2.HealthCheckRequest(service=service), timeout)
        return health_pb2.HealthCheckResponse.ServingStatus.Name(r.status)
