"""The server interceptor: bearer-token checks, and per-call access logs and metrics.

Tokens (when configured) travel as ``authorization: Bearer <token>`` metadata:

* query token set: every ValuationService call needs it (or the admin token); missing or wrong
  is UNAUTHENTICATED; no query token: queries are open;
* admin token set: ModelAdminService calls need it; a valid query token there is
  PERMISSION_DENIED; no admin token: admin calls are refused (PERMISSION_DENIED) unless the
  server was started with ``--admin-open`` (local development on loopback);
* the health service is always open (load balancers probe it without credentials).

A token must match exactly (``authorization: Bearer <token>``, nothing stripped); tokens are
compared in constant time and never logged. Every finished call, refused ones included, gets
one access line and one metrics observation; a call whose caller went away (cancelled, or its
deadline passed) is counted and logged as CANCELLED or DEADLINE_EXCEEDED, at info level.

Request bytes that do not decode as the method's request message are answered
INVALID_ARGUMENT (the gRPC library alone would answer INTERNAL): the deserializer of every
method is wrapped so that it never raises, and the call is refused where it reads the request.

One interceptor does all of it, and the wrapped handler of each method is built once and kept
(the services are fixed when the server starts): a single-value lookup costs the service a few
hundred microseconds in all, so per-call handler rebuilding and a second interceptor layer were
a measurable share of it.
"""

from __future__ import annotations

import hmac
import logging
import threading
import time
from typing import Callable

import grpc

from stateworth.errors import QueryError
from stateworth.server.errors import rich_status
from stateworth.server.logs import info_line
from stateworth.server.metrics import Metrics

log = logging.getLogger("stateworth.server.access")

ADMIN_PREFIX = "/stateworth.v1.ModelAdminService/"
OPEN_PREFIXES = ("/grpc.health.v1.Health/",)


def _token(metadata) -> str | None:
    for k, v in metadata or ():
        if k.lower() == "authorization":
            v = v.decode("utf-8", "replace") if isinstance(v, bytes) else v
            return v[7:] if v.startswith("Bearer ") else ""
    return None


UNDECODABLE = ("the request could not be decoded as the method's request message (not valid protobuf of "
               "that type); send the message the method declares")


class Undecodable:
    """What the wrapped deserializer returns for bytes that do not decode (never raised there:
    the gRPC library would answer INTERNAL)."""

    __slots__ = ()


class UndecodableRequest(QueryError):
    """A request message that does not decode (INVALID_ARGUMENT, field ``request``)."""

    def __init__(self) -> None:
        super().__init__(UNDECODABLE, field="request")


def _lenient(deserializer):
    if deserializer is None:
        return None

    def parse(data):
        try:
            return deserializer(data)
        except Exception:  # noqa: BLE001 - any failure to decode is the caller's bytes
            return Undecodable()
    return parse


def _checked(requests):
    """A request stream that raises :class:`UndecodableRequest` at an undecodable message."""
    for r in requests:
        if isinstance(r, Undecodable):
            raise UndecodableRequest()
        yield r


#: a caller gone this close to its deadline is taken to have run out of time: its own timer fires
#: (and it cancels) a little before the server's copy of the deadline, which starts on arrival
DEADLINE_SLACK_SECONDS = 0.5


def _gone_when_closed(context) -> grpc.StatusCode | None:
    """After gRPC closed a call: CANCELLED or DEADLINE_EXCEEDED when the close says the call was
    cancelled (by its caller, or by its deadline), else None. grpcio keeps that verdict on the
    context's private state (``client == "cancelled"``); without it, fall back on
    :func:`gone_code`."""
    client = getattr(getattr(context, "_state", None), "client", None)
    if client is None:
        return gone_code(context)
    if client != "cancelled":
        return None
    try:
        remaining = context.time_remaining()
    except Exception:  # noqa: BLE001
        remaining = None
    late = remaining is not None and remaining <= DEADLINE_SLACK_SECONDS
    return grpc.StatusCode.DEADLINE_EXCEEDED if late else grpc.StatusCode.CANCELLED


def gone_code(context) -> grpc.StatusCode | None:
    """CANCELLED or DEADLINE_EXCEEDED when the caller is gone (cancelled the call, or its
    deadline passed), else None."""
    try:
        if context.is_active():
            return None
        remaining = context.time_remaining()
    except Exception:  # noqa: BLE001 - a context without these (tests' fakes): not gone
        return None
    late = remaining is not None and remaining <= DEADLINE_SLACK_SECONDS
    return grpc.StatusCode.DEADLINE_EXCEEDED if late else grpc.StatusCode.CANCELLED


def _eq(a: str | None, b: str | None) -> bool:
    return a is not None and b is not None and hmac.compare_digest(a.encode(), b.encode())


def _refuse(code: grpc.StatusCode, message: str):
    status = rich_status(code, message)

    def unary(request, context):
        context.abort_with_status(status)

    def stream(request_iterator, context):
        context.abort_with_status(status)

    return unary, stream


def _rebuild(handler: grpc.RpcMethodHandler, wrap: Callable, deserializer=None) -> grpc.RpcMethodHandler:
    """The same handler with its behaviour wrapped (``wrap(fn, streaming_response)``) and, if
    given, another request deserializer."""
    de = deserializer or handler.request_deserializer
    if handler.unary_unary:
        return grpc.unary_unary_rpc_method_handler(wrap(handler.unary_unary, False), de, handler.response_serializer)
    if handler.unary_stream:
        return grpc.unary_stream_rpc_method_handler(wrap(handler.unary_stream, True), de, handler.response_serializer)
    if handler.stream_unary:
        return grpc.stream_unary_rpc_method_handler(wrap(handler.stream_unary, False), de, handler.response_serializer)
    return grpc.stream_stream_rpc_method_handler(wrap(handler.stream_stream, True), de, handler.response_serializer)


class TokenRules:
    """The verdict of the token rules (module docstring) for a method and a presented token."""

    def __init__(self, token: str | None, admin_token: str | None, admin_open: bool = False) -> None:
        self.token = token or None
        self.admin_token = admin_token or None
        self.admin_open = bool(admin_open) and self.admin_token is None

    @property
    def open(self) -> bool:
        """No query token and admin calls open (``--admin-open``): every call is allowed."""
        return self.token is None and self.admin_open

    def verdict(self, method: str, presented: str | None) -> tuple[grpc.StatusCode, str] | None:
        """None when the call may go ahead, else (code, message)."""
        if method.startswith(OPEN_PREFIXES) or self.open:
            return None
        if method.startswith(ADMIN_PREFIX):
            if self.admin_token is None:
                if self.admin_open:
                    return None
                return (grpc.StatusCode.PERMISSION_DENIED,
                        "admin calls are off on this server; start it with --admin-token-file to enable them "
                        "(or --admin-open for local development on loopback)")
            if _eq(presented, self.admin_token):
                return None
            if _eq(presented, self.token):
                return grpc.StatusCode.PERMISSION_DENIED, "this call needs the admin token; the query token is not enough"
            return (grpc.StatusCode.UNAUTHENTICATED,
                    "missing or invalid admin token; send metadata 'authorization: Bearer <admin token>'")
        if self.token is None or _eq(presented, self.token) or _eq(presented, self.admin_token):
            return None
        return grpc.StatusCode.UNAUTHENTICATED, "missing or invalid token; send metadata 'authorization: Bearer <token>'"


class CallInterceptor(grpc.ServerInterceptor):
    """Token checks (:class:`TokenRules`), then one JSON access line and one metrics
    observation per finished call."""

    def __init__(self, metrics: Metrics, token: str | None = None, admin_token: str | None = None,
                 admin_open: bool = False) -> None:
        self.metrics = metrics
        self.rules = TokenRules(token, admin_token, admin_open)
        # method -> (handler, handler wrapped for access); only registered methods get here
        # (unknown ones are None and not kept), so the maps stay as small as the services
        self._handlers: dict[str, tuple[grpc.RpcMethodHandler, grpc.RpcMethodHandler]] = {}
        self._refusals: dict[tuple[str, grpc.StatusCode, str], grpc.RpcMethodHandler] = {}

    def intercept_service(self, continuation, handler_call_details):
        method = handler_call_details.method
        pair = self._handlers.get(method)
        if pair is None:
            inner = continuation(handler_call_details)
            if inner is None:
                return None
            streaming_request = bool(inner.stream_unary or inner.stream_stream)
            wrapped = _rebuild(inner, self._access(method, streaming_request), _lenient(inner.request_deserializer))
            pair = self._handlers.setdefault(method, (inner, wrapped))
        if self.rules.open:
            return pair[1]
        verdict = self.rules.verdict(method, _token(handler_call_details.invocation_metadata))
        if verdict is None:
            return pair[1]
        key = (method, *verdict)
        refusal = self._refusals.get(key)
        if refusal is None:
            inner = pair[0]
            unary, stream = _refuse(*verdict)
            streaming_request = bool(inner.stream_unary or inner.stream_stream)
            refused = _rebuild(inner, lambda fn, streaming: stream if streaming or streaming_request else unary,
                               _lenient(inner.request_deserializer))
            refusal = self._refusals.setdefault(key, _rebuild(refused, self._access(method, False)))
        return refusal

    def _access(self, method: str, streaming_request: bool) -> Callable:
        """``wrap(fn, streaming)`` for :func:`_rebuild`: refuses undecodable requests, times ``fn``
        and writes the access line."""
        observe = self.metrics.observe
        undecodable = rich_status(grpc.StatusCode.INVALID_ARGUMENT, UNDECODABLE, "request")

        def finish(context, t0: float, failed: BaseException | None, dt: float | None = None,
                   closed: bool = False) -> None:
            """The access line and metrics of a finished call. ``closed``: gRPC has closed the
            call (its close says whether the caller cancelled); else the handler just ended."""
            dt = time.perf_counter() - t0 if dt is None else dt
            code = context.code() if hasattr(context, "code") else None
            if code is None:
                code = _gone_when_closed(context) if closed else gone_code(context)
            if code is None:
                code = grpc.StatusCode.UNKNOWN if failed is not None else grpc.StatusCode.OK
            name = code.name if isinstance(code, grpc.StatusCode) else str(code)
            observe(method, name, dt)
            fields = {"event": "rpc", "method": method, "code": name, "ms": round(dt * 1e3, 3)}
            extra = getattr(context, "_stateworth_fields", None)
            if extra:
                fields.update(extra)
            info_line(log, "rpc", fields)

        def prepare(request, context):
            """The request as the handler gets it: a checked stream, or the message itself; an
            undecodable message refuses the call here."""
            if streaming_request:
                return _checked(request)
            if isinstance(request, Undecodable):
                _note_field(context)
                context.abort_with_status(undecodable)
            return request

        def later(context, t0: float) -> Callable[[BaseException | None], None]:
            """For streams: the access line once both the handler has ended and gRPC has closed
            the call, whichever comes last. A caller that cancels a stream can look, to the
            handler, like one that closed its side normally; only the close tells them apart."""
            lock = threading.Lock()
            state: dict = {"left": 2, "failed": None, "dt": None}

            def step() -> None:
                with lock:
                    state["left"] -= 1
                    last = state["left"] == 0
                if last:
                    finish(context, t0, state["failed"], state["dt"], closed=True)

            if not context.add_callback(step):  # closed already
                step()

            def ended(failed: BaseException | None) -> None:
                state["failed"], state["dt"] = failed, time.perf_counter() - t0
                step()
            return ended

        def wrap(fn, streaming):
            if streaming or streaming_request:
                def gen(request, context):
                    t0 = time.perf_counter()
                    ended = later(context, t0)
                    failed = None
                    try:
                        out = fn(prepare(request, context), context)
                        if streaming:
                            yield from out
                        else:
                            return out
                    except UndecodableRequest as e:  # a handler that did not turn it into a status
                        failed = e
                        _note_field(context)
                        context.abort_with_status(undecodable)
                    except BaseException as e:
                        failed = e
                        raise
                    finally:
                        ended(failed)
                if streaming:
                    return gen

                def one(request, context):  # a stream of requests, one response
                    g = gen(request, context)
                    try:
                        next(g)
                    except StopIteration as stop:
                        return stop.value
                    raise AssertionError("unreachable")  # pragma: no cover
                return one

            def call(request, context):
                t0 = time.perf_counter()
                failed = None
                try:
                    return fn(prepare(request, context), context)
                except UndecodableRequest as e:
                    failed = e
                    _note_field(context)
                    context.abort_with_status(undecodable)
                except BaseException as e:
                    failed = e
                    raise
                finally:
                    finish(context, t0, failed)
            return call

        return wrap


def _note_field(context) -> None:
    try:
        fields = getattr(context, "_stateworth_fields", None)
        if fields is None:
            fields = {}
            setattr(context, "_stateworth_fields", fields)
        fields["field"] = "request"
    except AttributeError:
        pass
