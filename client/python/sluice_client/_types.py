"""Plain Python values of a sampling session: what the caller gives
(:class:`Spec`, with :class:`Curvature`, :class:`Wants`, :class:`Noise` and
:class:`Schedule`), what the server asks (:class:`Batch`) and how it is
answered (:class:`Answer`), and what the server reports
(:class:`Registered`, :class:`Draws`, :class:`Progress`, :class:`Summary`,
:class:`PlanResult`)."""

from __future__ import annotations

import enum
from dataclasses import dataclass, field
from typing import Dict, Optional, Sequence, Tuple

import numpy as np
import numpy.typing as npt

from ._proto.sluice.v1 import sluice_pb2 as pb

#: The message limit used when a Spec leaves max_message_bytes at 0 (the
#: wire API's default, and gRPC's).
DEFAULT_MAX_MESSAGE_BYTES = 4 << 20

#: numpy dtype of every array on the wire: little-endian IEEE-754 float64.
WIRE_DTYPE = np.dtype("<f8")


def to_wire(a: npt.ArrayLike) -> bytes:
    """Returns the wire bytes of an array: little-endian float64, row-major
    (one conversion and one copy, no per-element Python loop)."""
    return np.asarray(a).astype(WIRE_DTYPE, copy=False).tobytes(order="C")


def from_wire(b: bytes, rows: int, cols: int) -> np.ndarray:
    """Returns a read-only rows x cols float64 view of wire bytes."""
    return np.frombuffer(b, dtype=WIRE_DTYPE).reshape(rows, cols)


#: The distances a guaranteed bound is stated in: "tv" (total variation)
#: and "w2" (2-Wasserstein, in the units of theta).
METRICS = ("tv", "w2")

_METRIC_TO_WIRE: Dict[Optional[str], int] = {None: pb.METRIC_UNSPECIFIED, "tv": pb.METRIC_TV, "w2": pb.METRIC_W2}
_METRIC_FROM_WIRE: Dict[int, str] = {pb.METRIC_TV: "tv", pb.METRIC_W2: "w2"}


def metric_to_wire(metric: Optional[str]) -> int:
    """Returns the wire Metric of "tv", "w2" or None (unspecified), or raises
    ValueError."""
    try:
        return _METRIC_TO_WIRE[metric]
    except KeyError:
        raise ValueError(f"sluice_client: metric {metric!r}; want 'tv', 'w2' or None") from None


@dataclass(frozen=True, kw_only=True)
class Curvature:
    """What the client knows of the target's curvature: the potential
    f = -log pi is m-strongly convex and M-smooth, m I <= Hessian of f <= M I
    everywhere (units 1/theta^2). With it the server reports guaranteed
    bounds (sluice.proto, message Curvature)."""

    #: m >= 0; 0 means convex but not strongly convex (or unknown).
    strong_convexity: float
    #: M > 0, M >= m.
    smoothness: float
    #: Upper bound on W2(start, pi) in units of theta; 0 means sqrt(dim/m)
    #: (chains started at the mode).
    start_distance: float = 0.0
    #: For m = 0 with a TV target: mu_2 >= E_pi ||theta - centre||^2; the
    #: server then samples a penalised target (sluice.proto).
    second_moment: float = 0.0
    #: Centre of that penalty, dim values; None means the mean of the starts.
    penalty_centre: Optional[npt.ArrayLike] = None

    def to_wire(self) -> pb.Curvature:
        centre = b"" if self.penalty_centre is None else to_wire(np.ravel(self.penalty_centre))
        return pb.Curvature(
            strong_convexity=self.strong_convexity,
            smoothness=self.smoothness,
            start_distance=self.start_distance,
            second_moment=self.second_moment,
            penalty_centre=centre,
        )


@dataclass(frozen=True, kw_only=True)
class Wants:
    """Accuracy targets: the session finishes with reason TARGET_MET as soon
    as every target set here holds; a zero field is not a target
    (sluice.proto, message Wants)."""

    #: Smallest bulk-ESS over all coordinates (all chains together).
    min_bulk_ess: float = 0.0
    #: Smallest tail-ESS over all coordinates.
    min_tail_ess: float = 0.0
    #: Largest R-hat over all coordinates (e.g. 1.01).
    max_rhat: float = 0.0
    #: Largest kernel Stein discrepancy of the kept draws.
    max_ksd: float = 0.0
    #: Guaranteed error in ``metric``; needs Spec.curvature.
    eps: float = 0.0
    #: "tv" or "w2"; None leaves it to the server (W2).
    metric: Optional[str] = None

    def to_wire(self) -> pb.Wants:
        return pb.Wants(
            min_bulk_ess=self.min_bulk_ess,
            min_tail_ess=self.min_tail_ess,
            max_rhat=self.max_rhat,
            max_ksd=self.max_ksd,
            eps=self.eps,
            metric=metric_to_wire(self.metric),  # type: ignore[arg-type]
        )


@dataclass(frozen=True, kw_only=True)
class Noise:
    """Stochastic gradients (minibatches, Monte Carlo estimates, noisy
    simulators); a Spec without it declares exact gradients (sluice.proto,
    message GradientNoise, sent with kind STOCHASTIC)."""

    #: Declared variance s^2 of one replicate's error per coordinate; 0 means
    #: not declared.
    variance: float = 0.0
    #: Declared bias delta: ||E g_hat - grad log pi||^2 <= delta^2 dim.
    bias: float = 0.0
    #: Data set size N and minibatch size n, for epoch accounting (0: not
    #: given).
    data_size: int = 0
    minibatch_size: int = 0
    #: Independent gradient replicates returned per point; with 2 or more the
    #: server measures the noise from their spread. Each replicate counts as
    #: one evaluation. Needs the ``batch`` callback when above 1.
    replicates: int = 1

    def to_wire(self) -> pb.GradientNoise:
        return pb.GradientNoise(
            kind=pb.GRADIENT_KIND_STOCHASTIC,
            variance=self.variance,
            bias=self.bias,
            data_size=self.data_size,
            minibatch_size=self.minibatch_size,
            replicates=self.replicates,
        )


@dataclass(frozen=True)
class Schedule:
    """Decreasing step of the "sgld" kernel: epsilon_t = a (b + t)^(-gamma),
    step h_t = epsilon_t / 2, with a, b > 0 and gamma in (0.5, 1]
    (THEORY.md §7.1); Spec.step must then be 0."""

    a: float
    b: float
    gamma: float

    def to_wire(self) -> pb.StepSchedule:
        return pb.StepSchedule(a=self.a, b=self.b, gamma=self.gamma)


@dataclass(kw_only=True)
class Spec:
    """A sampling session as the client asks for it: the fields of the wire
    API's Register message (proto/sluice/v1/sluice.proto documents each one
    and its zero value). The server validates everything; the client only
    shapes ``start`` and checks ``wants.metric``.

    ``dim``, ``start`` and ``step`` have no default. ``start`` is an array of
    ``dim`` values (every chain starts there) or of ``chains x dim`` values
    (one row per chain). ``step`` is 0 with a ``schedule``, or to have the
    server plan it from ``wants.eps`` and ``curvature``.
    """

    dim: int
    chains: int = 1
    #: Sampling method: "lmc" (unadjusted Langevin), "kinetic", "midpoint",
    #: "midpoint-overdamped", "mala" (needs log densities), "ozaki" (needs
    #: Hessians), "ozaki-krylov" (needs Hessian-vector products), "sgld",
    #: "sgld-cv", "svrg" (sluice.proto, Register.kernel).
    kernel: str = "lmc"
    start: npt.ArrayLike
    #: Step size h > 0 (the Langevin time increment of one step).
    step: float
    burn_in: int = 0
    #: Keep every keep_every-th step after burn-in; 0 means 1.
    keep_every: int = 1
    #: Finish once every chain has this many kept draws; 0 means no limit.
    draws_per_chain: int = 0
    #: Budget of evaluated points; 0 means no limit.
    max_evaluations: int = 0
    #: Budget of wall time in seconds; 0 means no limit.
    max_seconds: float = 0.0
    #: Progress every this many steps; 0 means by time instead.
    progress_every_steps: int = 0
    #: Progress at most this often in seconds; 0 means the server's default.
    progress_interval_seconds: float = 0.0
    #: Seed of the server's random stream; 0 lets the server pick one.
    seed: int = 0
    #: Parameter names (dim entries); empty means theta[0], theta[1], ...
    names: Sequence[str] = ()
    #: Largest message in bytes this client sends or receives; 0 means
    #: 4 MiB. A channel that the client opens from a target is built with
    #: exactly this limit; a channel you pass in must allow at least it.
    max_message_bytes: int = DEFAULT_MAX_MESSAGE_BYTES
    #: The target's curvature, if known (guaranteed bounds, planned steps).
    curvature: Optional[Curvature] = None
    #: Accuracy targets (reason TARGET_MET once all hold).
    wants: Optional[Wants] = None
    #: Friction gamma of "kinetic" (0 means 2).
    friction: float = 0.0
    #: Inverse mass of "kinetic" and "midpoint" (0 means 1/M with curvature,
    #: else 1).
    inverse_mass: float = 0.0
    #: "ozaki-krylov": relative Lanczos tolerance (0 means 1e-8) and most
    #: iterations per vector (0 means min(dim, 64)).
    krylov_tolerance: float = 0.0
    krylov_max_iterations: int = 0
    #: Stochastic gradients; None means exact.
    noise: Optional[Noise] = None
    #: Decreasing step of "sgld"; None means a constant step.
    schedule: Optional[Schedule] = None
    #: "svrg": steps between full-data anchors (0 means 10).
    anchor_every: int = 0
    #: "sgld-cv": fixed-point search stops at this fraction of the start's
    #: full-data gradient norm (0 means 1e-6) or after this many iterations
    #: (0 means 100).
    fixed_point_tolerance: float = 0.0
    fixed_point_iterations: int = 0

    def message_limit(self) -> int:
        """The message limit in bytes this spec asks for (0 means 4 MiB)."""
        return self.max_message_bytes if self.max_message_bytes > 0 else DEFAULT_MAX_MESSAGE_BYTES

    def start_rows(self) -> Tuple[int, np.ndarray]:
        """Returns (start_rows, start as a start_rows x dim array), or raises
        ValueError when start has neither dim nor chains x dim values."""
        s = np.asarray(self.start, dtype=np.float64)
        if self.dim >= 1 and s.size == self.dim:
            return 1, s.reshape(1, self.dim)
        if self.dim >= 1 and self.chains >= 1 and s.size == self.chains * self.dim:
            return self.chains, s.reshape(self.chains, self.dim)
        raise ValueError(
            f"sluice_client: start has {s.size} values; want dim ({self.dim}) "
            f"or chains x dim ({self.chains} x {self.dim})"
        )

    def to_register(self) -> pb.Register:
        """Returns the Register message for this spec."""
        rows, start = self.start_rows()
        reg = pb.Register(
            dim=self.dim,
            chains=self.chains,
            kernel=self.kernel,
            start=to_wire(start),
            start_rows=rows,
            step=self.step,
            burn_in=self.burn_in,
            keep_every=self.keep_every,
            draws_per_chain=self.draws_per_chain,
            max_evaluations=self.max_evaluations,
            max_seconds=self.max_seconds,
            progress_every_steps=self.progress_every_steps,
            progress_interval_seconds=self.progress_interval_seconds,
            seed=self.seed,
            names=list(self.names),
            max_message_bytes=self.message_limit(),
            friction=self.friction,
            inverse_mass=self.inverse_mass,
            krylov_tolerance=self.krylov_tolerance,
            krylov_max_iterations=self.krylov_max_iterations,
            anchor_every=self.anchor_every,
            fixed_point_tolerance=self.fixed_point_tolerance,
            fixed_point_iterations=self.fixed_point_iterations,
        )
        if self.curvature is not None:
            reg.curvature.CopyFrom(self.curvature.to_wire())
        if self.wants is not None:
            reg.wants.CopyFrom(self.wants.to_wire())
        if self.noise is not None:
            reg.noise.CopyFrom(self.noise.to_wire())
        if self.schedule is not None:
            reg.schedule.CopyFrom(self.schedule.to_wire())
        return reg


@dataclass(frozen=True, eq=False)
class Batch:
    """One Points frame: what the server asks at which points. Arrays are
    read-only views of the frame; copy what must outlive the call.

    Rows with the same ``minibatch_groups`` value >= 0 must be evaluated on
    the same minibatch (common random numbers); -1 means no constraint.
    ``full_data`` asks for exact gradients over the whole data set, with one
    replicate. ``replicates`` is the number of independent gradient
    estimates wanted per row.
    """

    #: The points, rows x dim float64.
    points: np.ndarray
    #: Chain of each row (int32, rows entries).
    chains: np.ndarray
    want_gradient: bool
    want_log_density: bool
    want_hessian: bool
    want_hessian_vector: bool
    #: rows x dim vectors when want_hessian_vector: answer H(point) @ vector.
    vectors: Optional[np.ndarray]
    #: Minibatch group of each row (int32), or None when unconstrained.
    minibatch_groups: Optional[np.ndarray]
    full_data: bool
    replicates: int
    #: Request identifier and this frame's first row within the request
    #: (a request too large for one message comes in several frames).
    request_id: int = 0
    first_row: int = 0

    @property
    def rows(self) -> int:
        return self.points.shape[0]

    @property
    def dim(self) -> int:
        return self.points.shape[1]


@dataclass
class Answer:
    """What a ``batch`` callback returns for one :class:`Batch`: every
    quantity the batch asks for, of log pi (not of -log pi). Quantities not
    asked for are ignored (not sent).

    ``gradients`` is rows x dim, or rows x replicates x dim (required when
    ``replicates`` > 1; replicate j of row r is ``gradients[r, j]``);
    ``log_densities`` has rows values; ``hessians`` is rows x dim x dim
    (symmetric); ``hessian_vectors`` is rows x dim.
    """

    gradients: Optional[npt.ArrayLike] = None
    log_densities: Optional[npt.ArrayLike] = None
    hessians: Optional[npt.ArrayLike] = None
    hessian_vectors: Optional[npt.ArrayLike] = None


@dataclass(frozen=True)
class Registered:
    """The server's acknowledgement of a session."""

    session_id: str
    seed: int
    kernel: str
    step: float
    #: Points evaluated per completed step over all chains.
    evaluations_per_step: int
    #: The negotiated message limit in bytes.
    max_message_bytes: int
    names: Tuple[str, ...]
    #: Steps per chain of a step planned from wants.eps (0 otherwise).
    planned_steps: int = 0

    @classmethod
    def from_wire(cls, m: pb.Registered) -> "Registered":
        return cls(
            m.session_id,
            m.seed,
            m.kernel,
            m.step,
            m.evaluations_per_step,
            m.max_message_bytes,
            tuple(m.names),
            m.planned_steps,
        )


@dataclass(frozen=True)
class Draws:
    """A block of kept draws, numbered seq, seq+1, ..., seq+rows-1 across the
    session. ``values`` is a read-only rows x dim view of the frame: copy it
    to modify it."""

    seq: int
    values: np.ndarray
    #: Chain of each row (int32, rows entries).
    chains: np.ndarray
    #: Step count of each row's chain when the draw was taken (int64).
    iterations: np.ndarray

    @property
    def rows(self) -> int:
        return self.values.shape[0]

    @property
    def dim(self) -> int:
        return self.values.shape[1]


class State(enum.Enum):
    """Where a session is."""

    UNSPECIFIED = "unspecified"
    BURN_IN = "burn-in"
    SAMPLING = "sampling"
    FINISHED = "finished"


_STATE_FROM_WIRE = {
    pb.STATE_BURN_IN: State.BURN_IN,
    pb.STATE_SAMPLING: State.SAMPLING,
    pb.STATE_FINISHED: State.FINISHED,
}


@dataclass(frozen=True)
class ParameterDiagnostics:
    """Measured accuracy of one parameter from the kept draws: mean, sd,
    R-hat (max of rank-normalised bulk and folded split R-hat), bulk and tail
    ESS, and the Monte Carlo standard error of the mean."""

    name: str
    mean: float
    sd: float
    rhat: float
    bulk_ess: float
    tail_ess: float
    mcse_mean: float

    @classmethod
    def from_wire(cls, m: pb.ParameterDiagnostics) -> "ParameterDiagnostics":
        return cls(m.name, m.mean, m.sd, m.rhat, m.bulk_ess, m.tail_ess, m.mcse_mean)


@dataclass(frozen=True)
class Bound:
    """A theoretical bound on the distance, in ``metric`` ("tv" or "w2"),
    between a chain's law and pi: ``value`` is the sum of the four terms.
    ``source`` is "declared" (m and M were declared: the bound holds under
    that declaration) or "estimated" (not guaranteed); ``label`` says so in
    words."""

    metric: str
    value: float
    source: str
    label: str
    start_term: float
    discretisation_term: float
    noise_term: float
    bias_term: float

    @property
    def guaranteed(self) -> bool:
        """True when the bound rests on declared curvature."""
        return self.source == "declared"

    @classmethod
    def from_wire(cls, m: pb.Bound) -> "Bound":
        source = {pb.BOUND_SOURCE_DECLARED: "declared", pb.BOUND_SOURCE_ESTIMATED: "estimated"}.get(m.source, "")
        return cls(
            _METRIC_FROM_WIRE.get(m.metric, ""),
            m.value,
            source,
            m.label,
            m.start_term,
            m.discretisation_term,
            m.noise_term,
            m.bias_term,
        )


@dataclass(frozen=True)
class CurvatureEstimate:
    """One-sided certificates from the gradient pairs seen: M is at least
    ``smoothness_at_least``, m at most ``strong_convexity_at_most``;
    ``not_convex`` when a pair showed the potential is not convex."""

    pairs: int = 0
    smoothness_at_least: float = 0.0
    strong_convexity_at_most: float = 0.0
    not_convex: bool = False

    @classmethod
    def from_wire(cls, m: pb.CurvatureEstimate) -> "CurvatureEstimate":
        return cls(m.pairs, m.smoothness_at_least, m.strong_convexity_at_most, m.not_convex)


@dataclass(frozen=True)
class TargetStatus:
    """One accuracy target ("min_bulk_ess", "min_tail_ess", "max_rhat",
    "max_ksd" or "eps"): wanted and current values, whether it holds, and
    the evaluations still needed at the current rate (-1: cannot be
    projected)."""

    name: str
    want: float
    current: float
    met: bool
    projected_evaluations: int

    @classmethod
    def from_wire(cls, m: pb.TargetStatus) -> "TargetStatus":
        return cls(m.name, m.want, m.current, m.met, m.projected_evaluations)


@dataclass(frozen=True)
class NoiseEstimate:
    """Stochastic-gradient noise: the measured variance of one replicate's
    error per coordinate and its standard error (-1 without replicates), the
    requests it rests on, the declared variance (0: none), passes over the
    data set, and a warning when measurement and declaration disagree."""

    variance: float
    variance_se: float
    requests: int
    declared: float
    epochs: float
    warning: str

    @classmethod
    def from_wire(cls, m: pb.NoiseEstimate) -> "NoiseEstimate":
        return cls(m.variance, m.variance_se, m.requests, m.declared, m.epochs, m.warning)


@dataclass(frozen=True, eq=False)
class KernelReport:
    """What the kernel reports of itself: the step in use, whether it is
    still adapting (MALA in burn-in), per-chain acceptance rates in the
    current phase (float64 array; empty without a rejection step), and the
    last step's Lanczos figures (ozaki-krylov)."""

    step: float = 0.0
    adapting: bool = False
    acceptance_rates: np.ndarray = field(default_factory=lambda: np.zeros(0))
    krylov_iterations: int = 0
    krylov_error_estimate: float = 0.0
    krylov_unconverged: int = 0

    @classmethod
    def from_wire(cls, m: pb.KernelReport) -> "KernelReport":
        return cls(
            m.step,
            m.adapting,
            np.array(m.acceptance_rates, dtype=np.float64),
            m.krylov_iterations,
            m.krylov_error_estimate,
            m.krylov_unconverged,
        )


@dataclass(frozen=True)
class Progress:
    """Where the budget stands, and the accuracy so far.
    ``evaluations_left`` and ``seconds_left`` are -1 when unlimited; ``ksd``
    is -1 when not available; ``bound`` and ``noise`` are None when they do
    not apply; ``parameters`` is empty until there are enough draws."""

    state: State
    steps: int
    evaluations_used: int
    evaluations_left: int
    seconds_used: float
    seconds_left: float
    draws_sent: int
    evaluations_per_second: float
    #: Measured accuracy per parameter, in order.
    parameters: Tuple[ParameterDiagnostics, ...] = ()
    ksd: float = -1.0
    bound: Optional[Bound] = None
    curvature: CurvatureEstimate = CurvatureEstimate()
    #: Each requested target.
    targets: Tuple[TargetStatus, ...] = ()
    noise: Optional[NoiseEstimate] = None
    kernel: KernelReport = KernelReport()

    @classmethod
    def from_wire(cls, m: pb.Progress) -> "Progress":
        return cls(
            _STATE_FROM_WIRE.get(m.state, State.UNSPECIFIED),
            m.steps,
            m.evaluations_used,
            m.evaluations_left,
            m.seconds_used,
            m.seconds_left,
            m.draws_sent,
            m.evaluations_per_second,
            tuple(ParameterDiagnostics.from_wire(p) for p in m.parameters),
            m.ksd,
            Bound.from_wire(m.bound) if m.HasField("bound") else None,
            CurvatureEstimate.from_wire(m.curvature),
            tuple(TargetStatus.from_wire(t) for t in m.targets),
            NoiseEstimate.from_wire(m.noise) if m.HasField("noise") else None,
            KernelReport.from_wire(m.kernel),
        )


class FinishReason(enum.Enum):
    """Why a session ended."""

    UNSPECIFIED = "unspecified"
    BUDGET_SPENT = "budget spent"
    TIME_SPENT = "time spent"
    STOPPED = "stopped by client"
    DRAWS_COLLECTED = "draws collected"
    FAILED = "failed"
    SHUTDOWN = "server shutting down"
    TARGET_MET = "target met"


_REASON_FROM_WIRE = {
    pb.FINISH_REASON_BUDGET_SPENT: FinishReason.BUDGET_SPENT,
    pb.FINISH_REASON_TIME_SPENT: FinishReason.TIME_SPENT,
    pb.FINISH_REASON_STOPPED: FinishReason.STOPPED,
    pb.FINISH_REASON_DRAWS_COLLECTED: FinishReason.DRAWS_COLLECTED,
    pb.FINISH_REASON_FAILED: FinishReason.FAILED,
    pb.FINISH_REASON_SHUTDOWN: FinishReason.SHUTDOWN,
    pb.FINISH_REASON_TARGET_MET: FinishReason.TARGET_MET,
}


@dataclass(frozen=True)
class ParameterSummary:
    """One parameter's kept draws over all chains, computed by the server:
    sample mean, sample standard deviation (divisor n-1) and count."""

    name: str
    mean: float
    sd: float
    count: int


@dataclass(frozen=True)
class Summary:
    """What a finished session reports."""

    #: The acknowledgement (None for a follower, which never sees it).
    registered: Optional[Registered]
    reason: FinishReason
    #: Detail from the server (the error when reason is FAILED).
    message: str
    progress: Progress
    parameters: Tuple[ParameterSummary, ...]
    #: Draws the client received (rows of every Draws frame).
    draws_received: int = 0

    @property
    def names(self) -> Tuple[str, ...]:
        """Parameter names, in order."""
        return tuple(p.name for p in self.parameters)

    @property
    def mean(self) -> np.ndarray:
        """Per-parameter means, in order."""
        return np.array([p.mean for p in self.parameters], dtype=np.float64)

    @property
    def sd(self) -> np.ndarray:
        """Per-parameter standard deviations, in order."""
        return np.array([p.sd for p in self.parameters], dtype=np.float64)

    @classmethod
    def from_wire(cls, m: pb.Finished, registered: Optional[Registered], draws_received: int) -> "Summary":
        params = tuple(ParameterSummary(p.name, p.mean, p.sd, p.count) for p in m.parameters)
        return cls(
            registered,
            _REASON_FROM_WIRE.get(m.reason, FinishReason.UNSPECIFIED),
            m.message,
            Progress.from_wire(m.progress),
            params,
            draws_received,
        )


@dataclass(frozen=True)
class PlanResult:
    """What reaching a guaranteed accuracy costs with unadjusted Langevin
    (the Plan rpc): step size, Langevin horizon, iterations per chain,
    gradient evaluations per chain and over all chains, wall time in seconds
    at the given rate (-1 when no rate was given), the bound after
    ``iterations`` steps, the assumptions in words, whether the constants
    are recalled rather than verified, and the penalty weight lambda of the
    convex (m = 0) TV rule (0 otherwise)."""

    step: float
    horizon: float
    iterations: int
    evaluations_per_chain: int
    evaluations: int
    seconds: float
    bound: Bound
    assumptions: Tuple[str, ...]
    constants_recalled: bool
    penalty: float

    @classmethod
    def from_wire(cls, m: pb.PlanResponse) -> "PlanResult":
        return cls(
            m.step,
            m.horizon,
            m.iterations,
            m.evaluations_per_chain,
            m.evaluations,
            m.seconds,
            Bound.from_wire(m.bound),
            tuple(m.assumptions),
            m.constants_recalled,
            m.penalty,
        )
