"""The session loop: opens the Session stream, answers every Points frame
with the caller's functions in lock step, checks the draws' sequence
numbers, and ends with the Finished frame's summary."""

from __future__ import annotations

import concurrent.futures as cf
import queue
import sys
import threading
from dataclasses import dataclass
from typing import Callable, Dict, Iterator, List, Optional, Sequence, Tuple, Union

import grpc
import numpy as np
import numpy.typing as npt

from . import _alloc, _frames, _parallel, _wire
from ._errors import DrawsLostError, ProtocolError, SessionError
from ._proto.sluice.v1 import sluice_pb2 as pb
from ._resume import ResumePolicy, resumable
from ._types import (
    DEFAULT_MAX_MESSAGE_BYTES,
    WIRE_DTYPE,
    Answer,
    Batch,
    Draws,
    DrawStore,
    FinishReason,
    Progress,
    Registered,
    Spec,
    Summary,
    from_wire,
)

#: Full method name of the Session rpc.
SESSION_METHOD = "/sluice.v1.SluiceService/Session"

#: ``grad(points) -> gradients``: points is a read-only rows x dim float64
#: array, the result must have shape (rows, dim): the gradient of log pi
#: (not of -log pi) at each row.
GradFn = Callable[[np.ndarray], npt.ArrayLike]

#: ``log_density(points) -> values``: shape (rows,), log pi up to a constant.
LogDensityFn = Callable[[np.ndarray], npt.ArrayLike]

#: ``batch(b) -> Answer``: answers one :class:`Batch` (one Points frame)
#: with every quantity it asks for; the richer alternative to ``grad`` and
#: ``log_density`` that Hessians, Hessian-vector products, gradient
#: replicates and minibatch groups need.
BatchFn = Callable[[Batch], Answer]

#: What iterating a Session yields.
Event = Union[Draws, Progress]


def connect(
    target: str,
    max_message_bytes: int = DEFAULT_MAX_MESSAGE_BYTES,
    options: Sequence[Tuple[str, object]] = (),
) -> grpc.Channel:
    """Opens an insecure (plain-text) channel to ``target`` ("host:port")
    whose send and receive limits are both ``max_message_bytes``, set on
    purpose rather than left at gRPC's default. Use it on loopback or a
    trusted network; for TLS build your own channel with the same two
    options (grpc.max_send_message_length, grpc.max_receive_message_length).
    """
    opts = [
        ("grpc.max_send_message_length", int(max_message_bytes)),
        ("grpc.max_receive_message_length", int(max_message_bytes)),
    ]
    opts.extend(options)
    return grpc.insecure_channel(target, options=opts)


def _request(**frame: object) -> pb.SessionRequest:
    return pb.SessionRequest(**frame)  # type: ignore[arg-type]


#: The most requests whose points a client holds for Draws frames to refer to.
_MAX_HELD = 256

#: The SessionResponse deserializer: Points and Draws frames are read from
#: the received bytes without copying their arrays (see _wire).
_read_session_response = _wire.response_reader(pb.SessionResponse, "points", "draws")


class _Buffers:
    """Aligned float64 arrays that received points are copied into, each
    reused once nothing outside this pool refers to it (CPython's
    reference count: the held points of older requests, draws handed on
    and kept, a Batch kept by the caller all count), so that a session
    whose draws are not kept does not take fresh pages from the allocator
    for every frame."""

    def __init__(self, keep: int = 8) -> None:
        self._bufs: List[np.ndarray] = []
        self._keep = keep
        self._next = 0

    def copy(self, src: object, rows: int, dim: int) -> np.ndarray:
        """A read-only rows x dim array holding the little-endian float64
        values of src (bytes-like, 8 * rows * dim bytes)."""
        n = rows * dim
        bufs = self._bufs
        b = None
        for i in range(len(bufs)):
            # Referred to by the list and the argument only: free.
            if bufs[i].size == n and sys.getrefcount(bufs[i]) == 2:
                b = bufs[i]
                break
        if b is None:
            b = np.empty(n, dtype=WIRE_DTYPE)
            if len(bufs) < self._keep:
                bufs.append(b)
            else:  # replace a buffer in use (it lives on where it is used)
                bufs[self._next] = b
                self._next = (self._next + 1) % self._keep
        a = b.reshape(rows, dim)
        np.copyto(a, np.frombuffer(src, dtype=WIRE_DTYPE, count=n).reshape(rows, dim))  # type: ignore[call-overload]
        a.flags.writeable = False
        return a


#: With an executor, the most frames evaluated at the same time (one
#: helper thread each, waiting on the executor); more queue in order.
_MAX_FRAMES_AT_ONCE = 16


class Session:
    """One sampling session, driven by iterating it.

    ::

        session = Session("127.0.0.1:7070", spec, grad)
        for event in session:          # Draws and Progress, in stream order
            if isinstance(event, Draws):
                keep(event.values.copy())
        print(session.summary)

    The server drives: for every Points frame the session calls ``grad`` (and
    ``log_density`` when the server asks for log pi) on the iterating thread
    and sends the answer before reading on. Alternatively ``batch`` (a
    :data:`BatchFn`, keyword only, in place of ``grad`` and ``log_density``)
    gets each frame as a :class:`Batch` and returns an :class:`Answer`: it
    can give what ``grad`` cannot (Hessians for "ozaki", Hessian-vector
    products for "ozaki-krylov", several gradient replicates per point for
    ``Noise(replicates=...)``) and sees the chains, minibatch groups and
    full-data flag of every row. ``channel_or_target`` is a
    ``grpc.Channel`` (its message limits must allow
    ``spec.max_message_bytes``; see :func:`connect`) or a "host:port" target,
    for which the session opens and closes its own channel with exactly that
    limit. ``timeout`` is the whole session's gRPC deadline in seconds (None:
    none). ``on_registered`` is called with the server's acknowledgement as
    soon as it arrives. With ``keep_draws`` (the default) the session keeps
    every draw it receives and hands them over in the summary
    (``summary.draws``, ``summary.save(path)``, the summary's intervals);
    pass False when the draws are consumed as they come and memory matters.
    By default the server may name a draw that equals a point it has just
    sent (most kernels' next request asks at the positions just reached)
    instead of sending it again, and the session rebuilds it; ``full_draws``
    asks for every draw's values instead. The draws seen are the same.

    ``executor`` (any ``concurrent.futures.Executor``: a thread or process
    pool, ``distributed.Client.get_executor()``, mpi4py's MPIPoolExecutor)
    spreads every batch: its rows are cut into ``split`` contiguous blocks
    (sizes differing by at most one; default: the executor's worker count
    where it exposes one, else the CPU count), the callback runs on each
    block on the executor, and the answers are put back in row order, for
    every quantity asked (gradients, log densities, Hessians,
    Hessian-vector products, replicates). A block's :class:`Batch` holds
    its own rows, chains, vectors and minibatch groups, with ``first_row``
    shifted to its first row; rows of one minibatch group may land in
    different blocks, so derive the minibatch from the group number, not
    from state shared between calls. With a deterministic callback the
    bytes sent, and so the draws, are those of the same session without an
    executor. For a process pool (and Dask or MPI pools) the callback is
    pickled: define it at module level (a lambda or nested function fails
    with TypeError before anything is sent when the executor is a
    ``ProcessPoolExecutor``). The session does not shut the executor down.
    An exception in a worker ends the session like one of the callback.
    With an executor the session reads on while a frame's blocks run, so
    the requests of pipelined chain groups (``Spec.chain_groups``) are on
    the executor at the same time; answers go out in the order of their
    frames.

    Errors: an exception from ``grad``, ``log_density`` or ``batch``, an
    answer of the wrong shape or missing a quantity asked for (ValueError),
    or a request that ``grad`` and ``log_density`` cannot answer (a Hessian,
    a Hessian-vector product, or more than one gradient replicate:
    ValueError, raised before anything is sent) makes the session send Stop,
    receive the draws already made and the summary (which iteration still
    yields and ``summary`` holds), and then re-raises it. A server error
    status raises :class:`SessionError`, whose ``received`` holds what
    arrived before it (see :meth:`received`: the draws and the last progress
    even when the server could send no Finished frame); a gap or repeat in the draws' sequence numbers
    raises :class:`DrawsLostError` at once. Leaving the loop early (break)
    cancels the call.

    When the stream breaks (UNAVAILABLE: the server was killed, restarts or
    shuts down having checkpointed the session; or a reset stream) the
    session resumes by itself on a new call, as ``resume`` (a
    :class:`ResumePolicy`) bounds: it sends Resume with the session's id,
    token and the next draw it needs, and the server (one that keeps state:
    `sluice serve --state-dir`) continues from its latest checkpoint.
    Iteration sees every draw once, in order; ``grad`` may be asked again
    for points it evaluated before the break; ``on_registered`` is called
    once. ``resumes`` counts the resumptions.
    """

    def __init__(
        self,
        channel_or_target: Union[grpc.Channel, str],
        spec: Spec,
        grad: Optional[GradFn] = None,
        log_density: Optional[LogDensityFn] = None,
        *,
        batch: Optional[BatchFn] = None,
        timeout: Optional[float] = None,
        on_registered: Optional[Callable[[Registered], None]] = None,
        keep_draws: bool = True,
        executor: Optional[cf.Executor] = None,
        split: Optional[int] = None,
        resume: ResumePolicy = ResumePolicy(),
        full_draws: bool = False,
    ) -> None:
        if (grad is None) == (batch is None):
            raise TypeError("sluice_client: give either grad (with log_density if needed) or batch")
        if batch is not None and log_density is not None:
            raise TypeError("sluice_client: batch answers log densities itself; log_density goes with grad only")
        self._spec = spec
        self._on_registered = on_registered
        self._register = spec.to_register()  # shapes start; raises ValueError early
        _alloc.keep_frame_pages()
        if split is not None and (isinstance(split, bool) or not isinstance(split, int) or split < 1):
            raise ValueError(f"sluice_client: split must be an integer >= 1, not {split!r}")
        if split is not None and executor is None:
            raise TypeError("sluice_client: split goes with executor")
        if executor is not None:
            _parallel.check_picklable(executor, (grad, log_density, batch))
        self._executor = executor
        self._split = split if split is not None else (_parallel.default_split(executor) if executor else 1)
        self._register.accepts_draw_references = not full_draws
        # A step's draws may ride in the next request's Points frame (one
        # frame fewer per step); full_draws keeps them in Draws frames.
        self._register.draws_in_points = not full_draws
        self._grad = grad
        self._log_density = log_density
        self._batch = batch
        self._timeout = timeout
        # A channel of our own is opened when iteration starts, so that a
        # Session never iterated holds no connection.
        self._target = channel_or_target if isinstance(channel_or_target, str) else None
        self._channel: Optional[grpc.Channel] = None if self._target is not None else channel_or_target
        #: The server's acknowledgement, once received.
        self.registered: Optional[Registered] = None
        #: The summary, once the Finished frame arrived (also when the
        #: session then raised).
        self.summary: Optional[Summary] = None
        #: Draws received so far.
        self.draws_received = 0
        self._store: Optional[DrawStore] = DrawStore(spec.dim) if keep_draws else None
        self._last_progress: Optional[Progress] = None
        self._next_seq = 0
        # The points of the latest requests, request id -> (the chain of
        # its first row, rows x dim points), which Draws frames may refer to
        # instead of repeating them (_hold).
        self._held: Dict[int, Tuple[int, np.ndarray]] = {}
        self._buffers = _Buffers()
        self._started = False
        self._lock = threading.Lock()
        self._outbox: "queue.SimpleQueue[Optional[Union[pb.SessionRequest, bytes]]]" = queue.SimpleQueue()
        self._outbox.put(_request(register=self._register))
        self._stopped = False
        self._closed = False
        self._call: Optional[grpc.Call] = None
        self._resume = resume
        # With an executor, frames are answered by helper threads
        # (_answer_later): submitted, answered and pending frames, and the
        # first error of the caller's functions among them.
        self._frame_pool: Optional[cf.ThreadPoolExecutor] = None
        self._frames_lock = threading.Lock()
        self._frames_submitted = 0
        self._frames_sent = 0
        self._frames_done: Dict[int, Union[bytes, BaseException]] = {}
        self._frames_pending: "set[cf.Future[Union[bytes, BaseException]]]" = set()
        self._frame_error: Optional[BaseException] = None
        #: Times the session was resumed on a new stream after its stream
        #: broke.
        self.resumes = 0

    def __iter__(self) -> Iterator[Event]:
        if self._started:
            raise RuntimeError("sluice_client: a Session is iterated once")
        self._started = True
        return self._events()

    def __enter__(self) -> "Session":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def stop(self, reason: str = "stopped by client") -> None:
        """Asks the server to finish now (reason STOPPED). Keep iterating to
        receive the draws already made and the summary. Safe to call from
        any thread; later Points frames are not answered."""
        with self._lock:
            if self._stopped or self._closed:
                return
            self._stopped = True
            self._outbox.put(_request(stop=pb.Stop(reason=reason)))

    def close(self) -> None:
        """Cancels the call if it still runs and closes the channel the
        session opened itself. Idempotent."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
            self._outbox.put(None)  # ends the request stream
        if self._call is not None:
            self._call.cancel()
        if self._target is not None and self._channel is not None:
            self._channel.close()

    def received(self) -> Summary:
        """What arrived so far, as a Summary: the server's once its Finished
        frame arrived; before that (a session that failed without one) a
        Summary with reason UNSPECIFIED, the acknowledgement, the last
        progress report, no per-parameter summary, and the draws received
        (with keep_draws)."""
        if self.summary is not None:
            return self.summary
        return Summary(
            self.registered,
            FinishReason.UNSPECIFIED,
            "",
            self._last_progress if self._last_progress is not None else Progress.from_wire(pb.Progress()),
            (),
            self.draws_received,
            0,
            *(self._store.arrays() if self._store is not None else (None, None, None)),
        )

    def _reopen(self) -> None:
        """Prepares the request stream of a new call after a broken one:
        Resume from the next draw needed, or Register again when the
        session was never acknowledged."""
        with self._lock:
            self._outbox.put(None)  # ends the broken call's request stream
            self._outbox = queue.SimpleQueue()
            if self.registered is None:
                self._outbox.put(_request(register=self._register))
            else:
                self._outbox.put(
                    _request(
                        resume=pb.Resume(
                            session_id=self.registered.session_id,
                            token=self.registered.resume_token,
                            next_seq=self._next_seq,
                        )
                    )
                )

    #: The field of the request that carries Evaluations (see _frames).
    _evaluations_field = _frames.SESSION_EVALUATIONS

    def _send(self, frame: Union[pb.SessionRequest, bytes]) -> None:
        with self._lock:
            if not (self._stopped or self._closed):
                self._outbox.put(frame)

    def _events(self) -> Iterator[Event]:
        eval_error: Optional[BaseException] = None
        try:
            if self._channel is None:
                assert self._target is not None
                self._channel = connect(self._target, self._spec.message_limit())
            rpc = self._channel.stream_stream(
                SESSION_METHOD,
                request_serializer=_frames.serializer(pb.SessionRequest),
                response_deserializer=_read_session_response,
            )
            tries = 0
            while True:
                call = rpc(iter(self._outbox.get, None), timeout=self._timeout)
                with self._lock:
                    if self._closed:
                        call.cancel()
                        return
                    self._call = call
                got_registered = False
                try:
                    for kind, m in _read_ahead(call):
                        if kind == "points":
                            p = m
                            self._hold(p)
                            if eval_error is None and not self._stopped:
                                eval_error = self._answer(p)
                            if eval_error is None and self._frame_error is not None:
                                eval_error = self._frame_error
                            if p.draws is not None:
                                # As a Draws frame right after this one,
                                # handed on once the answer is out.
                                yield self._deliver(p.draws)
                        elif kind == "draws":
                            yield self._deliver(m)
                        elif kind == "progress":
                            self._last_progress = Progress.from_wire(m)
                            yield self._last_progress
                        elif kind == "registered":
                            first = self.registered is None
                            self.registered = Registered.from_wire(m)
                            got_registered = True
                            if not first:
                                self.resumes += 1
                            if first and self._on_registered is not None:
                                self._on_registered(self.registered)
                        elif kind == "finished":
                            self.summary = Summary.from_wire(
                                m,
                                self.registered,
                                self.draws_received,
                                self._store.arrays() if self._store is not None else None,
                            )
                except grpc.RpcError as err:
                    if got_registered:
                        tries = 0
                    if self._frame_pool is not None:
                        eval_error = eval_error or self._wait_frames()
                    if (
                        eval_error is None
                        and not self._stopped
                        and not self._closed
                        and self.summary is None
                        and tries < self._resume.attempts
                        and resumable(err)
                    ):
                        self._resume.wait(tries)
                        tries += 1
                        self._reopen()
                        continue
                    serr = SessionError.from_rpc_error(err, self.summary)
                    serr.received = self.summary if self.summary is not None else self.received()
                    if eval_error is not None:
                        eval_error.add_note(f"sluice_client: the session then ended with {serr}")
                        raise eval_error from None
                    raise serr from None
                break
            if self._frame_pool is not None:
                eval_error = eval_error or self._wait_frames()
            if eval_error is not None:
                raise eval_error
            if self.summary is None:
                raise ProtocolError("sluice_client: stream ended without a finished frame")
        finally:
            self.close()
            if self._frame_pool is not None:
                self._frame_pool.shutdown(wait=False, cancel_futures=True)

    def _answer(self, p: _wire.PointsFrame) -> Optional[BaseException]:
        """Evaluates one Points frame and sends the answer; on an error of
        the caller's functions sends Stop instead and returns the error.
        _hold has checked the frame's points and chains and kept the points."""
        rows, dim = p.rows, p.dim
        quantities = set(p.quantities.tolist())
        want = _Wanted(
            gradient=pb.QUANTITY_GRADIENT in quantities,
            log_density=pb.QUANTITY_LOG_DENSITY in quantities,
            hessian=pb.QUANTITY_HESSIAN in quantities,
            hessian_vector=pb.QUANTITY_HESSIAN_VECTOR in quantities,
            replicates=max(1, p.replicates),
        )
        if want.hessian_vector and len(p.vectors) != 8 * rows * dim:
            raise ProtocolError(
                f"sluice_client: malformed points frame: {len(p.vectors)} bytes of vectors for {rows} x {dim}"
            )
        if len(p.minibatch_groups) not in (0, rows):
            raise ProtocolError(
                f"sluice_client: malformed points frame: {len(p.minibatch_groups)} minibatch groups for {rows} rows"
            )
        points = self._part(p)
        b: Optional[Batch] = None
        if self._batch is not None:
            b = Batch(
                points=points,
                chains=np.array(p.chains, dtype=np.int32),
                want_gradient=want.gradient,
                want_log_density=want.log_density,
                want_hessian=want.hessian,
                want_hessian_vector=want.hessian_vector,
                vectors=from_wire(p.vectors, rows, dim) if want.hessian_vector else None,
                minibatch_groups=np.array(p.minibatch_groups, dtype=np.int32) if len(p.minibatch_groups) else None,
                full_data=p.full_data,
                replicates=want.replicates,
                request_id=p.request_id,
                first_row=p.first_row,
            )
        job = (b, points, want, p.request_id, p.first_row, rows, dim)
        if self._executor is not None:
            self._answer_later(job)
            return None
        frame = self._evaluate(*job)
        if isinstance(frame, BaseException):
            return frame
        self._send(frame)
        return None

    def _evaluate(
        self, b: Optional[Batch], points: np.ndarray, want: "_Wanted", request_id: int, first_row: int, rows: int, dim: int
    ) -> Union[bytes, BaseException]:
        """The answer to one Points frame as wire bytes; on an error of the
        caller's functions sends Stop instead and returns the error."""
        try:
            if b is not None:
                if self._executor is not None:
                    ans = self._split_batch(b, want)
                else:
                    assert self._batch is not None
                    ans = self._batch(b)
                    if not isinstance(ans, Answer):
                        raise TypeError(
                            f"sluice_client: batch returned {type(ans).__name__}; want sluice_client.Answer"
                        )
            else:
                ans = self._simple(points, want, request_id, first_row)
            return _encode(self._evaluations_field, request_id, first_row, ans, want, rows, dim)
        except Exception as err:  # the caller's code failed: stop, drain, re-raise
            self.stop(f"evaluator failed: {err!r}")
            return err

    def _answer_later(self, job: tuple) -> None:  # type: ignore[type-arg]
        """With an executor: evaluates the frame on a helper thread (which
        spreads its blocks over the executor and waits for them) and goes
        back to reading, so that the requests of pipelined chain groups are
        evaluated at the same time. Answers are sent in the order of their
        frames, the bytes those of the same frames answered one at a time;
        the first error is kept for the iterating thread (_frame_error)."""
        if self._frame_pool is None:
            self._frame_pool = cf.ThreadPoolExecutor(
                max_workers=_MAX_FRAMES_AT_ONCE, thread_name_prefix="sluice_client-frame"
            )
        with self._frames_lock:
            n = self._frames_submitted
            self._frames_submitted += 1
            fut = self._frame_pool.submit(self._evaluate, *job)
            self._frames_pending.add(fut)
        fut.add_done_callback(lambda f: self._frame_done(n, f))

    def _frame_done(self, n: int, fut: "cf.Future[Union[bytes, BaseException]]") -> None:
        """Sends the answers of frame n and of the frames after it that are
        done, once every frame before n has been answered."""
        try:
            out: Union[bytes, BaseException] = fut.result()
        except BaseException as err:  # cancelled at close, or a failure of the helper itself
            out = err
        with self._frames_lock:
            self._frames_done[n] = out
            while self._frames_sent in self._frames_done:
                r = self._frames_done.pop(self._frames_sent)
                self._frames_sent += 1
                if isinstance(r, BaseException):
                    if self._frame_error is None and not isinstance(r, cf.CancelledError):
                        self._frame_error = r
                else:
                    self._send(r)
            self._frames_pending.discard(fut)

    def _wait_frames(self) -> Optional[BaseException]:
        """Waits for the frames still being evaluated on the executor and
        returns the first error among them, if any."""
        while True:
            with self._frames_lock:
                pending = list(self._frames_pending)
                if not pending:
                    return self._frame_error
            cf.wait(pending)

    def _split_batch(self, b: Batch, want: "_Wanted") -> Answer:
        """Answers one Batch by cutting it into row blocks evaluated on the
        executor, each a Batch of its own rows (first_row shifted)."""
        assert self._executor is not None and self._batch is not None
        bounds = _parallel.block_bounds(b.rows, self._split)
        futures = []
        for lo, hi in bounds:
            part = Batch(
                points=b.points[lo:hi],
                chains=b.chains[lo:hi],
                want_gradient=b.want_gradient,
                want_log_density=b.want_log_density,
                want_hessian=b.want_hessian,
                want_hessian_vector=b.want_hessian_vector,
                vectors=None if b.vectors is None else b.vectors[lo:hi],
                minibatch_groups=None if b.minibatch_groups is None else b.minibatch_groups[lo:hi],
                full_data=b.full_data,
                replicates=b.replicates,
                request_id=b.request_id,
                first_row=b.first_row + lo,
            )
            futures.append(self._executor.submit(_parallel.eval_batch_block, self._batch, part))
        answers = _parallel.gather(futures, bounds, b.request_id, b.first_row)
        return _parallel.assemble(
            answers,  # type: ignore[arg-type]
            bounds,
            b.rows,
            b.dim,
            want.gradient,
            want.log_density,
            want.hessian,
            want.hessian_vector,
            want.replicates,
        )

    def _simple(self, points: np.ndarray, want: "_Wanted", request_id: int = 0, first_row: int = 0) -> Answer:
        """Answers with grad and log_density, checking their shapes; with an
        executor, over row blocks evaluated on it."""
        rows, dim = points.shape
        if want.hessian or want.hessian_vector:
            what = "Hessians" if want.hessian else "Hessian-vector products"
            raise ValueError(
                f"sluice_client: the server asks for {what} (kernel {self._spec.kernel!r}), which grad and "
                "log_density cannot give: pass batch= (a function of a sluice_client.Batch returning an Answer)"
            )
        if want.replicates > 1:
            raise ValueError(
                f"sluice_client: the server asks for {want.replicates} gradient replicates per point "
                "(noise.replicates), which grad cannot give: pass batch= (a function of a sluice_client.Batch "
                "returning an Answer with gradients of shape (rows, replicates, dim))"
            )
        if want.log_density and self._log_density is None:
            raise ValueError("sluice_client: the server asks for log densities, but no log_density was given")
        grad = self._grad if want.gradient else None
        log_density = self._log_density if want.log_density else None
        if self._executor is not None:
            bounds = _parallel.block_bounds(rows, self._split)
            futures = [
                self._executor.submit(_parallel.eval_simple_block, grad, log_density, points[lo:hi])
                for lo, hi in bounds
            ]
            parts = _parallel.gather(futures, bounds, request_id, first_row)
        else:
            bounds = [(0, rows)]
            parts = [_parallel.eval_simple_block(grad, log_density, points)]
        ans = Answer()
        if grad is not None:
            g = np.empty((rows, dim)) if len(bounds) > 1 else None
            for (lo, hi), (gb, _) in zip(bounds, parts):  # type: ignore[misc]
                if gb.shape != (hi - lo, dim):
                    raise ValueError(
                        f"sluice_client: grad returned an array of shape {gb.shape}; "
                        f"want (rows, dim) = {(hi - lo, dim)}"
                    )
                if g is None:
                    g = gb
                else:
                    g[lo:hi] = gb
            ans.gradients = g
        if log_density is not None:
            ld = np.empty(rows) if len(bounds) > 1 else None
            for (lo, hi), (_, lb) in zip(bounds, parts):  # type: ignore[misc]
                if lb.shape != (hi - lo,):
                    raise ValueError(
                        f"sluice_client: log_density returned an array of shape {lb.shape}; "
                        f"want (rows,) = {(hi - lo,)}"
                    )
                if ld is None:
                    ld = lb
                else:
                    ld[lo:hi] = lb
            ans.log_densities = ld
        return ans

    def _hold(self, p: _wire.PointsFrame) -> None:
        """Keeps the points of a Points frame, at their rows within the
        request, for Draws frames that refer to them."""
        rows, dim, first = p.rows, p.dim, p.first_row
        pts = p.points
        if len(pts) != 8 * rows * dim or len(p.chains) != rows:
            raise ProtocolError(
                f"sluice_client: malformed points frame: {len(pts)} bytes and "
                f"{len(p.chains)} chains for {rows} x {dim}"
            )
        total = max(p.total_rows, rows)  # a frame without total_rows is a whole request
        if first < 0 or first + rows > total:
            raise ProtocolError(f"sluice_client: malformed points frame: rows {first} to {first + rows} of {total}")
        held = self._held
        if first == 0 and rows > 0:
            # A server stepping its chains in groups (chain_groups) sends
            # each group's requests in turn: a request starting at the same
            # chain as a held one replaces it, so about one step's points
            # are held.
            c0 = int(p.chains[0])
            for rid in [rid for rid, (c, _) in held.items() if c == c0 and rid != p.request_id]:
                del held[rid]
        else:
            c0 = held[p.request_id][0] if p.request_id in held else -1
        if len(held) >= _MAX_HELD and p.request_id not in held:
            del held[next(iter(held))]  # the oldest
        if first == 0 and rows == total:
            # The common case: the points copied once, into an aligned
            # array (the received bytes are a view of the frame, at any
            # offset), read-only.
            held[p.request_id] = (c0, self._buffers.copy(pts, rows, dim))
            return
        h = held.get(p.request_id)
        if h is None or h[1].shape != (total, dim):
            h = (c0, np.empty((total, dim), dtype=WIRE_DTYPE))
        held[p.request_id] = (c0, h[1])
        h[1][first : first + rows] = from_wire(pts, rows, dim)

    def _part(self, p: _wire.PointsFrame) -> np.ndarray:
        """Returns the points of a Points frame kept by _hold, read-only."""
        v = self._held[p.request_id][1][p.first_row : p.first_row + p.rows]
        if v.flags.writeable:
            v = v.view()
            v.flags.writeable = False
        return v

    def _deliver(self, w: _wire.DrawsFrame) -> Draws:
        d = decode_draws(w, self._next_seq, self._held)
        self._next_seq += d.rows
        self.draws_received += d.rows
        if self._store is not None:
            self._store.add(d)
        return d


#: What the reader thread of _read_ahead puts after the last frame.
_END = object()


def _read_ahead(call: "Iterator[_wire.Frame]") -> "Iterator[_wire.Frame]":
    """The frames of a call, in order, read by a thread of their own.

    grpcio's synchronous stream asks gRPC for the next message only when
    it is iterated, so a frame that arrives while the caller's function
    runs waits for the loop to come back before it is even received
    (about a millisecond for the 256 KB points of 32 x 1000, measured at
    64 x 1000 in two chain groups). Here a thread keeps a receive
    outstanding at all times and hands the frames over through a queue;
    everything else (the caller's functions, the draws, the answers)
    stays on the iterating thread. The server sends only what the
    answers let it, so the queue holds at most what it would have held
    in gRPC's buffers. An error of the call is raised where the frame
    would have been; cancelling the call (close) ends the thread."""
    inbox: "queue.SimpleQueue[object]" = queue.SimpleQueue()

    def read() -> None:
        try:
            for frame in call:
                inbox.put(frame)
        except grpc.RpcError as err:
            inbox.put(err)
        except BaseException as err:  # not expected from grpcio; hand it over rather than lose it
            inbox.put(err)
        finally:
            inbox.put(_END)

    threading.Thread(target=read, name="sluice_client-reader", daemon=True).start()
    while True:
        item = inbox.get()
        if item is _END:
            return
        if isinstance(item, BaseException):
            raise item
        yield item  # type: ignore[misc]


@dataclass(frozen=True)
class _Wanted:
    """What one Points frame asks for."""

    gradient: bool
    log_density: bool
    hessian: bool
    hessian_vector: bool
    replicates: int


def _encode(outer: int, request_id: int, first_row: int, ans: Answer, want: _Wanted, rows: int, dim: int) -> bytes:
    """The answer to a Points frame as wire bytes (an Evaluations message
    in field ``outer`` of the request), with the quantities asked for,
    checking that each is present and has its shape (sluice.proto, message
    Evaluations); quantities not asked for are left out. Each array is
    copied once, into the frame (see _frames)."""

    shaped = _parallel.shaped
    reps = want.replicates
    g = ld = h = hv = None
    if want.gradient:
        shapes = [(rows, reps, dim)] if reps > 1 else [(rows, dim), (rows, 1, dim)]
        g = shaped("gradients", ans.gradients, *shapes)
    if want.log_density:
        ld = shaped("log_densities", ans.log_densities, (rows,))
    if want.hessian:
        h = shaped("hessians", ans.hessians, (rows, dim, dim))
    if want.hessian_vector:
        hv = shaped("hessian_vectors", ans.hessian_vectors, (rows, dim))
    return _frames.evaluations(outer, request_id, first_row, rows, dim, g, ld, h, hv)


_ROWS = np.arange(0)


def _rows(n: int) -> np.ndarray:
    """0, 1, ..., n - 1 (a view of a cached range)."""
    global _ROWS
    if len(_ROWS) < n:
        _ROWS = np.arange(max(n, 2 * len(_ROWS)))
        _ROWS.flags.writeable = False
    return _ROWS[:n]


def decode_draws(
    w: "Union[pb.Draws, _wire.DrawsFrame]",
    expected_seq: int,
    held: "Optional[Dict[int, Tuple[int, np.ndarray]]]" = None,
) -> Draws:
    """Returns a Draws frame (a pb.Draws or the session's own reading of
    one) as :class:`Draws`, or raises DrawsLostError
    when it does not start at expected_seq and ProtocolError when it is
    malformed. Draws sent by reference (``point_rows``) are rebuilt from
    held, request id -> (first chain, points) of the latest Points frames
    received."""
    if w.seq != expected_seq:
        raise DrawsLostError(expected_seq, w.seq)
    rows, dim = w.rows, w.dim
    if len(w.chains) != rows or len(w.iterations) != rows:
        raise ProtocolError(f"sluice_client: malformed draws frame at sequence {w.seq}")
    if len(w.point_rows) == 0:
        if len(w.values) != 8 * rows * dim:
            raise ProtocolError(f"sluice_client: malformed draws frame at sequence {w.seq}")
        values = from_wire(w.values, rows, dim)
    else:
        h = None if held is None else held.get(w.from_request_id)
        if h is None or h[1].shape[1] != dim or len(w.point_rows) != rows:
            raise ProtocolError(
                f"sluice_client: draws frame at sequence {w.seq} refers to request {w.from_request_id}, "
                f"whose points are not among those held"
            )
        pts = h[1]
        pr = np.asarray(w.point_rows, dtype=np.int64)
        low = int(pr.min())
        sent = pr < 0
        n = int(sent.sum()) if low < 0 else 0
        vals = w.values
        if len(vals) != 8 * n * dim or int(pr.max()) >= pts.shape[0]:
            raise ProtocolError(f"sluice_client: malformed draws frame at sequence {w.seq}")
        if n == 0 and rows == pts.shape[0] and not pts.flags.writeable and bool((pr == _rows(rows)).all()):
            # Every row of the request, in order (lmc, kinetic): the held
            # points are the draws. They are a read-only array that
            # nothing writes to while anything refers to it (the
            # session's _Buffers): no copy.
            values = pts
        elif n == 0:
            values = pts[pr]
            values.flags.writeable = False
        else:
            values = np.empty((rows, dim), dtype=pts.dtype)
            values[~sent] = pts[pr[~sent]]
            values[sent] = from_wire(vals, n, dim)
            values.flags.writeable = False
    return Draws(
        seq=w.seq,
        values=values,
        chains=np.array(w.chains, dtype=np.int32),
        iterations=np.array(w.iterations, dtype=np.int64),
    )


def run(
    channel_or_target: Union[grpc.Channel, str],
    spec: Spec,
    grad: Optional[GradFn] = None,
    log_density: Optional[LogDensityFn] = None,
    on_draws: Optional[Callable[[Draws], None]] = None,
    on_progress: Optional[Callable[[Progress], None]] = None,
    *,
    batch: Optional[BatchFn] = None,
    on_registered: Optional[Callable[[Registered], None]] = None,
    timeout: Optional[float] = None,
    keep_draws: bool = True,
    executor: Optional[cf.Executor] = None,
    split: Optional[int] = None,
    resume: ResumePolicy = ResumePolicy(),
    full_draws: bool = False,
) -> Summary:
    """Runs one session to its end and returns the summary.

    ``grad(points)`` gets a read-only rows x dim float64 array and returns the
    gradients of log pi, shape (rows, dim); ``log_density`` is needed only by
    kernels that ask for log pi. ``batch`` replaces both: it gets every
    request as a :class:`Batch` and returns an :class:`Answer` (see
    :class:`Session`). ``on_draws`` gets every block of draws in sequence
    order, ``on_progress`` every progress report, ``on_registered`` the
    server's acknowledgement; all run on the calling thread. With
    ``keep_draws`` (the default) the summary holds every draw received
    (``summary.draws``, ``summary.save(path)``). ``executor`` and
    ``split`` spread every batch over a ``concurrent.futures.Executor`` (see
    :class:`Session`). A broken stream is resumed as ``resume`` bounds (see
    :class:`Session`); ``full_draws`` as for :class:`Session`. Errors as for
    :class:`Session`.
    """
    session = Session(
        channel_or_target,
        spec,
        grad,
        log_density,
        batch=batch,
        timeout=timeout,
        on_registered=on_registered,
        keep_draws=keep_draws,
        executor=executor,
        split=split,
        resume=resume,
        full_draws=full_draws,
    )
    with session:
        for event in session:
            if isinstance(event, Draws):
                if on_draws is not None:
                    on_draws(event)
            elif on_progress is not None:
                on_progress(event)
    assert session.summary is not None  # _events raises otherwise
    return session.summary
