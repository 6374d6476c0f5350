"""Plain Python values of a sampling session: what the caller gives
(:class:`Spec`, with :class:`Curvature`, :class:`Wants`, :class:`Noise` and
:class:`Schedule`), what the server asks (:class:`Batch`) and how it is
answered (:class:`Answer`), and what the server reports
(:class:`Registered`, :class:`Draws`, :class:`Progress`, :class:`Summary`,
:class:`PlanResult`)."""

from __future__ import annotations

import enum
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np
import numpy.typing as npt

from ._proto.sluice.v1 import sluice_pb2 as pb

if TYPE_CHECKING:  # pragma: no cover
    from ._summary import ParameterStats

#: The message limit used when a Spec leaves max_message_bytes at 0 (the
#: wire API's default, and gRPC's).
DEFAULT_MAX_MESSAGE_BYTES = 4 << 20

#: numpy dtype of every array on the wire: little-endian IEEE-754 float64.
WIRE_DTYPE = np.dtype("<f8")


def to_wire(a: npt.ArrayLike) -> bytes:
    """Returns the wire bytes of an array: little-endian float64, row-major
    (one conversion and one copy, no per-element Python loop)."""
    return np.asarray(a).astype(WIRE_DTYPE, copy=False).tobytes(order="C")


def from_wire(b: Union[bytes, memoryview], rows: int, cols: int) -> np.ndarray:
    """Returns a read-only rows x cols float64 view of wire bytes, or an
    aligned read-only copy when they do not start at a multiple of 8 bytes
    (a field read in place from a received message: numpy and the
    libraries it calls are slower on unaligned arrays, some refuse them)."""
    a = np.frombuffer(b, dtype=WIRE_DTYPE).reshape(rows, cols)
    if not a.flags.aligned:
        a = a.copy()
        a.flags.writeable = False
    return a


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
    step h_t = epsilon_t / 2, with a, b > 0 and gamma in (0.5, 1] (the
    schedule of Welling and Teh (2011), with the step-size conditions they
    take from Robbins and Monro); Spec.step must then be 0."""

    a: float
    b: float
    gamma: float

    def to_wire(self) -> pb.StepSchedule:
        return pb.StepSchedule(a=self.a, b=self.b, gamma=self.gamma)


@dataclass(frozen=True, kw_only=True)
class Envelope:
    """The Gaussian envelope q = N(mean, scale^2 I) of the "rejection"
    kernel, with the declared bound pi_tilde(x) <= exp(log_bound) q(x) for
    the unnormalised density exp(log density returned). A proposal y is
    accepted with probability pi_tilde(y) / (exp(log_bound) q(y)); an
    observed ratio above 1 fails the session naming envelope.log_bound
    (sluice.proto, message Envelope)."""

    #: Centre of the envelope, dim values.
    mean: npt.ArrayLike
    #: scale > 0, units of theta.
    scale: float
    log_bound: float

    def to_wire(self) -> pb.Envelope:
        return pb.Envelope(mean=to_wire(np.ravel(self.mean)), scale=self.scale, log_bound=self.log_bound)


@dataclass(kw_only=True)
class Spec:
    """A sampling session as the client asks for it: the fields of the wire
    API's Register message (proto/sluice/v1/sluice.proto documents each one
    and its zero value). The server validates everything; the client only
    shapes ``start`` and checks ``wants.metric``.

    ``dim`` and ``start`` have no default. ``start`` is an array of ``dim``
    values (every chain starts there) or of ``chains x dim`` values (one row
    per chain). ``step`` 0 (the default) is automatic for the Langevin
    kernels: the server chooses it (and ``friction``, ``inverse_mass`` left
    at 0) from a curvature probe and adapts a metric during burn-in,
    reporting its choices in ``Progress.tuning``; it is also 0 with a
    ``schedule``, or to have the server plan it from ``wants.eps`` and
    ``curvature``.
    """

    dim: int
    chains: int = 1
    #: Sampling method: "lmc" (unadjusted Langevin), "kinetic", "baoab", "midpoint",
    #: "midpoint-overdamped", "mala" (needs log densities), "ozaki" (needs
    #: Hessians), "ozaki-krylov" (needs Hessian-vector products), "sgld",
    #: "sgld-cv", "svrg", "hit-and-run" (needs log densities only),
    #: "rejection" (needs log densities and an envelope; dim <= 4)
    #: (sluice.proto, Register.kernel).
    kernel: str = "lmc"
    start: npt.ArrayLike
    #: Step size h > 0 (the Langevin time increment of one step, in the
    #: metric's units with a metric); 0 means automatic.
    step: float = 0.0
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
    #: Friction gamma of "kinetic" and "baoab" (0 means 2).
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
    #: Opt-in curvature probe: this many power iterations with
    #: finite-difference Hessian-vector products at chain 0's start estimate
    #: M, and as many again m, before sampling (one gradient each, counted in
    #: the budget; reported in Progress.curvature). 0: no probe. Exact
    #: gradients only.
    curvature_probe_iterations: int = 0
    #: Start points at which the server compares the gradient with finite
    #: differences of the log density before sampling (log densities are
    #: asked for then, counted in the budget): 0 means 3 for kernels that
    #: ask for log densities anyway and none for the others; -1 means none.
    gradient_check_points: int = 0
    #: Groups of consecutive chains that step independently once burn-in is
    #: over, so that the server sends one group's next points while this
    #: client evaluates another's (several requests outstanding, answered
    #: in the order they come): 0 lets the server choose, 1 asks for one
    #: request at a time; at most chains. The draws do not depend on it.
    chain_groups: int = 0
    #: "hit-and-run": initial slice width on each line in units of theta (0
    #: means 1) and the most stepping-out expansions per step (0 means 64).
    slice_width: float = 0.0
    slice_max_expansions: int = 0
    #: "rejection": the Gaussian envelope and its declared bound (required
    #: for that kernel).
    envelope: Optional[Envelope] = None
    #: Checkpoint every this many steps when the server keeps state (0: only
    #: at the server's wall-time cadence and at shutdown).
    checkpoint_every_steps: int = 0
    #: False: this client only consumes draws and progress, and workers
    #: attached with :func:`work` evaluate every row.
    owner_evaluates: bool = True
    #: A declared metric C (Register.metric): dim values (a diagonal) or
    #: dim x dim (dense), e.g. an inverse Hessian at a known mode; None: none.
    preconditioner: Optional[npt.ArrayLike] = None
    #: What the server does about the metric: "" (the declared one, else
    #: adapted during burn-in when step is 0), "identity", "diagonal" or
    #: "dense" (Register.metric_form).
    metric_form: str = ""

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
            curvature_probe_iterations=self.curvature_probe_iterations,
            gradient_check_points=self.gradient_check_points,
            chain_groups=self.chain_groups,
            slice_width=self.slice_width,
            slice_max_expansions=self.slice_max_expansions,
        )
        if self.curvature is not None:
            reg.curvature.CopyFrom(self.curvature.to_wire())
        if self.wants is not None:
            reg.wants.CopyFrom(self.wants.to_wire())
        if self.noise is not None:
            reg.noise.CopyFrom(self.noise.to_wire())
        if self.schedule is not None:
            reg.schedule.CopyFrom(self.schedule.to_wire())
        if self.envelope is not None:
            reg.envelope.CopyFrom(self.envelope.to_wire())
        reg.checkpoint_every_steps = self.checkpoint_every_steps
        if not self.owner_evaluates:
            reg.owner_evaluates = False
        if self.preconditioner is not None:
            reg.metric = to_wire(np.ravel(np.asarray(self.preconditioner, dtype=np.float64)))
        if self.metric_form not in _METRIC_FORM_TO_WIRE:
            raise ValueError(f"sluice_client: metric_form {self.metric_form!r}; want one of {sorted(_METRIC_FORM_TO_WIRE)}")
        reg.metric_form = _METRIC_FORM_TO_WIRE[self.metric_form]
        return reg


_METRIC_FORM_TO_WIRE = {
    "": pb.METRIC_FORM_UNSPECIFIED,
    "identity": pb.METRIC_FORM_IDENTITY,
    "diagonal": pb.METRIC_FORM_DIAGONAL,
    "dense": pb.METRIC_FORM_DENSE,
}


@dataclass(frozen=True)
class MetricReport:
    """Which metric the kernel uses: ``kind`` ("identity", "diagonal",
    "dense"), ``source`` ("none", "declared", "adapted"), whether adaptation
    windows remain, the condition number of C, the step of the last update
    (-1: never), the updates so far, the last Ledoit-Wolf shrinkage and the
    steps at which the adaptation windows end."""

    kind: str = ""
    source: str = ""
    adapting: bool = False
    condition: float = 0.0
    updated_at_step: int = -1
    updates: int = 0
    shrinkage: float = 0.0
    window_ends: Tuple[int, ...] = ()

    @classmethod
    def from_wire(cls, m: pb.MetricReport) -> "MetricReport":
        return cls(m.kind, m.source, m.adapting, m.condition, m.updated_at_step, m.updates, m.shrinkage,
                   tuple(m.window_ends))


@dataclass(frozen=True)
class TuningChoice:
    """One setting the server chose (or kept), with its reason."""

    setting: str
    value: float
    reason: str

    @classmethod
    def from_wire(cls, m: pb.TuningChoice) -> "TuningChoice":
        return cls(m.setting, m.value, m.reason)


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
    #: The session's secret: follow(), resuming and work() need it with session_id.
    resume_token: str = ""
    #: True when the latest stream continued the session from a checkpoint.
    resumed: bool = False
    #: The metric at registration and the adaptation schedule.
    metric: MetricReport = MetricReport()
    #: With step 0: the settings the server will choose, and what chooses them.
    tuning: Tuple[TuningChoice, ...] = ()

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
            m.resume_token,
            m.resumed,
            MetricReport.from_wire(m.metric),
            tuple(TuningChoice.from_wire(c) for c in m.tuning),
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
    ``not_convex`` when a pair showed the potential is not convex. With
    ``Spec.curvature_probe_iterations``, ``probed_smoothness`` and
    ``probed_strong_convexity`` are the probe's power-iteration estimates of
    M and m at chain 0's start (0 when no probe ran) and
    ``probe_evaluations`` what the probe cost."""

    pairs: int = 0
    smoothness_at_least: float = 0.0
    strong_convexity_at_most: float = 0.0
    not_convex: bool = False
    probed_smoothness: float = 0.0
    probed_strong_convexity: float = 0.0
    probe_evaluations: int = 0

    @classmethod
    def from_wire(cls, m: pb.CurvatureEstimate) -> "CurvatureEstimate":
        return cls(
            m.pairs,
            m.smoothness_at_least,
            m.strong_convexity_at_most,
            m.not_convex,
            m.probed_smoothness,
            m.probed_strong_convexity,
            m.probe_evaluations,
        )


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
    current phase (float64 array; empty without a rejection step), the
    last step's Lanczos figures (ozaki-krylov), the mean number of points
    evaluated per completed step (kernels whose cost per step is random:
    hit-and-run, rejection) and the accepted fraction of all proposals
    (rejection)."""

    step: float = 0.0
    adapting: bool = False
    acceptance_rates: np.ndarray = field(default_factory=lambda: np.zeros(0))
    krylov_iterations: int = 0
    krylov_error_estimate: float = 0.0
    krylov_unconverged: int = 0
    evaluations_per_step_mean: float = 0.0
    acceptance_rate: float = 0.0

    @classmethod
    def from_wire(cls, m: pb.KernelReport) -> "KernelReport":
        return cls(
            m.step,
            m.adapting,
            np.array(m.acceptance_rates, dtype=np.float64),
            m.krylov_iterations,
            m.krylov_error_estimate,
            m.krylov_unconverged,
            m.evaluations_per_step_mean,
            m.acceptance_rate,
        )


@dataclass(frozen=True)
class WorkerReport:
    """One evaluator of a session: the name it attached with ("owner" for
    the owner's stream), whether it is the owner, its measured speed (rows
    per second, 0 until measured), the rows it answered first, its rows
    given to other evaluators, and its answers dropped as late."""

    name: str
    owner: bool
    rows_per_second: float
    rows: int
    rows_reissued: int
    answers_late: int

    @classmethod
    def from_wire(cls, m: pb.WorkerReport) -> "WorkerReport":
        return cls(m.name, m.owner, m.rows_per_second, m.rows, m.rows_reissued, m.answers_late)


@dataclass(frozen=True)
class SteinAssessment:
    """The kernel Stein discrepancy of the kept draws in standardised
    coordinates: the point estimate sqrt(max(U, 0)), the U-statistic of
    KSD^2 and its standard error, an upper 95 % bound (a max_ksd target is
    met only below it), the bootstrap p-value of KSD = 0, the draws it
    rests on, the state's wire name and the state in plain words."""

    ksd: float
    u_statistic: float
    se: float
    upper95: float
    p_value: float
    draws: int
    state: str
    state_text: str

    @classmethod
    def from_wire(cls, m: pb.SteinAssessment) -> "SteinAssessment":
        return cls(m.ksd, m.u_statistic, m.se, m.upper95, m.p_value, m.draws, pb.SteinState.Name(m.state), m.state_text)


class CheckStatus(enum.Enum):
    """How a check of the verdict came out."""

    UNSPECIFIED = "unspecified"
    PASS = "pass"
    WARN = "warn"
    FAIL = "fail"


_CHECK_STATUS_FROM_WIRE = {
    pb.CHECK_STATUS_PASS: CheckStatus.PASS,
    pb.CHECK_STATUS_WARN: CheckStatus.WARN,
    pb.CHECK_STATUS_FAIL: CheckStatus.FAIL,
}


@dataclass(frozen=True)
class Check:
    """One named check of the session's verdict (divergence, stability,
    mixing, bias, gradient, guarantee): its status, the figure it rests on
    and one sentence for a person."""

    name: str
    status: CheckStatus
    figure: float
    message: str

    @classmethod
    def from_wire(cls, m: pb.Check) -> "Check":
        return cls(m.name, _CHECK_STATUS_FROM_WIRE.get(m.status, CheckStatus.UNSPECIFIED), m.figure, m.message)


@dataclass(frozen=True)
class Progress:
    """Where the budget stands, and the accuracy so far.
    ``evaluations_left`` and ``seconds_left`` are -1 when unlimited; ``ksd``
    is -1 when not available; ``bound`` and ``noise`` are None when they do
    not apply; ``parameters`` is empty until there are enough draws, and
    ``parameters_omitted`` counts the parameters left out of it so that the
    frame fits the message limit (the first ones are sent)."""

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
    parameters_omitted: int = 0
    #: The evaluators sharing the rows (the owner first when it evaluates);
    #: empty when no worker ever attached (see :func:`work`).
    workers: Tuple[WorkerReport, ...] = ()
    #: Rows issued again because their evaluator left or fell behind.
    rows_reissued: int = 0
    #: Answers dropped because another evaluator answered first.
    answers_late: int = 0
    #: The metric in use.
    metric: MetricReport = MetricReport()
    #: With step 0: the settings the server chose, with their reasons.
    tuning: Tuple[TuningChoice, ...] = ()
    #: Evaluations the automatic tuning's curvature probes cost.
    tuning_evaluations: int = 0
    #: The Stein discrepancy with its uncertainty; None when not measured.
    stein: Optional[SteinAssessment] = None
    #: The verdict so far.
    checks: Tuple[Check, ...] = ()

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
            m.parameters_omitted,
            tuple(WorkerReport.from_wire(w) for w in m.workers),
            m.rows_reissued,
            m.answers_late,
            MetricReport.from_wire(m.metric),
            tuple(TuningChoice.from_wire(c) for c in m.tuning),
            m.tuning_evaluations,
            SteinAssessment.from_wire(m.stein) if m.HasField("stein") else None,
            tuple(Check.from_wire(c) for c in m.checks),
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
    CHECK_FAILED = "check failed"


_REASON_FROM_WIRE = {
    pb.FINISH_REASON_BUDGET_SPENT: FinishReason.BUDGET_SPENT,
    pb.FINISH_REASON_TIME_SPENT: FinishReason.TIME_SPENT,
    pb.FINISH_REASON_STOPPED: FinishReason.STOPPED,
    pb.FINISH_REASON_DRAWS_COLLECTED: FinishReason.DRAWS_COLLECTED,
    pb.FINISH_REASON_FAILED: FinishReason.FAILED,
    pb.FINISH_REASON_SHUTDOWN: FinishReason.SHUTDOWN,
    pb.FINISH_REASON_TARGET_MET: FinishReason.TARGET_MET,
    pb.FINISH_REASON_CHECK_FAILED: FinishReason.CHECK_FAILED,
}


@dataclass(frozen=True)
class ParameterSummary:
    """One parameter's kept draws over all chains, computed by the server:
    sample mean, sample standard deviation (divisor n-1) and count."""

    name: str
    mean: float
    sd: float
    count: int


@dataclass(frozen=True, eq=False)
class Summary:
    """What a finished session reports, and the draws this client received.

    ``str(summary)`` is a table, one row per parameter (see :meth:`table`);
    :meth:`stats` gives the same figures as values; :meth:`save` writes the
    draws to a .csv, .npy or .npz file."""

    #: The acknowledgement (None for a follower, which never sees it).
    registered: Optional[Registered]
    reason: FinishReason
    #: Detail from the server (the error when reason is FAILED).
    message: str
    progress: Progress
    parameters: Tuple[ParameterSummary, ...]
    #: Draws the client received (rows of every Draws frame).
    draws_received: int = 0
    #: Parameters left out of ``parameters`` so that the final frame fits
    #: the message limit (the first ones are sent).
    parameters_omitted: int = 0
    #: The draws received, rows x dim float64 in sequence order, with the
    #: chain and step count of each row; None when the session or follower
    #: ran with keep_draws=False.
    draws: Optional[np.ndarray] = None
    draw_chains: Optional[np.ndarray] = None
    draw_iterations: Optional[np.ndarray] = None
    #: The session's verdict from the final frame.
    checks: Tuple[Check, ...] = ()

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

    def draw_names(self) -> Tuple[str, ...]:
        """Names of the draws' columns: the registered names, else the
        summary's, else theta[0], theta[1], ..."""
        dim = self.draws.shape[1] if self.draws is not None else len(self.parameters)
        if self.registered is not None and len(self.registered.names) == dim:
            return self.registered.names
        if len(self.parameters) == dim:
            return self.names
        return tuple(f"theta[{i}]" for i in range(dim))

    def draws_by_chain(self) -> np.ndarray:
        """The draws as one chains x draws x dim array (chains in increasing
        order, each chain's draws in step order). Raises ValueError when no
        draws were kept or the chains hold different numbers of draws."""
        if self.draws is None or self.draw_chains is None:
            raise ValueError("sluice_client: no draws kept (the session ran with keep_draws=False)")
        ids, counts = np.unique(self.draw_chains, return_counts=True)
        if ids.size == 0:
            return np.zeros((0, 0, self.draws.shape[1]))
        if np.any(counts != counts[0]):
            raise ValueError(
                f"sluice_client: chains hold different numbers of draws ({counts.min()} to {counts.max()}); "
                "use the flat draws (or a .csv or .npz file)"
            )
        order = np.argsort(self.draw_chains, kind="stable")
        return self.draws[order].reshape(ids.size, int(counts[0]), self.draws.shape[1])

    def stats(self, level: float = 0.90) -> "Tuple[ParameterStats, ...]":
        """Per-parameter statistics: mean and sd (the server's, over all
        kept draws), mean_error (Monte Carlo standard error of the mean),
        R-hat, bulk and tail ESS (the server's last diagnostics), and the
        median and an equal-tailed interval of probability ``level`` from
        the draws received (NaN when none were kept)."""
        from ._summary import parameter_stats

        return parameter_stats(self, level)

    def table(self, level: float = 0.90) -> str:
        """The summary as text: a heading, then per parameter the columns
        parameter, mean ± error, sd, interval (level), R-hat and ESS
        bulk/tail."""
        from ._summary import render_table

        return render_table(self, level)

    def __str__(self) -> str:
        return self.table()

    def save(self, path: "Union[str, os.PathLike[str]]") -> "Path":
        """Writes the draws received to ``path``: .csv (header
        ``chain,iteration,<names>``), .npy (chains x draws x dim) or .npz
        (``values``, ``chain``, ``iteration``, ``names``). Returns the
        path."""
        from ._summary import save_draws

        return save_draws(self, path)

    @classmethod
    def from_wire(
        cls,
        m: pb.Finished,
        registered: Optional[Registered],
        draws_received: int,
        draws: "Optional[Tuple[np.ndarray, np.ndarray, np.ndarray]]" = None,
    ) -> "Summary":
        """Builds the summary of a Finished frame; ``draws`` is (values,
        chains, iterations) of the draws received, or None."""
        params = tuple(ParameterSummary(p.name, p.mean, p.sd, p.count) for p in m.parameters)
        values, chains, iterations = draws if draws is not None else (None, None, None)
        return cls(
            registered,
            _REASON_FROM_WIRE.get(m.reason, FinishReason.UNSPECIFIED),
            m.message,
            Progress.from_wire(m.progress),
            params,
            draws_received,
            m.parameters_omitted,
            values,
            chains,
            iterations,
            tuple(Check.from_wire(c) for c in m.checks),
        )


class DrawStore:
    """Collects the blocks of draws a session or follower receives."""

    def __init__(self, dim: int = 0) -> None:
        self._values: List[np.ndarray] = []
        self._chains: List[np.ndarray] = []
        self._iterations: List[np.ndarray] = []
        self._dim = dim

    def add(self, d: Draws) -> None:
        self._dim = d.dim
        self._values.append(d.values)
        self._chains.append(d.chains)
        self._iterations.append(d.iterations)

    def arrays(self) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(values rows x dim, chains, iterations), copied into new arrays."""
        if not self._values:
            return np.zeros((0, self._dim)), np.zeros(0, dtype=np.int32), np.zeros(0, dtype=np.int64)
        return np.concatenate(self._values), np.concatenate(self._chains), np.concatenate(self._iterations)


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
