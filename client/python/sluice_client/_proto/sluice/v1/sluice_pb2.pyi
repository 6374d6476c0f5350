from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from typing import ClassVar as _ClassVar, Iterable as _Iterable, Mapping as _Mapping, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor
FINISH_REASON_BUDGET_SPENT: FinishReason
FINISH_REASON_DRAWS_COLLECTED: FinishReason
FINISH_REASON_FAILED: FinishReason
FINISH_REASON_SHUTDOWN: FinishReason
FINISH_REASON_STOPPED: FinishReason
FINISH_REASON_TIME_SPENT: FinishReason
FINISH_REASON_UNSPECIFIED: FinishReason
QUANTITY_GRADIENT: Quantity
QUANTITY_LOG_DENSITY: Quantity
QUANTITY_UNSPECIFIED: Quantity
STATE_BURN_IN: State
STATE_FINISHED: State
STATE_SAMPLING: State
STATE_UNSPECIFIED: State

class Draws(_message.Message):
    __slots__ = ["chains", "dim", "iterations", "rows", "seq", "values"]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    SEQ_FIELD_NUMBER: _ClassVar[int]
    VALUES_FIELD_NUMBER: _ClassVar[int]
    chains: _containers.RepeatedScalarFieldContainer[int]
    dim: int
    iterations: _containers.RepeatedScalarFieldContainer[int]
    rows: int
    seq: int
    values: bytes
    def __init__(self, seq: _Optional[int] = ..., rows: _Optional[int] = ..., dim: _Optional[int] = ..., values: _Optional[bytes] = ..., chains: _Optional[_Iterable[int]] = ..., iterations: _Optional[_Iterable[int]] = ...) -> None: ...

class Evaluations(_message.Message):
    __slots__ = ["dim", "first_row", "gradients", "log_densities", "request_id", "rows"]
    DIM_FIELD_NUMBER: _ClassVar[int]
    FIRST_ROW_FIELD_NUMBER: _ClassVar[int]
    GRADIENTS_FIELD_NUMBER: _ClassVar[int]
    LOG_DENSITIES_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    dim: int
    first_row: int
    gradients: bytes
    log_densities: bytes
    request_id: int
    rows: int
    def __init__(self, request_id: _Optional[int] = ..., first_row: _Optional[int] = ..., rows: _Optional[int] = ..., dim: _Optional[int] = ..., gradients: _Optional[bytes] = ..., log_densities: _Optional[bytes] = ...) -> None: ...

class Finished(_message.Message):
    __slots__ = ["message", "parameters", "progress", "reason"]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    PARAMETERS_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    message: str
    parameters: _containers.RepeatedCompositeFieldContainer[ParameterSummary]
    progress: Progress
    reason: FinishReason
    def __init__(self, reason: _Optional[_Union[FinishReason, str]] = ..., message: _Optional[str] = ..., progress: _Optional[_Union[Progress, _Mapping]] = ..., parameters: _Optional[_Iterable[_Union[ParameterSummary, _Mapping]]] = ...) -> None: ...

class ParameterSummary(_message.Message):
    __slots__ = ["count", "mean", "name", "sd"]
    COUNT_FIELD_NUMBER: _ClassVar[int]
    MEAN_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    SD_FIELD_NUMBER: _ClassVar[int]
    count: int
    mean: float
    name: str
    sd: float
    def __init__(self, name: _Optional[str] = ..., mean: _Optional[float] = ..., sd: _Optional[float] = ..., count: _Optional[int] = ...) -> None: ...

class Points(_message.Message):
    __slots__ = ["chains", "dim", "first_row", "points", "quantities", "request_id", "rows", "total_rows"]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    FIRST_ROW_FIELD_NUMBER: _ClassVar[int]
    POINTS_FIELD_NUMBER: _ClassVar[int]
    QUANTITIES_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    TOTAL_ROWS_FIELD_NUMBER: _ClassVar[int]
    chains: _containers.RepeatedScalarFieldContainer[int]
    dim: int
    first_row: int
    points: bytes
    quantities: _containers.RepeatedScalarFieldContainer[Quantity]
    request_id: int
    rows: int
    total_rows: int
    def __init__(self, request_id: _Optional[int] = ..., first_row: _Optional[int] = ..., rows: _Optional[int] = ..., dim: _Optional[int] = ..., points: _Optional[bytes] = ..., chains: _Optional[_Iterable[int]] = ..., quantities: _Optional[_Iterable[_Union[Quantity, str]]] = ..., total_rows: _Optional[int] = ...) -> None: ...

class Progress(_message.Message):
    __slots__ = ["draws_sent", "evaluations_left", "evaluations_per_second", "evaluations_used", "seconds_left", "seconds_used", "state", "steps"]
    DRAWS_SENT_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_LEFT_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_PER_SECOND_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_USED_FIELD_NUMBER: _ClassVar[int]
    SECONDS_LEFT_FIELD_NUMBER: _ClassVar[int]
    SECONDS_USED_FIELD_NUMBER: _ClassVar[int]
    STATE_FIELD_NUMBER: _ClassVar[int]
    STEPS_FIELD_NUMBER: _ClassVar[int]
    draws_sent: int
    evaluations_left: int
    evaluations_per_second: float
    evaluations_used: int
    seconds_left: float
    seconds_used: float
    state: State
    steps: int
    def __init__(self, state: _Optional[_Union[State, str]] = ..., steps: _Optional[int] = ..., evaluations_used: _Optional[int] = ..., evaluations_left: _Optional[int] = ..., seconds_used: _Optional[float] = ..., seconds_left: _Optional[float] = ..., draws_sent: _Optional[int] = ..., evaluations_per_second: _Optional[float] = ...) -> None: ...

class Register(_message.Message):
    __slots__ = ["burn_in", "chains", "dim", "draws_per_chain", "keep_every", "kernel", "max_evaluations", "max_message_bytes", "max_seconds", "names", "progress_every_steps", "progress_interval_seconds", "seed", "start", "start_rows", "step"]
    BURN_IN_FIELD_NUMBER: _ClassVar[int]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    DRAWS_PER_CHAIN_FIELD_NUMBER: _ClassVar[int]
    KEEP_EVERY_FIELD_NUMBER: _ClassVar[int]
    KERNEL_FIELD_NUMBER: _ClassVar[int]
    MAX_EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    MAX_MESSAGE_BYTES_FIELD_NUMBER: _ClassVar[int]
    MAX_SECONDS_FIELD_NUMBER: _ClassVar[int]
    NAMES_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_EVERY_STEPS_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_INTERVAL_SECONDS_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    START_FIELD_NUMBER: _ClassVar[int]
    START_ROWS_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    burn_in: int
    chains: int
    dim: int
    draws_per_chain: int
    keep_every: int
    kernel: str
    max_evaluations: int
    max_message_bytes: int
    max_seconds: float
    names: _containers.RepeatedScalarFieldContainer[str]
    progress_every_steps: int
    progress_interval_seconds: float
    seed: int
    start: bytes
    start_rows: int
    step: float
    def __init__(self, dim: _Optional[int] = ..., chains: _Optional[int] = ..., kernel: _Optional[str] = ..., start: _Optional[bytes] = ..., start_rows: _Optional[int] = ..., step: _Optional[float] = ..., burn_in: _Optional[int] = ..., keep_every: _Optional[int] = ..., draws_per_chain: _Optional[int] = ..., max_evaluations: _Optional[int] = ..., max_seconds: _Optional[float] = ..., progress_every_steps: _Optional[int] = ..., progress_interval_seconds: _Optional[float] = ..., seed: _Optional[int] = ..., names: _Optional[_Iterable[str]] = ..., max_message_bytes: _Optional[int] = ...) -> None: ...

class Registered(_message.Message):
    __slots__ = ["evaluations_per_step", "kernel", "max_message_bytes", "names", "seed", "session_id", "step"]
    EVALUATIONS_PER_STEP_FIELD_NUMBER: _ClassVar[int]
    KERNEL_FIELD_NUMBER: _ClassVar[int]
    MAX_MESSAGE_BYTES_FIELD_NUMBER: _ClassVar[int]
    NAMES_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    evaluations_per_step: int
    kernel: str
    max_message_bytes: int
    names: _containers.RepeatedScalarFieldContainer[str]
    seed: int
    session_id: str
    step: float
    def __init__(self, session_id: _Optional[str] = ..., seed: _Optional[int] = ..., kernel: _Optional[str] = ..., step: _Optional[float] = ..., evaluations_per_step: _Optional[int] = ..., max_message_bytes: _Optional[int] = ..., names: _Optional[_Iterable[str]] = ...) -> None: ...

class SessionRequest(_message.Message):
    __slots__ = ["evaluations", "register", "stop"]
    EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    REGISTER_FIELD_NUMBER: _ClassVar[int]
    STOP_FIELD_NUMBER: _ClassVar[int]
    evaluations: Evaluations
    register: Register
    stop: Stop
    def __init__(self, register: _Optional[_Union[Register, _Mapping]] = ..., evaluations: _Optional[_Union[Evaluations, _Mapping]] = ..., stop: _Optional[_Union[Stop, _Mapping]] = ...) -> None: ...

class SessionResponse(_message.Message):
    __slots__ = ["draws", "finished", "points", "progress", "registered"]
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    FINISHED_FIELD_NUMBER: _ClassVar[int]
    POINTS_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_FIELD_NUMBER: _ClassVar[int]
    REGISTERED_FIELD_NUMBER: _ClassVar[int]
    draws: Draws
    finished: Finished
    points: Points
    progress: Progress
    registered: Registered
    def __init__(self, registered: _Optional[_Union[Registered, _Mapping]] = ..., points: _Optional[_Union[Points, _Mapping]] = ..., draws: _Optional[_Union[Draws, _Mapping]] = ..., progress: _Optional[_Union[Progress, _Mapping]] = ..., finished: _Optional[_Union[Finished, _Mapping]] = ...) -> None: ...

class Stop(_message.Message):
    __slots__ = ["reason"]
    REASON_FIELD_NUMBER: _ClassVar[int]
    reason: str
    def __init__(self, reason: _Optional[str] = ...) -> None: ...

class Quantity(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class State(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class FinishReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []
