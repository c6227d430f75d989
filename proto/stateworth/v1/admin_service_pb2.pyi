from stateworth.v1 import model_pb2 as _model_pb2
from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class ReloadResult(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    RELOAD_RESULT_UNSPECIFIED: _ClassVar[ReloadResult]
    RELOAD_RESULT_LOADED: _ClassVar[ReloadResult]
    RELOAD_RESULT_KEPT: _ClassVar[ReloadResult]
    RELOAD_RESULT_FAILED: _ClassVar[ReloadResult]
    RELOAD_RESULT_REMOVED: _ClassVar[ReloadResult]
RELOAD_RESULT_UNSPECIFIED: ReloadResult
RELOAD_RESULT_LOADED: ReloadResult
RELOAD_RESULT_KEPT: ReloadResult
RELOAD_RESULT_FAILED: ReloadResult
RELOAD_RESULT_REMOVED: ReloadResult

class LoadModelRequest(_message.Message):
    __slots__ = ("artifact",)
    ARTIFACT_FIELD_NUMBER: _ClassVar[int]
    artifact: str
    def __init__(self, artifact: _Optional[str] = ...) -> None: ...

class LoadModelResponse(_message.Message):
    __slots__ = ("model", "replaced")
    MODEL_FIELD_NUMBER: _ClassVar[int]
    REPLACED_FIELD_NUMBER: _ClassVar[int]
    model: _model_pb2.ModelVersion
    replaced: bool
    def __init__(self, model: _Optional[_Union[_model_pb2.ModelVersion, _Mapping]] = ..., replaced: _Optional[bool] = ...) -> None: ...

class ReloadModelsRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class ReloadModelsResponse(_message.Message):
    __slots__ = ("models", "loaded_count", "kept_count", "dropped_count", "outcomes", "failed_count")
    MODELS_FIELD_NUMBER: _ClassVar[int]
    LOADED_COUNT_FIELD_NUMBER: _ClassVar[int]
    KEPT_COUNT_FIELD_NUMBER: _ClassVar[int]
    DROPPED_COUNT_FIELD_NUMBER: _ClassVar[int]
    OUTCOMES_FIELD_NUMBER: _ClassVar[int]
    FAILED_COUNT_FIELD_NUMBER: _ClassVar[int]
    models: _containers.RepeatedCompositeFieldContainer[_model_pb2.ModelVersion]
    loaded_count: int
    kept_count: int
    dropped_count: int
    outcomes: _containers.RepeatedCompositeFieldContainer[ModelFolderOutcome]
    failed_count: int
    def __init__(self, models: _Optional[_Iterable[_Union[_model_pb2.ModelVersion, _Mapping]]] = ..., loaded_count: _Optional[int] = ..., kept_count: _Optional[int] = ..., dropped_count: _Optional[int] = ..., outcomes: _Optional[_Iterable[_Union[ModelFolderOutcome, _Mapping]]] = ..., failed_count: _Optional[int] = ...) -> None: ...

class ModelFolderOutcome(_message.Message):
    __slots__ = ("artifact", "result", "name", "version", "error")
    ARTIFACT_FIELD_NUMBER: _ClassVar[int]
    RESULT_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    ERROR_FIELD_NUMBER: _ClassVar[int]
    artifact: str
    result: ReloadResult
    name: str
    version: str
    error: str
    def __init__(self, artifact: _Optional[str] = ..., result: _Optional[_Union[ReloadResult, str]] = ..., name: _Optional[str] = ..., version: _Optional[str] = ..., error: _Optional[str] = ...) -> None: ...
