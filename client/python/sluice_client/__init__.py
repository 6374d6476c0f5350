"""Python client of sluice: samples a target whose gradient lives in your
numpy code.

The sluice server runs Langevin chains and asks this process for the
gradient of log pi at one batch of points per step (all chains at once);
this package answers those requests with your function, and hands you the
draws, progress reports and a final summary. The wire API is
proto/sluice/v1/sluice.proto; arrays cross it as little-endian float64
bytes, decoded with ``np.frombuffer`` and encoded with ``tobytes``.

::

    import numpy as np
    import sluice_client as sc

    Q = np.array([[2.0, 0.5], [0.5, 1.0]])           # precision of N(0, Q^-1)
    spec = sc.Spec(dim=2, chains=8, start=np.zeros(2), step=0.1,
                   burn_in=200, draws_per_chain=1000, seed=7)
    draws = []
    summary = sc.run("127.0.0.1:7070", spec, lambda x: -x @ Q,
                     on_draws=lambda d: draws.append(d.values.copy()))
    print(summary)                 # a table: mean ± error, sd, interval, R-hat, ESS
    summary.save("draws.csv")      # or .npy (chains x draws x dim), .npz

``Session`` is the iterator form of the same loop. Kernels that need more
than gradients and log densities (Hessians for "ozaki", Hessian-vector
products for "ozaki-krylov", several gradient replicates per point with
``Noise(replicates=2)``) are answered with ``batch=``, a function of a
:class:`Batch` returning an :class:`Answer`. ``executor=`` (any
``concurrent.futures.Executor``: a process pool, a Dask client's executor,
an MPI pool) spreads the rows of every batch over its workers. :func:`plan` asks what a
guaranteed accuracy costs before sampling; :func:`follow` streams another
session's header, draws and progress; :class:`HistoryWriter` writes the
progress history that ``sluice report`` reads beside the draws
``Summary.save`` writes; :func:`work` serves a running session as one of
several evaluators (``Spec(owner_evaluates=False)`` lets the owner only
consume). Server errors raise :class:`SessionError` (gRPC status
code, message, and the offending field from the status's bad-request
detail).
"""

from ._errors import DrawsLostError, ProtocolError, SessionError, SluiceError
from ._follow import FOLLOW_MAX_MESSAGE_BYTES, FOLLOW_METHOD, FollowEvent, Follower, FollowHeader, follow
from ._history import KIND_FINISH, KIND_PROGRESS, HistoryWriter, history_record
from ._resume import ResumePolicy
from ._plan import PLAN_METHOD, plan
from ._session import SESSION_METHOD, BatchFn, Event, GradFn, LogDensityFn, Session, connect, run
from ._summary import DEFAULT_INTERVAL_LEVEL, ParameterStats
from ._work import ATTACH_METHOD, work, work_from_env
from ._types import (
    DEFAULT_MAX_MESSAGE_BYTES,
    METRICS,
    Answer,
    Batch,
    Bound,
    Curvature,
    CurvatureEstimate,
    Draws,
    Envelope,
    FinishReason,
    KernelReport,
    MetricReport,
    Noise,
    NoiseEstimate,
    ParameterDiagnostics,
    ParameterSummary,
    PlanResult,
    Progress,
    Registered,
    Schedule,
    Spec,
    State,
    Summary,
    TargetStatus,
    TuningChoice,
    Check,
    CheckStatus,
    SteinAssessment,
    Wants,
    WorkerReport,
    from_wire,
    to_wire,
)

__all__ = [
    "ATTACH_METHOD",
    "DEFAULT_INTERVAL_LEVEL",
    "DEFAULT_MAX_MESSAGE_BYTES",
    "FOLLOW_MAX_MESSAGE_BYTES",
    "FOLLOW_METHOD",
    "KIND_FINISH",
    "KIND_PROGRESS",
    "METRICS",
    "PLAN_METHOD",
    "SESSION_METHOD",
    "Answer",
    "Batch",
    "BatchFn",
    "Bound",
    "Curvature",
    "CurvatureEstimate",
    "Draws",
    "DrawsLostError",
    "Envelope",
    "Event",
    "FinishReason",
    "FollowEvent",
    "FollowHeader",
    "HistoryWriter",
    "Follower",
    "ResumePolicy",
    "GradFn",
    "KernelReport",
    "MetricReport",
    "LogDensityFn",
    "Noise",
    "NoiseEstimate",
    "ParameterDiagnostics",
    "ParameterStats",
    "ParameterSummary",
    "PlanResult",
    "Progress",
    "ProtocolError",
    "Registered",
    "Schedule",
    "Session",
    "SessionError",
    "SluiceError",
    "Spec",
    "State",
    "Summary",
    "TargetStatus",
    "TuningChoice",
    "Check",
    "CheckStatus",
    "SteinAssessment",
    "Wants",
    "WorkerReport",
    "connect",
    "follow",
    "from_wire",
    "history_record",
    "plan",
    "run",
    "to_wire",
    "work",
    "work_from_env",
]
