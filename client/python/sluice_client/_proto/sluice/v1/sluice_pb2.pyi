from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from typing import ClassVar as _ClassVar, Iterable as _Iterable, Mapping as _Mapping, Optional as _Optional, Union as _Union

BOUND_SOURCE_DECLARED: BoundSource
BOUND_SOURCE_ESTIMATED: BoundSource
BOUND_SOURCE_UNSPECIFIED: BoundSource
CHECK_STATUS_FAIL: CheckStatus
CHECK_STATUS_PASS: CheckStatus
CHECK_STATUS_UNSPECIFIED: CheckStatus
CHECK_STATUS_WARN: CheckStatus
DESCRIPTOR: _descriptor.FileDescriptor
FINISH_REASON_BUDGET_SPENT: FinishReason
FINISH_REASON_CHECK_FAILED: FinishReason
FINISH_REASON_DRAWS_COLLECTED: FinishReason
FINISH_REASON_FAILED: FinishReason
FINISH_REASON_SHUTDOWN: FinishReason
FINISH_REASON_STOPPED: FinishReason
FINISH_REASON_TARGET_MET: FinishReason
FINISH_REASON_TIME_SPENT: FinishReason
FINISH_REASON_UNSPECIFIED: FinishReason
GRADIENT_KIND_EXACT: GradientKind
GRADIENT_KIND_STOCHASTIC: GradientKind
GRADIENT_KIND_UNSPECIFIED: GradientKind
METRIC_FORM_DENSE: MetricForm
METRIC_FORM_DIAGONAL: MetricForm
METRIC_FORM_IDENTITY: MetricForm
METRIC_FORM_UNSPECIFIED: MetricForm
METRIC_TV: Metric
METRIC_UNSPECIFIED: Metric
METRIC_W2: Metric
QUANTITY_GRADIENT: Quantity
QUANTITY_HESSIAN: Quantity
QUANTITY_HESSIAN_VECTOR: Quantity
QUANTITY_LOG_DENSITY: Quantity
QUANTITY_UNSPECIFIED: Quantity
STATE_BURN_IN: State
STATE_FINISHED: State
STATE_SAMPLING: State
STATE_UNSPECIFIED: State
STEIN_STATE_INDISTINGUISHABLE: SteinState
STEIN_STATE_SIGNIFICANT: SteinState
STEIN_STATE_UNDEFINED: SteinState
STEIN_STATE_UNSPECIFIED: SteinState

class Attach(_message.Message):
    __slots__ = ["name", "session_id", "token"]
    NAME_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    TOKEN_FIELD_NUMBER: _ClassVar[int]
    name: str
    session_id: str
    token: str
    def __init__(self, session_id: _Optional[str] = ..., token: _Optional[str] = ..., name: _Optional[str] = ...) -> None: ...

class AttachRequest(_message.Message):
    __slots__ = ["attach", "evaluations"]
    ATTACH_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    attach: Attach
    evaluations: Evaluations
    def __init__(self, attach: _Optional[_Union[Attach, _Mapping]] = ..., evaluations: _Optional[_Union[Evaluations, _Mapping]] = ...) -> None: ...

class AttachResponse(_message.Message):
    __slots__ = ["attached", "points"]
    ATTACHED_FIELD_NUMBER: _ClassVar[int]
    POINTS_FIELD_NUMBER: _ClassVar[int]
    attached: Attached
    points: Points
    def __init__(self, attached: _Optional[_Union[Attached, _Mapping]] = ..., points: _Optional[_Union[Points, _Mapping]] = ...) -> None: ...

class Attached(_message.Message):
    __slots__ = ["dim", "max_message_bytes", "names", "session_id"]
    DIM_FIELD_NUMBER: _ClassVar[int]
    MAX_MESSAGE_BYTES_FIELD_NUMBER: _ClassVar[int]
    NAMES_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    dim: int
    max_message_bytes: int
    names: _containers.RepeatedScalarFieldContainer[str]
    session_id: str
    def __init__(self, session_id: _Optional[str] = ..., dim: _Optional[int] = ..., max_message_bytes: _Optional[int] = ..., names: _Optional[_Iterable[str]] = ...) -> None: ...

class Bound(_message.Message):
    __slots__ = ["bias_term", "discretisation_term", "label", "metric", "noise_term", "source", "start_term", "value"]
    BIAS_TERM_FIELD_NUMBER: _ClassVar[int]
    DISCRETISATION_TERM_FIELD_NUMBER: _ClassVar[int]
    LABEL_FIELD_NUMBER: _ClassVar[int]
    METRIC_FIELD_NUMBER: _ClassVar[int]
    NOISE_TERM_FIELD_NUMBER: _ClassVar[int]
    SOURCE_FIELD_NUMBER: _ClassVar[int]
    START_TERM_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    bias_term: float
    discretisation_term: float
    label: str
    metric: Metric
    noise_term: float
    source: BoundSource
    start_term: float
    value: float
    def __init__(self, metric: _Optional[_Union[Metric, str]] = ..., value: _Optional[float] = ..., source: _Optional[_Union[BoundSource, str]] = ..., label: _Optional[str] = ..., start_term: _Optional[float] = ..., discretisation_term: _Optional[float] = ..., noise_term: _Optional[float] = ..., bias_term: _Optional[float] = ...) -> None: ...

class Check(_message.Message):
    __slots__ = ["figure", "message", "name", "status"]
    FIGURE_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    STATUS_FIELD_NUMBER: _ClassVar[int]
    figure: float
    message: str
    name: str
    status: CheckStatus
    def __init__(self, name: _Optional[str] = ..., status: _Optional[_Union[CheckStatus, str]] = ..., figure: _Optional[float] = ..., message: _Optional[str] = ...) -> None: ...

class Curvature(_message.Message):
    __slots__ = ["penalty_centre", "second_moment", "smoothness", "start_distance", "strong_convexity"]
    PENALTY_CENTRE_FIELD_NUMBER: _ClassVar[int]
    SECOND_MOMENT_FIELD_NUMBER: _ClassVar[int]
    SMOOTHNESS_FIELD_NUMBER: _ClassVar[int]
    START_DISTANCE_FIELD_NUMBER: _ClassVar[int]
    STRONG_CONVEXITY_FIELD_NUMBER: _ClassVar[int]
    penalty_centre: bytes
    second_moment: float
    smoothness: float
    start_distance: float
    strong_convexity: float
    def __init__(self, strong_convexity: _Optional[float] = ..., smoothness: _Optional[float] = ..., start_distance: _Optional[float] = ..., second_moment: _Optional[float] = ..., penalty_centre: _Optional[bytes] = ...) -> None: ...

class CurvatureEstimate(_message.Message):
    __slots__ = ["not_convex", "pairs", "probe_evaluations", "probed_smoothness", "probed_strong_convexity", "smoothness_at_least", "strong_convexity_at_most"]
    NOT_CONVEX_FIELD_NUMBER: _ClassVar[int]
    PAIRS_FIELD_NUMBER: _ClassVar[int]
    PROBED_SMOOTHNESS_FIELD_NUMBER: _ClassVar[int]
    PROBED_STRONG_CONVEXITY_FIELD_NUMBER: _ClassVar[int]
    PROBE_EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    SMOOTHNESS_AT_LEAST_FIELD_NUMBER: _ClassVar[int]
    STRONG_CONVEXITY_AT_MOST_FIELD_NUMBER: _ClassVar[int]
    not_convex: bool
    pairs: int
    probe_evaluations: int
    probed_smoothness: float
    probed_strong_convexity: float
    smoothness_at_least: float
    strong_convexity_at_most: float
    def __init__(self, pairs: _Optional[int] = ..., smoothness_at_least: _Optional[float] = ..., strong_convexity_at_most: _Optional[float] = ..., not_convex: bool = ..., probed_smoothness: _Optional[float] = ..., probed_strong_convexity: _Optional[float] = ..., probe_evaluations: _Optional[int] = ...) -> None: ...

class Draws(_message.Message):
    __slots__ = ["chains", "dim", "from_request_id", "iterations", "point_rows", "rows", "seq", "values"]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    FROM_REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    POINT_ROWS_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    SEQ_FIELD_NUMBER: _ClassVar[int]
    VALUES_FIELD_NUMBER: _ClassVar[int]
    chains: _containers.RepeatedScalarFieldContainer[int]
    dim: int
    from_request_id: int
    iterations: _containers.RepeatedScalarFieldContainer[int]
    point_rows: _containers.RepeatedScalarFieldContainer[int]
    rows: int
    seq: int
    values: bytes
    def __init__(self, seq: _Optional[int] = ..., rows: _Optional[int] = ..., dim: _Optional[int] = ..., values: _Optional[bytes] = ..., chains: _Optional[_Iterable[int]] = ..., iterations: _Optional[_Iterable[int]] = ..., from_request_id: _Optional[int] = ..., point_rows: _Optional[_Iterable[int]] = ...) -> None: ...

class Envelope(_message.Message):
    __slots__ = ["log_bound", "mean", "scale"]
    LOG_BOUND_FIELD_NUMBER: _ClassVar[int]
    MEAN_FIELD_NUMBER: _ClassVar[int]
    SCALE_FIELD_NUMBER: _ClassVar[int]
    log_bound: float
    mean: bytes
    scale: float
    def __init__(self, mean: _Optional[bytes] = ..., scale: _Optional[float] = ..., log_bound: _Optional[float] = ...) -> None: ...

class Evaluations(_message.Message):
    __slots__ = ["dim", "first_row", "gradients", "hessian_vectors", "hessians", "log_densities", "request_id", "rows"]
    DIM_FIELD_NUMBER: _ClassVar[int]
    FIRST_ROW_FIELD_NUMBER: _ClassVar[int]
    GRADIENTS_FIELD_NUMBER: _ClassVar[int]
    HESSIANS_FIELD_NUMBER: _ClassVar[int]
    HESSIAN_VECTORS_FIELD_NUMBER: _ClassVar[int]
    LOG_DENSITIES_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    dim: int
    first_row: int
    gradients: bytes
    hessian_vectors: bytes
    hessians: bytes
    log_densities: bytes
    request_id: int
    rows: int
    def __init__(self, request_id: _Optional[int] = ..., first_row: _Optional[int] = ..., rows: _Optional[int] = ..., dim: _Optional[int] = ..., gradients: _Optional[bytes] = ..., log_densities: _Optional[bytes] = ..., hessians: _Optional[bytes] = ..., hessian_vectors: _Optional[bytes] = ...) -> None: ...

class Finished(_message.Message):
    __slots__ = ["checks", "message", "parameters", "parameters_omitted", "progress", "reason"]
    CHECKS_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    PARAMETERS_FIELD_NUMBER: _ClassVar[int]
    PARAMETERS_OMITTED_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    checks: _containers.RepeatedCompositeFieldContainer[Check]
    message: str
    parameters: _containers.RepeatedCompositeFieldContainer[ParameterSummary]
    parameters_omitted: int
    progress: Progress
    reason: FinishReason
    def __init__(self, reason: _Optional[_Union[FinishReason, str]] = ..., message: _Optional[str] = ..., progress: _Optional[_Union[Progress, _Mapping]] = ..., parameters: _Optional[_Iterable[_Union[ParameterSummary, _Mapping]]] = ..., parameters_omitted: _Optional[int] = ..., checks: _Optional[_Iterable[_Union[Check, _Mapping]]] = ...) -> None: ...

class FollowHeader(_message.Message):
    __slots__ = ["burn_in", "chains", "dim", "draws_per_chain", "evaluations_per_step", "first_seq", "keep_every", "kernel", "max_evaluations", "max_seconds", "names", "next_seq", "seed", "session_id", "step", "wants"]
    BURN_IN_FIELD_NUMBER: _ClassVar[int]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    DRAWS_PER_CHAIN_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_PER_STEP_FIELD_NUMBER: _ClassVar[int]
    FIRST_SEQ_FIELD_NUMBER: _ClassVar[int]
    KEEP_EVERY_FIELD_NUMBER: _ClassVar[int]
    KERNEL_FIELD_NUMBER: _ClassVar[int]
    MAX_EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    MAX_SECONDS_FIELD_NUMBER: _ClassVar[int]
    NAMES_FIELD_NUMBER: _ClassVar[int]
    NEXT_SEQ_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    WANTS_FIELD_NUMBER: _ClassVar[int]
    burn_in: int
    chains: int
    dim: int
    draws_per_chain: int
    evaluations_per_step: int
    first_seq: int
    keep_every: int
    kernel: str
    max_evaluations: int
    max_seconds: float
    names: _containers.RepeatedScalarFieldContainer[str]
    next_seq: int
    seed: int
    session_id: str
    step: float
    wants: Wants
    def __init__(self, session_id: _Optional[str] = ..., dim: _Optional[int] = ..., chains: _Optional[int] = ..., kernel: _Optional[str] = ..., names: _Optional[_Iterable[str]] = ..., step: _Optional[float] = ..., seed: _Optional[int] = ..., burn_in: _Optional[int] = ..., keep_every: _Optional[int] = ..., draws_per_chain: _Optional[int] = ..., max_evaluations: _Optional[int] = ..., max_seconds: _Optional[float] = ..., evaluations_per_step: _Optional[int] = ..., wants: _Optional[_Union[Wants, _Mapping]] = ..., first_seq: _Optional[int] = ..., next_seq: _Optional[int] = ...) -> None: ...

class FollowRequest(_message.Message):
    __slots__ = ["from_seq", "session_id", "token"]
    FROM_SEQ_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    TOKEN_FIELD_NUMBER: _ClassVar[int]
    from_seq: int
    session_id: str
    token: str
    def __init__(self, session_id: _Optional[str] = ..., from_seq: _Optional[int] = ..., token: _Optional[str] = ...) -> None: ...

class FollowResponse(_message.Message):
    __slots__ = ["draws", "finished", "header", "progress"]
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    FINISHED_FIELD_NUMBER: _ClassVar[int]
    HEADER_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_FIELD_NUMBER: _ClassVar[int]
    draws: Draws
    finished: Finished
    header: FollowHeader
    progress: Progress
    def __init__(self, draws: _Optional[_Union[Draws, _Mapping]] = ..., finished: _Optional[_Union[Finished, _Mapping]] = ..., header: _Optional[_Union[FollowHeader, _Mapping]] = ..., progress: _Optional[_Union[Progress, _Mapping]] = ...) -> None: ...

class GradientNoise(_message.Message):
    __slots__ = ["bias", "data_size", "kind", "minibatch_size", "replicates", "variance"]
    BIAS_FIELD_NUMBER: _ClassVar[int]
    DATA_SIZE_FIELD_NUMBER: _ClassVar[int]
    KIND_FIELD_NUMBER: _ClassVar[int]
    MINIBATCH_SIZE_FIELD_NUMBER: _ClassVar[int]
    REPLICATES_FIELD_NUMBER: _ClassVar[int]
    VARIANCE_FIELD_NUMBER: _ClassVar[int]
    bias: float
    data_size: int
    kind: GradientKind
    minibatch_size: int
    replicates: int
    variance: float
    def __init__(self, kind: _Optional[_Union[GradientKind, str]] = ..., variance: _Optional[float] = ..., bias: _Optional[float] = ..., data_size: _Optional[int] = ..., minibatch_size: _Optional[int] = ..., replicates: _Optional[int] = ...) -> None: ...

class KernelReport(_message.Message):
    __slots__ = ["acceptance_rate", "acceptance_rates", "adapting", "evaluations_per_step_mean", "krylov_error_estimate", "krylov_iterations", "krylov_unconverged", "step"]
    ACCEPTANCE_RATES_FIELD_NUMBER: _ClassVar[int]
    ACCEPTANCE_RATE_FIELD_NUMBER: _ClassVar[int]
    ADAPTING_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_PER_STEP_MEAN_FIELD_NUMBER: _ClassVar[int]
    KRYLOV_ERROR_ESTIMATE_FIELD_NUMBER: _ClassVar[int]
    KRYLOV_ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    KRYLOV_UNCONVERGED_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    acceptance_rate: float
    acceptance_rates: _containers.RepeatedScalarFieldContainer[float]
    adapting: bool
    evaluations_per_step_mean: float
    krylov_error_estimate: float
    krylov_iterations: int
    krylov_unconverged: int
    step: float
    def __init__(self, step: _Optional[float] = ..., adapting: bool = ..., acceptance_rates: _Optional[_Iterable[float]] = ..., krylov_iterations: _Optional[int] = ..., krylov_error_estimate: _Optional[float] = ..., krylov_unconverged: _Optional[int] = ..., evaluations_per_step_mean: _Optional[float] = ..., acceptance_rate: _Optional[float] = ...) -> None: ...

class MetricReport(_message.Message):
    __slots__ = ["adapting", "condition", "kind", "shrinkage", "source", "updated_at_step", "updates", "window_ends"]
    ADAPTING_FIELD_NUMBER: _ClassVar[int]
    CONDITION_FIELD_NUMBER: _ClassVar[int]
    KIND_FIELD_NUMBER: _ClassVar[int]
    SHRINKAGE_FIELD_NUMBER: _ClassVar[int]
    SOURCE_FIELD_NUMBER: _ClassVar[int]
    UPDATED_AT_STEP_FIELD_NUMBER: _ClassVar[int]
    UPDATES_FIELD_NUMBER: _ClassVar[int]
    WINDOW_ENDS_FIELD_NUMBER: _ClassVar[int]
    adapting: bool
    condition: float
    kind: str
    shrinkage: float
    source: str
    updated_at_step: int
    updates: int
    window_ends: _containers.RepeatedScalarFieldContainer[int]
    def __init__(self, kind: _Optional[str] = ..., source: _Optional[str] = ..., adapting: bool = ..., condition: _Optional[float] = ..., updated_at_step: _Optional[int] = ..., updates: _Optional[int] = ..., shrinkage: _Optional[float] = ..., window_ends: _Optional[_Iterable[int]] = ...) -> None: ...

class NoiseEstimate(_message.Message):
    __slots__ = ["declared", "epochs", "requests", "variance", "variance_se", "warning"]
    DECLARED_FIELD_NUMBER: _ClassVar[int]
    EPOCHS_FIELD_NUMBER: _ClassVar[int]
    REQUESTS_FIELD_NUMBER: _ClassVar[int]
    VARIANCE_FIELD_NUMBER: _ClassVar[int]
    VARIANCE_SE_FIELD_NUMBER: _ClassVar[int]
    WARNING_FIELD_NUMBER: _ClassVar[int]
    declared: float
    epochs: float
    requests: int
    variance: float
    variance_se: float
    warning: str
    def __init__(self, variance: _Optional[float] = ..., variance_se: _Optional[float] = ..., requests: _Optional[int] = ..., declared: _Optional[float] = ..., epochs: _Optional[float] = ..., warning: _Optional[str] = ...) -> None: ...

class ParameterDiagnostics(_message.Message):
    __slots__ = ["bulk_ess", "mcse_mean", "mean", "name", "rhat", "sd", "tail_ess"]
    BULK_ESS_FIELD_NUMBER: _ClassVar[int]
    MCSE_MEAN_FIELD_NUMBER: _ClassVar[int]
    MEAN_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    RHAT_FIELD_NUMBER: _ClassVar[int]
    SD_FIELD_NUMBER: _ClassVar[int]
    TAIL_ESS_FIELD_NUMBER: _ClassVar[int]
    bulk_ess: float
    mcse_mean: float
    mean: float
    name: str
    rhat: float
    sd: float
    tail_ess: float
    def __init__(self, name: _Optional[str] = ..., mean: _Optional[float] = ..., sd: _Optional[float] = ..., rhat: _Optional[float] = ..., bulk_ess: _Optional[float] = ..., tail_ess: _Optional[float] = ..., mcse_mean: _Optional[float] = ...) -> None: ...

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

class PlanRequest(_message.Message):
    __slots__ = ["bias", "chains", "curvature", "dim", "eps", "evaluations_per_second", "metric", "noise_sd", "second_moment", "start_distance"]
    BIAS_FIELD_NUMBER: _ClassVar[int]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    CURVATURE_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    EPS_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_PER_SECOND_FIELD_NUMBER: _ClassVar[int]
    METRIC_FIELD_NUMBER: _ClassVar[int]
    NOISE_SD_FIELD_NUMBER: _ClassVar[int]
    SECOND_MOMENT_FIELD_NUMBER: _ClassVar[int]
    START_DISTANCE_FIELD_NUMBER: _ClassVar[int]
    bias: float
    chains: int
    curvature: Curvature
    dim: int
    eps: float
    evaluations_per_second: float
    metric: Metric
    noise_sd: float
    second_moment: float
    start_distance: float
    def __init__(self, curvature: _Optional[_Union[Curvature, _Mapping]] = ..., dim: _Optional[int] = ..., eps: _Optional[float] = ..., metric: _Optional[_Union[Metric, str]] = ..., noise_sd: _Optional[float] = ..., bias: _Optional[float] = ..., start_distance: _Optional[float] = ..., second_moment: _Optional[float] = ..., chains: _Optional[int] = ..., evaluations_per_second: _Optional[float] = ...) -> None: ...

class PlanResponse(_message.Message):
    __slots__ = ["assumptions", "bound", "constants_recalled", "evaluations", "evaluations_per_chain", "horizon", "iterations", "penalty", "seconds", "step"]
    ASSUMPTIONS_FIELD_NUMBER: _ClassVar[int]
    BOUND_FIELD_NUMBER: _ClassVar[int]
    CONSTANTS_RECALLED_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_PER_CHAIN_FIELD_NUMBER: _ClassVar[int]
    HORIZON_FIELD_NUMBER: _ClassVar[int]
    ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    PENALTY_FIELD_NUMBER: _ClassVar[int]
    SECONDS_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    assumptions: _containers.RepeatedScalarFieldContainer[str]
    bound: Bound
    constants_recalled: bool
    evaluations: int
    evaluations_per_chain: int
    horizon: float
    iterations: int
    penalty: float
    seconds: float
    step: float
    def __init__(self, step: _Optional[float] = ..., horizon: _Optional[float] = ..., iterations: _Optional[int] = ..., evaluations_per_chain: _Optional[int] = ..., evaluations: _Optional[int] = ..., seconds: _Optional[float] = ..., bound: _Optional[_Union[Bound, _Mapping]] = ..., assumptions: _Optional[_Iterable[str]] = ..., constants_recalled: bool = ..., penalty: _Optional[float] = ...) -> None: ...

class Points(_message.Message):
    __slots__ = ["chains", "dim", "draws", "first_row", "full_data", "minibatch_groups", "points", "quantities", "replicates", "request_id", "rows", "total_rows", "vectors"]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    FIRST_ROW_FIELD_NUMBER: _ClassVar[int]
    FULL_DATA_FIELD_NUMBER: _ClassVar[int]
    MINIBATCH_GROUPS_FIELD_NUMBER: _ClassVar[int]
    POINTS_FIELD_NUMBER: _ClassVar[int]
    QUANTITIES_FIELD_NUMBER: _ClassVar[int]
    REPLICATES_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    TOTAL_ROWS_FIELD_NUMBER: _ClassVar[int]
    VECTORS_FIELD_NUMBER: _ClassVar[int]
    chains: _containers.RepeatedScalarFieldContainer[int]
    dim: int
    draws: Draws
    first_row: int
    full_data: bool
    minibatch_groups: _containers.RepeatedScalarFieldContainer[int]
    points: bytes
    quantities: _containers.RepeatedScalarFieldContainer[Quantity]
    replicates: int
    request_id: int
    rows: int
    total_rows: int
    vectors: bytes
    def __init__(self, request_id: _Optional[int] = ..., first_row: _Optional[int] = ..., rows: _Optional[int] = ..., dim: _Optional[int] = ..., points: _Optional[bytes] = ..., chains: _Optional[_Iterable[int]] = ..., quantities: _Optional[_Iterable[_Union[Quantity, str]]] = ..., total_rows: _Optional[int] = ..., vectors: _Optional[bytes] = ..., minibatch_groups: _Optional[_Iterable[int]] = ..., full_data: bool = ..., replicates: _Optional[int] = ..., draws: _Optional[_Union[Draws, _Mapping]] = ...) -> None: ...

class Progress(_message.Message):
    __slots__ = ["answers_late", "bound", "checks", "curvature", "draws_sent", "evaluations_left", "evaluations_per_second", "evaluations_used", "kernel", "ksd", "metric", "noise", "parameters", "parameters_omitted", "rows_reissued", "seconds_left", "seconds_used", "state", "stein", "steps", "targets", "tuning", "tuning_evaluations", "workers"]
    ANSWERS_LATE_FIELD_NUMBER: _ClassVar[int]
    BOUND_FIELD_NUMBER: _ClassVar[int]
    CHECKS_FIELD_NUMBER: _ClassVar[int]
    CURVATURE_FIELD_NUMBER: _ClassVar[int]
    DRAWS_SENT_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_LEFT_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_PER_SECOND_FIELD_NUMBER: _ClassVar[int]
    EVALUATIONS_USED_FIELD_NUMBER: _ClassVar[int]
    KERNEL_FIELD_NUMBER: _ClassVar[int]
    KSD_FIELD_NUMBER: _ClassVar[int]
    METRIC_FIELD_NUMBER: _ClassVar[int]
    NOISE_FIELD_NUMBER: _ClassVar[int]
    PARAMETERS_FIELD_NUMBER: _ClassVar[int]
    PARAMETERS_OMITTED_FIELD_NUMBER: _ClassVar[int]
    ROWS_REISSUED_FIELD_NUMBER: _ClassVar[int]
    SECONDS_LEFT_FIELD_NUMBER: _ClassVar[int]
    SECONDS_USED_FIELD_NUMBER: _ClassVar[int]
    STATE_FIELD_NUMBER: _ClassVar[int]
    STEIN_FIELD_NUMBER: _ClassVar[int]
    STEPS_FIELD_NUMBER: _ClassVar[int]
    TARGETS_FIELD_NUMBER: _ClassVar[int]
    TUNING_EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    TUNING_FIELD_NUMBER: _ClassVar[int]
    WORKERS_FIELD_NUMBER: _ClassVar[int]
    answers_late: int
    bound: Bound
    checks: _containers.RepeatedCompositeFieldContainer[Check]
    curvature: CurvatureEstimate
    draws_sent: int
    evaluations_left: int
    evaluations_per_second: float
    evaluations_used: int
    kernel: KernelReport
    ksd: float
    metric: MetricReport
    noise: NoiseEstimate
    parameters: _containers.RepeatedCompositeFieldContainer[ParameterDiagnostics]
    parameters_omitted: int
    rows_reissued: int
    seconds_left: float
    seconds_used: float
    state: State
    stein: SteinAssessment
    steps: int
    targets: _containers.RepeatedCompositeFieldContainer[TargetStatus]
    tuning: _containers.RepeatedCompositeFieldContainer[TuningChoice]
    tuning_evaluations: int
    workers: _containers.RepeatedCompositeFieldContainer[WorkerReport]
    def __init__(self, state: _Optional[_Union[State, str]] = ..., steps: _Optional[int] = ..., evaluations_used: _Optional[int] = ..., evaluations_left: _Optional[int] = ..., seconds_used: _Optional[float] = ..., seconds_left: _Optional[float] = ..., draws_sent: _Optional[int] = ..., evaluations_per_second: _Optional[float] = ..., parameters: _Optional[_Iterable[_Union[ParameterDiagnostics, _Mapping]]] = ..., ksd: _Optional[float] = ..., bound: _Optional[_Union[Bound, _Mapping]] = ..., curvature: _Optional[_Union[CurvatureEstimate, _Mapping]] = ..., targets: _Optional[_Iterable[_Union[TargetStatus, _Mapping]]] = ..., noise: _Optional[_Union[NoiseEstimate, _Mapping]] = ..., kernel: _Optional[_Union[KernelReport, _Mapping]] = ..., parameters_omitted: _Optional[int] = ..., workers: _Optional[_Iterable[_Union[WorkerReport, _Mapping]]] = ..., rows_reissued: _Optional[int] = ..., answers_late: _Optional[int] = ..., metric: _Optional[_Union[MetricReport, _Mapping]] = ..., tuning: _Optional[_Iterable[_Union[TuningChoice, _Mapping]]] = ..., tuning_evaluations: _Optional[int] = ..., stein: _Optional[_Union[SteinAssessment, _Mapping]] = ..., checks: _Optional[_Iterable[_Union[Check, _Mapping]]] = ...) -> None: ...

class Register(_message.Message):
    __slots__ = ["accepts_draw_references", "anchor_every", "burn_in", "chain_groups", "chains", "checkpoint_every_steps", "curvature", "curvature_probe_iterations", "dim", "draws_in_points", "draws_per_chain", "envelope", "fixed_point_iterations", "fixed_point_tolerance", "friction", "gradient_check_points", "inverse_mass", "keep_every", "kernel", "krylov_max_iterations", "krylov_tolerance", "max_evaluations", "max_message_bytes", "max_seconds", "metric", "metric_form", "names", "noise", "owner_evaluates", "progress_every_steps", "progress_interval_seconds", "schedule", "seed", "slice_max_expansions", "slice_width", "start", "start_rows", "step", "wants"]
    ACCEPTS_DRAW_REFERENCES_FIELD_NUMBER: _ClassVar[int]
    ANCHOR_EVERY_FIELD_NUMBER: _ClassVar[int]
    BURN_IN_FIELD_NUMBER: _ClassVar[int]
    CHAINS_FIELD_NUMBER: _ClassVar[int]
    CHAIN_GROUPS_FIELD_NUMBER: _ClassVar[int]
    CHECKPOINT_EVERY_STEPS_FIELD_NUMBER: _ClassVar[int]
    CURVATURE_FIELD_NUMBER: _ClassVar[int]
    CURVATURE_PROBE_ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    DIM_FIELD_NUMBER: _ClassVar[int]
    DRAWS_IN_POINTS_FIELD_NUMBER: _ClassVar[int]
    DRAWS_PER_CHAIN_FIELD_NUMBER: _ClassVar[int]
    ENVELOPE_FIELD_NUMBER: _ClassVar[int]
    FIXED_POINT_ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    FIXED_POINT_TOLERANCE_FIELD_NUMBER: _ClassVar[int]
    FRICTION_FIELD_NUMBER: _ClassVar[int]
    GRADIENT_CHECK_POINTS_FIELD_NUMBER: _ClassVar[int]
    INVERSE_MASS_FIELD_NUMBER: _ClassVar[int]
    KEEP_EVERY_FIELD_NUMBER: _ClassVar[int]
    KERNEL_FIELD_NUMBER: _ClassVar[int]
    KRYLOV_MAX_ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    KRYLOV_TOLERANCE_FIELD_NUMBER: _ClassVar[int]
    MAX_EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    MAX_MESSAGE_BYTES_FIELD_NUMBER: _ClassVar[int]
    MAX_SECONDS_FIELD_NUMBER: _ClassVar[int]
    METRIC_FIELD_NUMBER: _ClassVar[int]
    METRIC_FORM_FIELD_NUMBER: _ClassVar[int]
    NAMES_FIELD_NUMBER: _ClassVar[int]
    NOISE_FIELD_NUMBER: _ClassVar[int]
    OWNER_EVALUATES_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_EVERY_STEPS_FIELD_NUMBER: _ClassVar[int]
    PROGRESS_INTERVAL_SECONDS_FIELD_NUMBER: _ClassVar[int]
    SCHEDULE_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    SLICE_MAX_EXPANSIONS_FIELD_NUMBER: _ClassVar[int]
    SLICE_WIDTH_FIELD_NUMBER: _ClassVar[int]
    START_FIELD_NUMBER: _ClassVar[int]
    START_ROWS_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    WANTS_FIELD_NUMBER: _ClassVar[int]
    accepts_draw_references: bool
    anchor_every: int
    burn_in: int
    chain_groups: int
    chains: int
    checkpoint_every_steps: int
    curvature: Curvature
    curvature_probe_iterations: int
    dim: int
    draws_in_points: bool
    draws_per_chain: int
    envelope: Envelope
    fixed_point_iterations: int
    fixed_point_tolerance: float
    friction: float
    gradient_check_points: int
    inverse_mass: float
    keep_every: int
    kernel: str
    krylov_max_iterations: int
    krylov_tolerance: float
    max_evaluations: int
    max_message_bytes: int
    max_seconds: float
    metric: bytes
    metric_form: MetricForm
    names: _containers.RepeatedScalarFieldContainer[str]
    noise: GradientNoise
    owner_evaluates: bool
    progress_every_steps: int
    progress_interval_seconds: float
    schedule: StepSchedule
    seed: int
    slice_max_expansions: int
    slice_width: float
    start: bytes
    start_rows: int
    step: float
    wants: Wants
    def __init__(self, dim: _Optional[int] = ..., chains: _Optional[int] = ..., kernel: _Optional[str] = ..., start: _Optional[bytes] = ..., start_rows: _Optional[int] = ..., step: _Optional[float] = ..., burn_in: _Optional[int] = ..., keep_every: _Optional[int] = ..., draws_per_chain: _Optional[int] = ..., max_evaluations: _Optional[int] = ..., max_seconds: _Optional[float] = ..., progress_every_steps: _Optional[int] = ..., progress_interval_seconds: _Optional[float] = ..., seed: _Optional[int] = ..., names: _Optional[_Iterable[str]] = ..., max_message_bytes: _Optional[int] = ..., curvature: _Optional[_Union[Curvature, _Mapping]] = ..., wants: _Optional[_Union[Wants, _Mapping]] = ..., friction: _Optional[float] = ..., inverse_mass: _Optional[float] = ..., krylov_tolerance: _Optional[float] = ..., krylov_max_iterations: _Optional[int] = ..., schedule: _Optional[_Union[StepSchedule, _Mapping]] = ..., anchor_every: _Optional[int] = ..., fixed_point_tolerance: _Optional[float] = ..., fixed_point_iterations: _Optional[int] = ..., curvature_probe_iterations: _Optional[int] = ..., slice_width: _Optional[float] = ..., slice_max_expansions: _Optional[int] = ..., envelope: _Optional[_Union[Envelope, _Mapping]] = ..., owner_evaluates: bool = ..., noise: _Optional[_Union[GradientNoise, _Mapping]] = ..., checkpoint_every_steps: _Optional[int] = ..., accepts_draw_references: bool = ..., metric: _Optional[bytes] = ..., metric_form: _Optional[_Union[MetricForm, str]] = ..., gradient_check_points: _Optional[int] = ..., chain_groups: _Optional[int] = ..., draws_in_points: bool = ...) -> None: ...

class Registered(_message.Message):
    __slots__ = ["evaluations_per_step", "kernel", "max_message_bytes", "metric", "names", "planned_steps", "resume_token", "resumed", "seed", "session_id", "step", "tuning"]
    EVALUATIONS_PER_STEP_FIELD_NUMBER: _ClassVar[int]
    KERNEL_FIELD_NUMBER: _ClassVar[int]
    MAX_MESSAGE_BYTES_FIELD_NUMBER: _ClassVar[int]
    METRIC_FIELD_NUMBER: _ClassVar[int]
    NAMES_FIELD_NUMBER: _ClassVar[int]
    PLANNED_STEPS_FIELD_NUMBER: _ClassVar[int]
    RESUMED_FIELD_NUMBER: _ClassVar[int]
    RESUME_TOKEN_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    TUNING_FIELD_NUMBER: _ClassVar[int]
    evaluations_per_step: int
    kernel: str
    max_message_bytes: int
    metric: MetricReport
    names: _containers.RepeatedScalarFieldContainer[str]
    planned_steps: int
    resume_token: str
    resumed: bool
    seed: int
    session_id: str
    step: float
    tuning: _containers.RepeatedCompositeFieldContainer[TuningChoice]
    def __init__(self, session_id: _Optional[str] = ..., seed: _Optional[int] = ..., kernel: _Optional[str] = ..., step: _Optional[float] = ..., evaluations_per_step: _Optional[int] = ..., max_message_bytes: _Optional[int] = ..., names: _Optional[_Iterable[str]] = ..., planned_steps: _Optional[int] = ..., resume_token: _Optional[str] = ..., resumed: bool = ..., metric: _Optional[_Union[MetricReport, _Mapping]] = ..., tuning: _Optional[_Iterable[_Union[TuningChoice, _Mapping]]] = ...) -> None: ...

class Resume(_message.Message):
    __slots__ = ["next_seq", "session_id", "token"]
    NEXT_SEQ_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    TOKEN_FIELD_NUMBER: _ClassVar[int]
    next_seq: int
    session_id: str
    token: str
    def __init__(self, session_id: _Optional[str] = ..., token: _Optional[str] = ..., next_seq: _Optional[int] = ...) -> None: ...

class SessionRequest(_message.Message):
    __slots__ = ["evaluations", "register", "resume", "stop"]
    EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    REGISTER_FIELD_NUMBER: _ClassVar[int]
    RESUME_FIELD_NUMBER: _ClassVar[int]
    STOP_FIELD_NUMBER: _ClassVar[int]
    evaluations: Evaluations
    register: Register
    resume: Resume
    stop: Stop
    def __init__(self, register: _Optional[_Union[Register, _Mapping]] = ..., evaluations: _Optional[_Union[Evaluations, _Mapping]] = ..., stop: _Optional[_Union[Stop, _Mapping]] = ..., resume: _Optional[_Union[Resume, _Mapping]] = ...) -> None: ...

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

class SteinAssessment(_message.Message):
    __slots__ = ["draws", "ksd", "p_value", "se", "state", "state_text", "u_statistic", "upper95"]
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    KSD_FIELD_NUMBER: _ClassVar[int]
    P_VALUE_FIELD_NUMBER: _ClassVar[int]
    SE_FIELD_NUMBER: _ClassVar[int]
    STATE_FIELD_NUMBER: _ClassVar[int]
    STATE_TEXT_FIELD_NUMBER: _ClassVar[int]
    UPPER95_FIELD_NUMBER: _ClassVar[int]
    U_STATISTIC_FIELD_NUMBER: _ClassVar[int]
    draws: int
    ksd: float
    p_value: float
    se: float
    state: SteinState
    state_text: str
    u_statistic: float
    upper95: float
    def __init__(self, ksd: _Optional[float] = ..., u_statistic: _Optional[float] = ..., se: _Optional[float] = ..., upper95: _Optional[float] = ..., p_value: _Optional[float] = ..., draws: _Optional[int] = ..., state: _Optional[_Union[SteinState, str]] = ..., state_text: _Optional[str] = ...) -> None: ...

class StepSchedule(_message.Message):
    __slots__ = ["a", "b", "gamma"]
    A_FIELD_NUMBER: _ClassVar[int]
    B_FIELD_NUMBER: _ClassVar[int]
    GAMMA_FIELD_NUMBER: _ClassVar[int]
    a: float
    b: float
    gamma: float
    def __init__(self, a: _Optional[float] = ..., b: _Optional[float] = ..., gamma: _Optional[float] = ...) -> None: ...

class Stop(_message.Message):
    __slots__ = ["reason"]
    REASON_FIELD_NUMBER: _ClassVar[int]
    reason: str
    def __init__(self, reason: _Optional[str] = ...) -> None: ...

class TargetStatus(_message.Message):
    __slots__ = ["current", "met", "name", "projected_evaluations", "want"]
    CURRENT_FIELD_NUMBER: _ClassVar[int]
    MET_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    PROJECTED_EVALUATIONS_FIELD_NUMBER: _ClassVar[int]
    WANT_FIELD_NUMBER: _ClassVar[int]
    current: float
    met: bool
    name: str
    projected_evaluations: int
    want: float
    def __init__(self, name: _Optional[str] = ..., want: _Optional[float] = ..., current: _Optional[float] = ..., met: bool = ..., projected_evaluations: _Optional[int] = ...) -> None: ...

class TuningChoice(_message.Message):
    __slots__ = ["reason", "setting", "value"]
    REASON_FIELD_NUMBER: _ClassVar[int]
    SETTING_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    reason: str
    setting: str
    value: float
    def __init__(self, setting: _Optional[str] = ..., value: _Optional[float] = ..., reason: _Optional[str] = ...) -> None: ...

class Wants(_message.Message):
    __slots__ = ["eps", "max_ksd", "max_rhat", "metric", "min_bulk_ess", "min_tail_ess"]
    EPS_FIELD_NUMBER: _ClassVar[int]
    MAX_KSD_FIELD_NUMBER: _ClassVar[int]
    MAX_RHAT_FIELD_NUMBER: _ClassVar[int]
    METRIC_FIELD_NUMBER: _ClassVar[int]
    MIN_BULK_ESS_FIELD_NUMBER: _ClassVar[int]
    MIN_TAIL_ESS_FIELD_NUMBER: _ClassVar[int]
    eps: float
    max_ksd: float
    max_rhat: float
    metric: Metric
    min_bulk_ess: float
    min_tail_ess: float
    def __init__(self, min_bulk_ess: _Optional[float] = ..., min_tail_ess: _Optional[float] = ..., max_rhat: _Optional[float] = ..., max_ksd: _Optional[float] = ..., eps: _Optional[float] = ..., metric: _Optional[_Union[Metric, str]] = ...) -> None: ...

class WorkerReport(_message.Message):
    __slots__ = ["answers_late", "name", "owner", "rows", "rows_per_second", "rows_reissued"]
    ANSWERS_LATE_FIELD_NUMBER: _ClassVar[int]
    NAME_FIELD_NUMBER: _ClassVar[int]
    OWNER_FIELD_NUMBER: _ClassVar[int]
    ROWS_FIELD_NUMBER: _ClassVar[int]
    ROWS_PER_SECOND_FIELD_NUMBER: _ClassVar[int]
    ROWS_REISSUED_FIELD_NUMBER: _ClassVar[int]
    answers_late: int
    name: str
    owner: bool
    rows: int
    rows_per_second: float
    rows_reissued: int
    def __init__(self, name: _Optional[str] = ..., owner: bool = ..., rows_per_second: _Optional[float] = ..., rows: _Optional[int] = ..., rows_reissued: _Optional[int] = ..., answers_late: _Optional[int] = ...) -> None: ...

class MetricForm(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class GradientKind(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class Metric(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class Quantity(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class State(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class SteinState(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class CheckStatus(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class BoundSource(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []

class FinishReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = []
