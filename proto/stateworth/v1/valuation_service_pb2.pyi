from google.protobuf import struct_pb2 as _struct_pb2
from stateworth.v1 import model_pb2 as _model_pb2
from google.protobuf.internal import containers as _containers
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class State(_message.Message):
    __slots__ = ("levels",)
    class LevelsEntry(_message.Message):
        __slots__ = ("key", "value")
        KEY_FIELD_NUMBER: _ClassVar[int]
        VALUE_FIELD_NUMBER: _ClassVar[int]
        key: str
        value: str
        def __init__(self, key: _Optional[str] = ..., value: _Optional[str] = ...) -> None: ...
    LEVELS_FIELD_NUMBER: _ClassVar[int]
    levels: _containers.ScalarMap[str, str]
    def __init__(self, levels: _Optional[_Mapping[str, str]] = ...) -> None: ...

class StateColumn(_message.Message):
    __slots__ = ("axis", "levels", "codes")
    AXIS_FIELD_NUMBER: _ClassVar[int]
    LEVELS_FIELD_NUMBER: _ClassVar[int]
    CODES_FIELD_NUMBER: _ClassVar[int]
    axis: str
    levels: _containers.RepeatedScalarFieldContainer[str]
    codes: _containers.RepeatedScalarFieldContainer[int]
    def __init__(self, axis: _Optional[str] = ..., levels: _Optional[_Iterable[str]] = ..., codes: _Optional[_Iterable[int]] = ...) -> None: ...

class StateBatch(_message.Message):
    __slots__ = ("columns",)
    COLUMNS_FIELD_NUMBER: _ClassVar[int]
    columns: _containers.RepeatedCompositeFieldContainer[StateColumn]
    def __init__(self, columns: _Optional[_Iterable[_Union[StateColumn, _Mapping]]] = ...) -> None: ...

class Cohort(_message.Message):
    __slots__ = ("states", "weights")
    STATES_FIELD_NUMBER: _ClassVar[int]
    WEIGHTS_FIELD_NUMBER: _ClassVar[int]
    states: StateBatch
    weights: _containers.RepeatedScalarFieldContainer[float]
    def __init__(self, states: _Optional[_Union[StateBatch, _Mapping]] = ..., weights: _Optional[_Iterable[float]] = ...) -> None: ...

class Interval(_message.Message):
    __slots__ = ("lower", "upper", "level")
    LOWER_FIELD_NUMBER: _ClassVar[int]
    UPPER_FIELD_NUMBER: _ClassVar[int]
    LEVEL_FIELD_NUMBER: _ClassVar[int]
    lower: float
    upper: float
    level: float
    def __init__(self, lower: _Optional[float] = ..., upper: _Optional[float] = ..., level: _Optional[float] = ...) -> None: ...

class Figure(_message.Message):
    __slots__ = ("value", "unit", "interval")
    VALUE_FIELD_NUMBER: _ClassVar[int]
    UNIT_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_FIELD_NUMBER: _ClassVar[int]
    value: float
    unit: str
    interval: Interval
    def __init__(self, value: _Optional[float] = ..., unit: _Optional[str] = ..., interval: _Optional[_Union[Interval, _Mapping]] = ...) -> None: ...

class ListModelsRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class ListModelsResponse(_message.Message):
    __slots__ = ("models",)
    MODELS_FIELD_NUMBER: _ClassVar[int]
    models: _containers.RepeatedCompositeFieldContainer[_model_pb2.Model]
    def __init__(self, models: _Optional[_Iterable[_Union[_model_pb2.Model, _Mapping]]] = ...) -> None: ...

class GetModelRequest(_message.Message):
    __slots__ = ("name", "version")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ...) -> None: ...

class GetModelResponse(_message.Message):
    __slots__ = ("model",)
    MODEL_FIELD_NUMBER: _ClassVar[int]
    model: _model_pb2.ModelVersion
    def __init__(self, model: _Optional[_Union[_model_pb2.ModelVersion, _Mapping]] = ...) -> None: ...

class GetValueRequest(_message.Message):
    __slots__ = ("name", "version", "state", "stream", "horizon", "interval_level")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STATE_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    state: State
    stream: str
    horizon: int
    interval_level: float
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., state: _Optional[_Union[State, _Mapping]] = ..., stream: _Optional[str] = ..., horizon: _Optional[int] = ..., interval_level: _Optional[float] = ...) -> None: ...

class GetValueResponse(_message.Message):
    __slots__ = ("name", "version", "stream", "value", "horizon", "state_index", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    STATE_INDEX_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    value: Figure
    horizon: int
    state_index: int
    caution: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., value: _Optional[_Union[Figure, _Mapping]] = ..., horizon: _Optional[int] = ..., state_index: _Optional[int] = ..., caution: _Optional[str] = ...) -> None: ...

class BatchGetValuesRequest(_message.Message):
    __slots__ = ("name", "version", "states", "stream", "horizon", "interval_level")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STATES_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    states: StateBatch
    stream: str
    horizon: int
    interval_level: float
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., states: _Optional[_Union[StateBatch, _Mapping]] = ..., stream: _Optional[str] = ..., horizon: _Optional[int] = ..., interval_level: _Optional[float] = ...) -> None: ...

class BatchGetValuesResponse(_message.Message):
    __slots__ = ("name", "version", "stream", "unit", "values", "lower", "upper", "interval_level", "horizon")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    UNIT_FIELD_NUMBER: _ClassVar[int]
    VALUES_FIELD_NUMBER: _ClassVar[int]
    LOWER_FIELD_NUMBER: _ClassVar[int]
    UPPER_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    unit: str
    values: _containers.RepeatedScalarFieldContainer[float]
    lower: _containers.RepeatedScalarFieldContainer[float]
    upper: _containers.RepeatedScalarFieldContainer[float]
    interval_level: float
    horizon: int
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., unit: _Optional[str] = ..., values: _Optional[_Iterable[float]] = ..., lower: _Optional[_Iterable[float]] = ..., upper: _Optional[_Iterable[float]] = ..., interval_level: _Optional[float] = ..., horizon: _Optional[int] = ...) -> None: ...

class StreamValuesRequest(_message.Message):
    __slots__ = ("name", "version", "states", "stream", "horizon", "interval_level")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STATES_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    states: StateBatch
    stream: str
    horizon: int
    interval_level: float
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., states: _Optional[_Union[StateBatch, _Mapping]] = ..., stream: _Optional[str] = ..., horizon: _Optional[int] = ..., interval_level: _Optional[float] = ...) -> None: ...

class StreamValuesResponse(_message.Message):
    __slots__ = ("name", "version", "offset", "values", "lower", "upper", "unit")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    OFFSET_FIELD_NUMBER: _ClassVar[int]
    VALUES_FIELD_NUMBER: _ClassVar[int]
    LOWER_FIELD_NUMBER: _ClassVar[int]
    UPPER_FIELD_NUMBER: _ClassVar[int]
    UNIT_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    offset: int
    values: _containers.RepeatedScalarFieldContainer[float]
    lower: _containers.RepeatedScalarFieldContainer[float]
    upper: _containers.RepeatedScalarFieldContainer[float]
    unit: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., offset: _Optional[int] = ..., values: _Optional[_Iterable[float]] = ..., lower: _Optional[_Iterable[float]] = ..., upper: _Optional[_Iterable[float]] = ..., unit: _Optional[str] = ...) -> None: ...

class Acquisition(_message.Message):
    __slots__ = ("state", "plan")
    STATE_FIELD_NUMBER: _ClassVar[int]
    PLAN_FIELD_NUMBER: _ClassVar[int]
    state: State
    plan: str
    def __init__(self, state: _Optional[_Union[State, _Mapping]] = ..., plan: _Optional[str] = ...) -> None: ...

class PlanChange(_message.Message):
    __slots__ = ("state", "plan")
    STATE_FIELD_NUMBER: _ClassVar[int]
    PLAN_FIELD_NUMBER: _ClassVar[int]
    state: State
    plan: str
    def __init__(self, state: _Optional[_Union[State, _Mapping]] = ..., plan: _Optional[str] = ...) -> None: ...

class WinBack(_message.Message):
    __slots__ = ("state", "plan")
    STATE_FIELD_NUMBER: _ClassVar[int]
    PLAN_FIELD_NUMBER: _ClassVar[int]
    state: State
    plan: str
    def __init__(self, state: _Optional[_Union[State, _Mapping]] = ..., plan: _Optional[str] = ...) -> None: ...

class EngagementChange(_message.Message):
    __slots__ = ("state", "axis", "level")
    STATE_FIELD_NUMBER: _ClassVar[int]
    AXIS_FIELD_NUMBER: _ClassVar[int]
    LEVEL_FIELD_NUMBER: _ClassVar[int]
    state: State
    axis: str
    level: str
    def __init__(self, state: _Optional[_Union[State, _Mapping]] = ..., axis: _Optional[str] = ..., level: _Optional[str] = ...) -> None: ...

class StateMove(_message.Message):
    __slots__ = ("before", "after")
    BEFORE_FIELD_NUMBER: _ClassVar[int]
    AFTER_FIELD_NUMBER: _ClassVar[int]
    before: State
    after: State
    def __init__(self, before: _Optional[_Union[State, _Mapping]] = ..., after: _Optional[_Union[State, _Mapping]] = ...) -> None: ...

class GetContrastRequest(_message.Message):
    __slots__ = ("name", "version", "stream", "horizon", "interval_level", "acquisition", "plan_change", "win_back", "engagement_change", "state_move")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    ACQUISITION_FIELD_NUMBER: _ClassVar[int]
    PLAN_CHANGE_FIELD_NUMBER: _ClassVar[int]
    WIN_BACK_FIELD_NUMBER: _ClassVar[int]
    ENGAGEMENT_CHANGE_FIELD_NUMBER: _ClassVar[int]
    STATE_MOVE_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    horizon: int
    interval_level: float
    acquisition: Acquisition
    plan_change: PlanChange
    win_back: WinBack
    engagement_change: EngagementChange
    state_move: StateMove
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., horizon: _Optional[int] = ..., interval_level: _Optional[float] = ..., acquisition: _Optional[_Union[Acquisition, _Mapping]] = ..., plan_change: _Optional[_Union[PlanChange, _Mapping]] = ..., win_back: _Optional[_Union[WinBack, _Mapping]] = ..., engagement_change: _Optional[_Union[EngagementChange, _Mapping]] = ..., state_move: _Optional[_Union[StateMove, _Mapping]] = ...) -> None: ...

class GetContrastResponse(_message.Message):
    __slots__ = ("name", "version", "stream", "kind", "value", "details", "horizon", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    KIND_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    DETAILS_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    kind: str
    value: Figure
    details: _struct_pb2.Struct
    horizon: int
    caution: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., kind: _Optional[str] = ..., value: _Optional[_Union[Figure, _Mapping]] = ..., details: _Optional[_Union[_struct_pb2.Struct, _Mapping]] = ..., horizon: _Optional[int] = ..., caution: _Optional[str] = ...) -> None: ...

class GetCohortContrastRequest(_message.Message):
    __slots__ = ("name", "version", "stream", "horizon", "interval_level", "cohort", "after")
    class AfterEntry(_message.Message):
        __slots__ = ("key", "value")
        KEY_FIELD_NUMBER: _ClassVar[int]
        VALUE_FIELD_NUMBER: _ClassVar[int]
        key: str
        value: str
        def __init__(self, key: _Optional[str] = ..., value: _Optional[str] = ...) -> None: ...
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    COHORT_FIELD_NUMBER: _ClassVar[int]
    AFTER_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    horizon: int
    interval_level: float
    cohort: Cohort
    after: _containers.ScalarMap[str, str]
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., horizon: _Optional[int] = ..., interval_level: _Optional[float] = ..., cohort: _Optional[_Union[Cohort, _Mapping]] = ..., after: _Optional[_Mapping[str, str]] = ...) -> None: ...

class GetCohortContrastResponse(_message.Message):
    __slots__ = ("name", "version", "stream", "value", "details", "horizon", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    DETAILS_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    value: Figure
    details: _struct_pb2.Struct
    horizon: int
    caution: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., value: _Optional[_Union[Figure, _Mapping]] = ..., details: _Optional[_Union[_struct_pb2.Struct, _Mapping]] = ..., horizon: _Optional[int] = ..., caution: _Optional[str] = ...) -> None: ...

class CellSelection(_message.Message):
    __slots__ = ("axis", "levels")
    AXIS_FIELD_NUMBER: _ClassVar[int]
    LEVELS_FIELD_NUMBER: _ClassVar[int]
    axis: str
    levels: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, axis: _Optional[str] = ..., levels: _Optional[_Iterable[str]] = ...) -> None: ...

class TransitionChange(_message.Message):
    __slots__ = ("axis", "to", "delta", "when")
    AXIS_FIELD_NUMBER: _ClassVar[int]
    TO_FIELD_NUMBER: _ClassVar[int]
    DELTA_FIELD_NUMBER: _ClassVar[int]
    WHEN_FIELD_NUMBER: _ClassVar[int]
    axis: str
    to: str
    delta: float
    when: _containers.RepeatedCompositeFieldContainer[CellSelection]
    def __init__(self, axis: _Optional[str] = ..., to: _Optional[str] = ..., delta: _Optional[float] = ..., when: _Optional[_Iterable[_Union[CellSelection, _Mapping]]] = ...) -> None: ...

class ComputeTransitionChangeRequest(_message.Message):
    __slots__ = ("name", "version", "stream", "interval_level", "change", "cohort", "states")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    CHANGE_FIELD_NUMBER: _ClassVar[int]
    COHORT_FIELD_NUMBER: _ClassVar[int]
    STATES_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    interval_level: float
    change: TransitionChange
    cohort: Cohort
    states: StateBatch
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., interval_level: _Optional[float] = ..., change: _Optional[_Union[TransitionChange, _Mapping]] = ..., cohort: _Optional[_Union[Cohort, _Mapping]] = ..., states: _Optional[_Union[StateBatch, _Mapping]] = ...) -> None: ...

class ComputeTransitionChangeResponse(_message.Message):
    __slots__ = ("name", "version", "changed_version", "stream", "weighted_delta", "max_abs_delta", "deltas", "lower", "upper", "details", "unit", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    CHANGED_VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    WEIGHTED_DELTA_FIELD_NUMBER: _ClassVar[int]
    MAX_ABS_DELTA_FIELD_NUMBER: _ClassVar[int]
    DELTAS_FIELD_NUMBER: _ClassVar[int]
    LOWER_FIELD_NUMBER: _ClassVar[int]
    UPPER_FIELD_NUMBER: _ClassVar[int]
    DETAILS_FIELD_NUMBER: _ClassVar[int]
    UNIT_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    changed_version: str
    stream: str
    weighted_delta: Figure
    max_abs_delta: float
    deltas: _containers.RepeatedScalarFieldContainer[float]
    lower: _containers.RepeatedScalarFieldContainer[float]
    upper: _containers.RepeatedScalarFieldContainer[float]
    details: _struct_pb2.Struct
    unit: str
    caution: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., changed_version: _Optional[str] = ..., stream: _Optional[str] = ..., weighted_delta: _Optional[_Union[Figure, _Mapping]] = ..., max_abs_delta: _Optional[float] = ..., deltas: _Optional[_Iterable[float]] = ..., lower: _Optional[_Iterable[float]] = ..., upper: _Optional[_Iterable[float]] = ..., details: _Optional[_Union[_struct_pb2.Struct, _Mapping]] = ..., unit: _Optional[str] = ..., caution: _Optional[str] = ...) -> None: ...

class MarginalEntry(_message.Message):
    __slots__ = ("axis", "cell", "to", "probability", "per_point", "gradient", "rank")
    class CellEntry(_message.Message):
        __slots__ = ("key", "value")
        KEY_FIELD_NUMBER: _ClassVar[int]
        VALUE_FIELD_NUMBER: _ClassVar[int]
        key: str
        value: str
        def __init__(self, key: _Optional[str] = ..., value: _Optional[str] = ...) -> None: ...
    AXIS_FIELD_NUMBER: _ClassVar[int]
    CELL_FIELD_NUMBER: _ClassVar[int]
    TO_FIELD_NUMBER: _ClassVar[int]
    PROBABILITY_FIELD_NUMBER: _ClassVar[int]
    PER_POINT_FIELD_NUMBER: _ClassVar[int]
    GRADIENT_FIELD_NUMBER: _ClassVar[int]
    RANK_FIELD_NUMBER: _ClassVar[int]
    axis: str
    cell: _containers.ScalarMap[str, str]
    to: str
    probability: float
    per_point: float
    gradient: float
    rank: int
    def __init__(self, axis: _Optional[str] = ..., cell: _Optional[_Mapping[str, str]] = ..., to: _Optional[str] = ..., probability: _Optional[float] = ..., per_point: _Optional[float] = ..., gradient: _Optional[float] = ..., rank: _Optional[int] = ...) -> None: ...

class ListMarginalValuesRequest(_message.Message):
    __slots__ = ("name", "version", "stream", "cohort", "page_size")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    COHORT_FIELD_NUMBER: _ClassVar[int]
    PAGE_SIZE_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    cohort: Cohort
    page_size: int
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., cohort: _Optional[_Union[Cohort, _Mapping]] = ..., page_size: _Optional[int] = ...) -> None: ...

class ListMarginalValuesResponse(_message.Message):
    __slots__ = ("name", "version", "stream", "objective", "entries", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    OBJECTIVE_FIELD_NUMBER: _ClassVar[int]
    ENTRIES_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    objective: Figure
    entries: _containers.RepeatedCompositeFieldContainer[MarginalEntry]
    caution: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., objective: _Optional[_Union[Figure, _Mapping]] = ..., entries: _Optional[_Iterable[_Union[MarginalEntry, _Mapping]]] = ..., caution: _Optional[str] = ...) -> None: ...

class FactorEntry(_message.Message):
    __slots__ = ("axis", "cell", "to")
    class CellEntry(_message.Message):
        __slots__ = ("key", "value")
        KEY_FIELD_NUMBER: _ClassVar[int]
        VALUE_FIELD_NUMBER: _ClassVar[int]
        key: str
        value: str
        def __init__(self, key: _Optional[str] = ..., value: _Optional[str] = ...) -> None: ...
    AXIS_FIELD_NUMBER: _ClassVar[int]
    CELL_FIELD_NUMBER: _ClassVar[int]
    TO_FIELD_NUMBER: _ClassVar[int]
    axis: str
    cell: _containers.ScalarMap[str, str]
    to: str
    def __init__(self, axis: _Optional[str] = ..., cell: _Optional[_Mapping[str, str]] = ..., to: _Optional[str] = ...) -> None: ...

class StateTransition(_message.Message):
    __slots__ = ("from_state", "to_state")
    FROM_STATE_FIELD_NUMBER: _ClassVar[int]
    TO_STATE_FIELD_NUMBER: _ClassVar[int]
    from_state: State
    to_state: State
    def __init__(self, from_state: _Optional[_Union[State, _Mapping]] = ..., to_state: _Optional[_Union[State, _Mapping]] = ...) -> None: ...

class GetMarginalValueRequest(_message.Message):
    __slots__ = ("name", "version", "stream", "cohort", "entry", "transition")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    COHORT_FIELD_NUMBER: _ClassVar[int]
    ENTRY_FIELD_NUMBER: _ClassVar[int]
    TRANSITION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    cohort: Cohort
    entry: FactorEntry
    transition: StateTransition
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., cohort: _Optional[_Union[Cohort, _Mapping]] = ..., entry: _Optional[_Union[FactorEntry, _Mapping]] = ..., transition: _Optional[_Union[StateTransition, _Mapping]] = ...) -> None: ...

class GetMarginalValueResponse(_message.Message):
    __slots__ = ("name", "version", "stream", "objective", "entry", "transition_gradient", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    OBJECTIVE_FIELD_NUMBER: _ClassVar[int]
    ENTRY_FIELD_NUMBER: _ClassVar[int]
    TRANSITION_GRADIENT_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    version: str
    stream: str
    objective: Figure
    entry: MarginalEntry
    transition_gradient: float
    caution: str
    def __init__(self, name: _Optional[str] = ..., version: _Optional[str] = ..., stream: _Optional[str] = ..., objective: _Optional[_Union[Figure, _Mapping]] = ..., entry: _Optional[_Union[MarginalEntry, _Mapping]] = ..., transition_gradient: _Optional[float] = ..., caution: _Optional[str] = ...) -> None: ...

class ComputeReadoutRequest(_message.Message):
    __slots__ = ("name", "control_version", "treatment_version", "stream", "cohort", "interval_level", "seed")
    NAME_FIELD_NUMBER: _ClassVar[int]
    CONTROL_VERSION_FIELD_NUMBER: _ClassVar[int]
    TREATMENT_VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    COHORT_FIELD_NUMBER: _ClassVar[int]
    INTERVAL_LEVEL_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    name: str
    control_version: str
    treatment_version: str
    stream: str
    cohort: Cohort
    interval_level: float
    seed: int
    def __init__(self, name: _Optional[str] = ..., control_version: _Optional[str] = ..., treatment_version: _Optional[str] = ..., stream: _Optional[str] = ..., cohort: _Optional[_Union[Cohort, _Mapping]] = ..., interval_level: _Optional[float] = ..., seed: _Optional[int] = ...) -> None: ...

class ComputeReadoutResponse(_message.Message):
    __slots__ = ("name", "control_version", "treatment_version", "stream", "difference", "control", "treatment", "long_run", "caution")
    NAME_FIELD_NUMBER: _ClassVar[int]
    CONTROL_VERSION_FIELD_NUMBER: _ClassVar[int]
    TREATMENT_VERSION_FIELD_NUMBER: _ClassVar[int]
    STREAM_FIELD_NUMBER: _ClassVar[int]
    DIFFERENCE_FIELD_NUMBER: _ClassVar[int]
    CONTROL_FIELD_NUMBER: _ClassVar[int]
    TREATMENT_FIELD_NUMBER: _ClassVar[int]
    LONG_RUN_FIELD_NUMBER: _ClassVar[int]
    CAUTION_FIELD_NUMBER: _ClassVar[int]
    name: str
    control_version: str
    treatment_version: str
    stream: str
    difference: Figure
    control: Figure
    treatment: Figure
    long_run: _struct_pb2.Struct
    caution: str
    def __init__(self, name: _Optional[str] = ..., control_version: _Optional[str] = ..., treatment_version: _Optional[str] = ..., stream: _Optional[str] = ..., difference: _Optional[_Union[Figure, _Mapping]] = ..., control: _Optional[_Union[Figure, _Mapping]] = ..., treatment: _Optional[_Union[Figure, _Mapping]] = ..., long_run: _Optional[_Union[_struct_pb2.Struct, _Mapping]] = ..., caution: _Optional[str] = ...) -> None: ...
