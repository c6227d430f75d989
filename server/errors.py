"""Errors of the gRPC service and their standard status codes (with rich error details).

A request the server refuses is aborted with a standard code and a one-line message that says
what would be right. INVALID_ARGUMENT carries a ``google.rpc.BadRequest`` detail whose field
violations name the request field, axis or level at fault (read it with
``grpc_status.rpc_status.from_call``; the Python client does). Messages never quote account
identifiers: requests carry state coordinates only.
"""

from __future__ import annotations

import grpc
from google.protobuf import any_pb2
from google.rpc import code_pb2, error_details_pb2, status_pb2
from grpc_status import rpc_status

from stateworth.errors import ConvergenceError, QueryError, StateworthError


class ConfigError(StateworthError):
    """A server option is wrong (a file that cannot be read, a TLS half-pair...)."""


class ServiceError(StateworthError):
    """A refusal with a gRPC status code; ``field`` (optional) is the field violation to attach."""

    code: grpc.StatusCode = grpc.StatusCode.FAILED_PRECONDITION

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


class NotFoundError(ServiceError):
    """An unknown model or version."""

    code = grpc.StatusCode.NOT_FOUND


class LimitError(ServiceError):
    """A batch, message or work limit was exceeded."""

    code = grpc.StatusCode.RESOURCE_EXHAUSTED


class DeadlineError(ServiceError):
    """The caller's deadline passed before the work finished."""

    code = grpc.StatusCode.DEADLINE_EXCEEDED


class CancelledError(ServiceError):
    """The caller cancelled the call."""

    code = grpc.StatusCode.CANCELLED


class UnavailableError(ServiceError):
    """No model is loaded yet (retry later)."""

    code = grpc.StatusCode.UNAVAILABLE


class LoadError(ServiceError):
    """A load or reload failed; the serving models are unchanged."""

    code = grpc.StatusCode.FAILED_PRECONDITION


def invalid(message: str, field: str) -> QueryError:
    """A QueryError for a bad request field (INVALID_ARGUMENT with a field violation)."""
    return QueryError(message, field=field)


def _short(text: str, limit: int = 400) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."


def rich_status(code: grpc.StatusCode, message: str, field: str | None = None) -> grpc.Status:
    """A grpc.Status with a google.rpc.Status payload (BadRequest detail when ``field``)."""
    st = status_pb2.Status(code=getattr(code_pb2, code.name), message=_short(message))
    if field:
        detail = any_pb2.Any()
        detail.Pack(error_details_pb2.BadRequest(field_violations=[
            error_details_pb2.BadRequest.FieldViolation(field=field, description=_short(message))]))
        st.details.append(detail)
    return rpc_status.to_status(st)


def to_status(err: BaseException) -> tuple[grpc.Status, str | None]:
    """Map an exception to (status, field) for aborting the call."""
    if isinstance(err, QueryError):
        field = err.field or "request"
        return rich_status(grpc.StatusCode.INVALID_ARGUMENT, err.message, field), field
    if isinstance(err, ServiceError):
        return rich_status(err.code, err.message, err.field), err.field
    if isinstance(err, ConvergenceError):
        return rich_status(grpc.StatusCode.FAILED_PRECONDITION, str(err)), None
    if isinstance(err, StateworthError):
        return rich_status(grpc.StatusCode.FAILED_PRECONDITION, str(err)), None
    return rich_status(grpc.StatusCode.INTERNAL, f"internal error ({err.__class__.__name__}); see the server log"), None
