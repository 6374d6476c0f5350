"""Plain Python values of a sampling session: what the caller gives
(:class:`Spec`) and what the server reports (:class:`Registered`,
:class:`Draws`, :class:`Progress`, :class:`Summary`)."""

from __future__ import annotations

import enum
from dataclasses import dataclass
from typing import Optional, Sequence, Tuple

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


@dataclass(kw_only=True)
class Spec:
    """A sampling session as the client asks for it: the fields of the wire
    API's Register message (proto/sluice/v1/sluice.proto documents each one
    and its zero value). The server validates everything; the client only
    shapes ``start``.

    ``dim``, ``start`` and ``step`` have no default. ``start`` is an array of
    ``dim`` values (every chain starts there) or of ``chains x dim`` values
    (one row per chain).
    """

    dim: int
    chains: int = 1
    #: Sampling method; "lmc" is unadjusted Langevin with a constant step.
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
        return pb.Register(
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
        )


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

    @classmethod
    def from_wire(cls, m: pb.Registered) -> "Registered":
        return cls(m.session_id, m.seed, m.kernel, m.step, m.evaluations_per_step, m.max_message_bytes, tuple(m.names))


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
class Progress:
    """Where the budget stands. ``evaluations_left`` and ``seconds_left`` are
    -1 when unlimited."""

    state: State
    steps: int
    evaluations_used: int
    evaluations_left: int
    seconds_used: float
    seconds_left: float
    draws_sent: int
    evaluations_per_second: float

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


_REASON_FROM_WIRE = {
    pb.FINISH_REASON_BUDGET_SPENT: FinishReason.BUDGET_SPENT,
    pb.FINISH_REASON_TIME_SPENT: FinishReason.TIME_SPENT,
    pb.FINISH_REASON_STOPPED: FinishReason.STOPPED,
    pb.FINISH_REASON_DRAWS_COLLECTED: FinishReason.DRAWS_COLLECTED,
    pb.FINISH_REASON_FAILED: FinishReason.FAILED,
    pb.FINISH_REASON_SHUTDOWN: FinishReason.SHUTDOWN,
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
