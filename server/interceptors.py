"""Server interceptors: bearer-token checks, and per-call access logs and metrics.

Tokens (when configured) travel as ``authorization: Bearer <token>`` metadata:

* query token set: every ValuationService call needs it (or the admin token); missing or wrong
  is UNAUTHENTICATED;
* admin token set: ModelAdminService calls need it; a valid query token there is
  PERMISSION_DENIED; with a query token but no admin token, admin calls are refused
  (PERMISSION_DENIED); with no token at all (the loopback default) everything is open;
* the health service is always open (load balancers probe it without credentials).

Tokens are compared in constant time and never logged.
"""

from __future__ import annotations

import hmac
import logging
import time
from typing import Callable

import grpc

from stateworth.server.errors import rich_status
from stateworth.server.metrics import Metrics

log = logging.getLogger("stateworth.server.access")

ADMIN_PREFIX = "/stateworth.v1.ModelAdminService/"
OPEN_PREFIXES = ("/grpc.health.v1.Health/",)


def _token(metadata) -> str | None:
    for k, v in metadata or ():
        if k.lower() == "authorization":
            v = v.decode() if isinstance(v, bytes) else v
            if v.startswith("Bearer "):
                return v[7:].strip()
            return ""
    return None


def _eq(a: str | None, b: str | None) -> bool:
    return a is not None and b is not None and hmac.compare_digest(a.encode(), b.encode())


def _refuse(code: grpc.StatusCode, message: str):
    status = rich_status(code, message)

    def unary(request, context):
        context.abort_with_status(status)

    def stream(request_iterator, context):
        context.abort_with_status(status)

    return unary, stream


def _rebuild(handler: grpc.RpcMethodHandler, wrap: Callable) -> grpc.RpcMethodHandler:
    """The same handler with its behaviour wrapped (``wrap(fn, streaming_response)``)."""
    if handler.unary_unary:
        return grpc.unary_unary_rpc_method_handler(wrap(handler.unary_unary, False), handler.request_deserializer,
                                                   handler.response_serializer)
    if handler.unary_stream:
        return grpc.unary_stream_rpc_method_handler(wrap(handler.unary_stream, True), handler.request_deserializer,
                                                    handler.response_serializer)
    if handler.stream_unary:
        return grpc.stream_unary_rpc_method_handler(wrap(handler.stream_unary, False), handler.request_deserializer,
                                                    handler.response_serializer)
    return grpc.stream_stream_rpc_method_handler(wrap(handler.stream_stream, True), handler.request_deserializer,
                                                 handler.response_serializer)


class AuthInterceptor(grpc.ServerInterceptor):
    """Checks bearer tokens as described in the module docstring."""

    def __init__(self, token: str | None, admin_token: str | None) -> None:
        self.token = token or None
        self.admin_token = admin_token or None

    def _verdict(self, method: str, presented: str | None) -> tuple[grpc.StatusCode, str] | None:
        if method.startswith(OPEN_PREFIXES) or (self.token is None and self.admin_token is None):
            return None
        if method.startswith(ADMIN_PREFIX):
            if self.admin_token is None:
                return (grpc.StatusCode.PERMISSION_DENIED,
                        "admin calls are disabled on this server; start it with --admin-token-file to enable them")
            if _eq(presented, self.admin_token):
                return None
            if _eq(presented, self.token):
                return grpc.StatusCode.PERMISSION_DENIED, "this call needs the admin token; the query token is not enough"
            return (grpc.StatusCode.UNAUTHENTICATED,
                    "missing or invalid admin token; send metadata 'authorization: Bearer <admin token>'")
        if self.token is None or _eq(presented, self.token) or _eq(presented, self.admin_token):
            return None
        return grpc.StatusCode.UNAUTHENTICATED, "missing or invalid token; send metadata 'authorization: Bearer <token>'"

    def intercept_service(self, continuation, handler_call_details):
        handler = continuation(handler_call_details)
        if handler is None:
            return None
        verdict = self._verdict(handler_call_details.method, _token(handler_call_details.invocation_metadata))
        if verdict is None:
            return handler
        unary, stream = _refuse(*verdict)
        return _rebuild(handler, lambda fn, streaming: (stream if streaming or handler.stream_unary or
                                                        handler.stream_stream else unary))


class AccessInterceptor(grpc.ServerInterceptor):
    """One JSON access line and one metrics observation per finished call."""

    def __init__(self, metrics: Metrics) -> None:
        self.metrics = metrics

    def intercept_service(self, continuation, handler_call_details):
        handler = continuation(handler_call_details)
        if handler is None:
            return None
        method = handler_call_details.method

        def finish(context, t0: float, failed: BaseException | None) -> None:
            code = context.code() if hasattr(context, "code") else None
            if code is None:
                code = grpc.StatusCode.UNKNOWN if failed is not None else grpc.StatusCode.OK
            name = code.name if isinstance(code, grpc.StatusCode) else str(code)
            dt = time.perf_counter() - t0
            self.metrics.observe(method, name, dt)
            fields = {"event": "rpc", "method": method, "code": name, "ms": round(dt * 1e3, 3)}
            extra = getattr(context, "_stateworth_fields", None)
            if extra:
                fields.update(extra)
            log.info("rpc", extra={"fields": fields})

        def wrap(fn, streaming):
            if streaming:
                def gen(request, context):
                    t0 = time.perf_counter()
                    failed = None
                    try:
                        yield from fn(request, context)
                    except BaseException as e:
                        failed = e
                        raise
                    finally:
                        finish(context, t0, failed)
                return gen

            def call(request, context):
                t0 = time.perf_counter()
                failed = None
                try:
                    return fn(request, context)
                except BaseException as e:
                    failed = e
                    raise
                finally:
                    finish(context, t0, failed)
            return call

        return _rebuild(handler, wrap)
