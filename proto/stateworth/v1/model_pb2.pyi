import datetime

from google.protobuf import struct_pb2 as _struct_pb2
from google.protobuf import timestamp_pb2 as _timestamp_pb2
from google.protobuf.internal import containers as _containers
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class Axis(_message.Message):
    __slots__ = ("name", "kind", "levels")
    NAME_FIELD_NUMBER: _ClassVar[int]
    KIND_FIELD_NUMBER: _ClassVar[int]
    LEVELS_FIELD_NUMBER: _ClassVar[int]
    name: str
    kind: str
    levels: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, name: _Optional[str] = ..., kind: _Optional[str] = ..., levels: _Optional[_Iterable[str]] = ...) -> None: ...

class RewardStream(_message.Message):
    __slots__ = ("name", "unit")
    NAME_FIELD_NUMBER: _ClassVar[int]
    UNIT_FIELD_NUMBER: _ClassVar[int]
    name: str
    unit: str
    def __init__(self, name: _Optional[str] = ..., unit: _Optional[str] = ...) -> None: ...

class Discounting(_message.Message):
    __slots__ = ("beta", "period", "spec")
    BETA_FIELD_NUMBER: _ClassVar[int]
    PERIOD_FIELD_NUMBER: _ClassVar[int]
    SPEC_FIELD_NUMBER: _ClassVar[int]
    beta: float
    period: str
    spec: _struct_pb2.Struct
    def __init__(self, beta: _Optional[float] = ..., period: _Optional[str] = ..., spec: _Optional[_Union[_struct_pb2.Struct, _Mapping]] = ...) -> None: ...

class SolveStatistics(_message.Message):
    __slots__ = ("method", "status", "iterations", "operator_applies", "residual", "build_seconds", "draw_count")
    METHOD_FIELD_NUMBER: _ClassVar[int]
    STATUS_FIELD_NUMBER: _ClassVar[int]
    ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    OPERATOR_APPLIES_FIELD_NUMBER: _ClassVar[int]
    RESIDUAL_FIELD_NUMBER: _ClassVar[int]
    BUILD_SECONDS_FIELD_NUMBER: _ClassVar[int]
    DRAW_COUNT_FIELD_NUMBER: _ClassVar[int]
    method: str
    status: str
    iterations: int
    operator_applies: int
    residual: float
    build_seconds: float
    draw_count: int
    def __init__(self, method: _Optional[str] = ..., status: _Optional[str] = ..., iterations: _Optional[int] = ..., operator_applies: _Optional[int] = ..., residual: _Optional[float] = ..., build_seconds: _Optional[float] = ..., draw_count: _Optional[int] = ...) -> None: ...

class ModelVersion(_message.Message):
    __slots__ = ("name", "version", "content_hash", "artifact", "default_version", "state_count", "axes", "reward_streams", "currency", "discounting", "solve_statistics", "fit_diagnostics", "load_time")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    CONTENT_HASH_FIELD_NUMBER: _ClassVar[int]
    ARTIFACT_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_VERSION_FIELD_NUMBER: _ClassVar[int]
    STATE_COUNT_FIELD_NUMBER: _ClassVar[int]
    AXES_FIELD_NUMBER: _ClassVar[int]
    REWARD_STREAMS_FIELD_NUMBER: _ClassVar[int]
    CURRENCY_FIELD_NUMBER: _ClassVar[int]
    DISCOUNTING_FIELD_NUMBER: _ClassVar[int]
    SOLVE_STATISTICS_FIELD_NUMBER: _ClassVar[int]
    FIT_DIAGNOSTICS_FIELD_NUMBER: _ClassVar[int]
    LOAD_TIME_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    content_hash: str
    artifact: str
    default_version: bool
    state_count: int
    axes: _containers.RepeatedCompositeFieldContainer[Axis]
    reward_streams: _containers.RepeatedCompositeFieldContainer[RewardStream]
    currency: str
    discounting: Discounting
    solve_statistics: SolveStatistics
    fit_diagnostics: _struct_pb2.Struct
    load_time: _timestamp_pb2.Timestamp
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., content_hash: _Optional[str] = ..., artifact: _Optional[str] = ..., default_version: _Optional[bool] = ..., state_count: _Optional[int] = ..., axes: _Optional[_Iterable[_Union[Axis, _Mapping]]] = ..., reward_streams: _Optional[_Iterable[_Union[RewardStream, _Mapping]]] = ..., currency: _Optional[str] = ..., discounting: _Optional[_Union[Discounting, _Mapping]] = ..., solve_statistics: _Optional[_Union[SolveStatistics, _Mapping]] = ..., fit_diagnostics: _Optional[_Union[_struct_pb2.Struct, _Mapping]] = ..., load_time: _Optional[_Union[datetime.datetime, _timestamp_pb2.Timestamp, _Mapping]] = ...) -> None: ...

class Model(_message.Message):
    __slots__ = ("name", "default_version", "versions", "default_reason")
    NAME_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_VERSION_FIELD_NUMBER: _ClassVar[int]
    VERSIONS_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_REASON_FIELD_NUMBER: _ClassVar[int]
    name: str
    default_version: str
    versions: _containers.RepeatedCompositeFieldContainer[ModelVersion]
    default_reason: str
    def __init__(self, name: _Optional[str] = ..., default_version: _Optional[str] = ..., versions: _Optional[_Iterable[_Union[ModelVersion, _Mapping]]] = ..., default_reason: _Optional[str] = ...) -> None: ...
