"""Following a session from another process: the Follow rpc streams a
running (or recently finished) session's header, then its draws from a
sequence number on with its progress reports among them, then its
Finished frame."""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Iterator, Optional, Tuple, Union

import grpc

from . import _alloc
from ._errors import ProtocolError, SessionError
from ._proto.sluice.v1 import sluice_pb2 as pb
from ._resume import ResumePolicy, resumable
from ._session import connect, decode_draws
from ._types import _METRIC_FROM_WIRE, Draws, DrawStore, Progress, Summary, Wants

#: Full method name of the Follow rpc.
FOLLOW_METHOD = "/sluice.v1.SluiceService/Follow"

#: Receive limit of a channel a Follower opens from a target. A Follow frame
#: can be as large as the server's own message limit (`sluice serve
#: --max-message-bytes`, 16 MiB by default), not the session's, and the
#: server keeps at most 64 MiB of draws per session for followers.
FOLLOW_MAX_MESSAGE_BYTES = 64 << 20


@dataclass(frozen=True)
class FollowHeader:
    """What a follower learns of a session before its draws: what it
    samples and the budget it was given, as registered (sluice.proto,
    message FollowHeader). ``draws_per_chain``, ``max_evaluations`` and
    ``max_seconds`` are 0 when that limit was not set; ``first_seq`` and
    ``next_seq`` are the oldest draw the server still kept and the next to
    come when it sent the header."""

    session_id: str
    dim: int
    chains: int
    kernel: str
    names: Tuple[str, ...]
    step: float
    seed: int
    burn_in: int
    keep_every: int
    draws_per_chain: int
    max_evaluations: int
    max_seconds: float
    evaluations_per_step: int
    wants: Wants
    first_seq: int
    next_seq: int

    @classmethod
    def from_wire(cls, m: pb.FollowHeader) -> "FollowHeader":
        w = m.wants
        return cls(
            m.session_id,
            m.dim,
            m.chains,
            m.kernel,
            tuple(m.names),
            m.step,
            m.seed,
            m.burn_in,
            m.keep_every,
            m.draws_per_chain,
            m.max_evaluations,
            m.max_seconds,
            m.evaluations_per_step,
            Wants(
                min_bulk_ess=w.min_bulk_ess,
                min_tail_ess=w.min_tail_ess,
                max_rhat=w.max_rhat,
                max_ksd=w.max_ksd,
                eps=w.eps,
                metric=_METRIC_FROM_WIRE.get(w.metric),
            ),
            m.first_seq,
            m.next_seq,
        )


#: What iterating a Follower yields: the FollowHeader first, then Draws and
#: Progress in the order the session produced them, then the Summary last.
FollowEvent = Union[FollowHeader, Draws, Progress, Summary]


class Follower:
    """The draws of one session, as a downstream consumer sees them.

    ::

        follower = follow("127.0.0.1:7070", session_id, token)
        for event in follower:          # header, draws and progress, then the Summary
            if isinstance(event, Draws):
                keep(event.values.copy())
            elif isinstance(event, Progress):
                print(event.steps, event.evaluations_left)
        print(follower.summary.reason)

    Iteration yields the session's :class:`FollowHeader` first (also kept as
    ``header``), then :class:`Draws` numbered from ``from_seq`` on, exactly
    once each, with the session's :class:`Progress` reports among them where
    the session made them (the latest is kept as ``progress``; a follower
    that falls far behind may miss reports, never draws), and finally the
    session's :class:`Summary` (its
    ``registered`` is None, ``draws_received`` counts this follower's rows
    and, with ``keep_draws`` (the default), ``draws`` holds them). Leaving the loop early (break) disconnects; ``next_seq`` is then
    the sequence number to resume from with a new Follower, which gets every
    draw after it with no loss and no duplicate while the server still
    keeps it.

    ``token`` is the session's ``Registered.resume_token``: a wrong token and
    an unknown session both get NOT_FOUND. When the stream breaks with
    UNAVAILABLE (the server restarts, or the session waits for its client to
    resume it) the follower follows again from ``next_seq`` by itself, as
    ``resume`` (a :class:`ResumePolicy`) bounds; ``resumes`` counts those.

    ``channel_or_target`` is a ``grpc.Channel`` or a "host:port" target, for
    which the follower opens its own channel with receive limit
    ``max_message_bytes``. ``timeout`` is the call's gRPC deadline in
    seconds (None: none).

    Errors raise :class:`SessionError`: ``NOT_FOUND`` (field "session_id")
    for a session the server does not know or keeps no draws of, or a wrong
    token (the same answer, so the token protects the id);
    ``OUT_OF_RANGE`` (field "from_seq") when the rows asked for have left the
    server's bounded buffer (the message says the oldest kept) or lie beyond
    the latest draw. A gap or repeat in the sequence numbers raises
    :class:`DrawsLostError`.
    """

    def __init__(
        self,
        channel_or_target: Union[grpc.Channel, str],
        session_id: str,
        token: str,
        from_seq: int = 0,
        *,
        timeout: Optional[float] = None,
        max_message_bytes: int = FOLLOW_MAX_MESSAGE_BYTES,
        keep_draws: bool = True,
        resume: ResumePolicy = ResumePolicy(),
    ) -> None:
        if from_seq < 0:
            raise ValueError(f"sluice_client: from_seq {from_seq} is negative")
        _alloc.keep_frame_pages()
        self.session_id = session_id
        self._token = token
        self._resume = resume
        #: Times the follower followed again after a broken stream.
        self.resumes = 0
        self._target = channel_or_target if isinstance(channel_or_target, str) else None
        self._channel: Optional[grpc.Channel] = None if self._target is not None else channel_or_target
        self._limit = max_message_bytes
        self._timeout = timeout
        self._from_seq = from_seq
        #: Sequence number of the next draw expected (where to resume).
        self.next_seq = from_seq
        #: The session's summary, once its Finished frame arrived.
        self.summary: Optional[Summary] = None
        #: Draws received by this follower.
        self.draws_received = 0
        #: The session's header, once received.
        self.header: Optional[FollowHeader] = None
        #: The latest progress report received.
        self.progress: Optional[Progress] = None
        self._store: Optional[DrawStore] = DrawStore() if keep_draws else None
        self._started = False
        self._lock = threading.Lock()
        self._closed = False
        self._call: Optional[grpc.Call] = None

    def __iter__(self) -> Iterator[FollowEvent]:
        if self._started:
            raise RuntimeError("sluice_client: a Follower is iterated once; resume with a new one from next_seq")
        self._started = True
        return self._events()

    def __enter__(self) -> "Follower":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Cancels the call if it still runs (disconnects) and closes the
        channel the follower opened itself. Idempotent; safe from any
        thread."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
        if self._call is not None:
            self._call.cancel()
        if self._target is not None and self._channel is not None:
            self._channel.close()

    def _events(self) -> Iterator[FollowEvent]:
        try:
            if self._channel is None:
                assert self._target is not None
                self._channel = connect(self._target, self._limit)
            rpc = self._channel.unary_stream(
                FOLLOW_METHOD,
                request_serializer=pb.FollowRequest.SerializeToString,
                response_deserializer=pb.FollowResponse.FromString,
            )
            tries = 0
            while self.summary is None:
                call = rpc(
                    pb.FollowRequest(session_id=self.session_id, token=self._token, from_seq=self.next_seq),
                    timeout=self._timeout,
                )
                with self._lock:
                    if self._closed:
                        call.cancel()
                        return
                    self._call = call
                got = False
                try:
                    for frame in call:
                        got = True
                        kind = frame.WhichOneof("frame")
                        if kind == "draws":
                            d = decode_draws(frame.draws, self.next_seq)
                            self.next_seq += d.rows
                            self.draws_received += d.rows
                            if self._store is not None:
                                self._store.add(d)
                            yield d
                        elif kind == "progress":
                            self.progress = Progress.from_wire(frame.progress)
                            yield self.progress
                        elif kind == "header":
                            self.header = FollowHeader.from_wire(frame.header)
                            yield self.header
                        elif kind == "finished":
                            self.summary = Summary.from_wire(
                                frame.finished,
                                None,
                                self.draws_received,
                                self._store.arrays() if self._store is not None else None,
                            )
                            yield self.summary
                except grpc.RpcError as err:
                    if got:
                        tries = 0
                    if self._closed or tries >= self._resume.attempts or not resumable(err):
                        raise SessionError.from_rpc_error(err, self.summary, call="follow") from None
                    self._resume.wait(tries)
                    tries += 1
                    self.resumes += 1
                    continue
                break
            if self.summary is None:
                raise ProtocolError("sluice_client: follow stream ended without a finished frame")
        finally:
            self.close()


def follow(
    channel_or_target: Union[grpc.Channel, str],
    session_id: str,
    token: str,
    from_seq: int = 0,
    *,
    timeout: Optional[float] = None,
    max_message_bytes: int = FOLLOW_MAX_MESSAGE_BYTES,
    keep_draws: bool = True,
    resume: ResumePolicy = ResumePolicy(),
) -> Follower:
    """Follows session ``session_id`` (``Registered.session_id``, with its
    ``Registered.resume_token``) from draw ``from_seq`` on: iterate the
    result for the header, draws and progress, then the Summary (see
    :class:`Follower`). The server must keep draws for followers
    (`sluice serve --follow-buffer`, on by default)."""
    return Follower(
        channel_or_target,
        session_id,
        token,
        from_seq,
        timeout=timeout,
        max_message_bytes=max_message_bytes,
        keep_draws=keep_draws,
        resume=resume,
    )
