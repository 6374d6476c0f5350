"""The worker loop: attaches to a running session (the Attach rpc) and
answers the Points frames the server gives it with the caller's function,
exactly as a session's owner does, until the session ends."""

from __future__ import annotations

import os
import queue
import socket
from typing import Callable, Dict, Optional, Tuple, Union

import grpc
import numpy as np

from . import _alloc, _frames, _wire
from ._errors import SessionError
from ._proto.sluice.v1 import sluice_pb2 as pb
from ._session import BatchFn, GradFn, LogDensityFn, Session, _Buffers, connect
from ._types import DEFAULT_MAX_MESSAGE_BYTES

#: Full method name of the Attach rpc.
ATTACH_METHOD = "/sluice.v1.SluiceService/Attach"

#: The environment :func:`work_from_env` reads (the names the project's
#: Slurm batch script and Kubernetes worker Job set).
ENV_TARGET = "SLUICE_TARGET"
ENV_SESSION_ID = "SLUICE_SESSION_ID"
ENV_TOKEN = "SLUICE_TOKEN"
ENV_TOKEN_FILE = "SLUICE_TOKEN_FILE"
ENV_WORKER_INDEX = "SLUICE_WORKER_INDEX"
ENV_CA_FILE = "SLUICE_CA_FILE"


#: The AttachResponse deserializer: Points frames are read from the
#: received bytes without copying their arrays (see _wire).
_read_attach_response = _wire.response_reader(pb.AttachResponse, "points")


class _Spec:
    """What Session's answer code reads of a spec."""

    kernel = "(attached worker)"


class _Worker:
    """Answers Points frames with Session's own code; the answers go out
    on the Attach stream."""

    _answer = Session._answer
    _evaluate = Session._evaluate
    _simple = Session._simple
    _split_batch = Session._split_batch
    _hold = Session._hold
    _part = Session._part

    def __init__(self, grad: Optional[GradFn], log_density: Optional[LogDensityFn], batch: Optional[BatchFn]) -> None:
        self._grad = grad
        self._log_density = log_density
        self._batch = batch
        self._spec = _Spec()
        self._held: Dict[int, Tuple[int, np.ndarray]] = {}  # the points of the latest requests (_hold)
        self._buffers = _Buffers()
        self._executor = None  # a worker evaluates its rows itself
        self._split = 1
        self.outbox: "queue.SimpleQueue[Optional[Union[pb.AttachRequest, bytes]]]" = queue.SimpleQueue()

    _evaluations_field = _frames.ATTACH_EVALUATIONS

    def _send(self, frame: bytes) -> None:
        """Sends an answer built by Session._answer (wire bytes of an
        AttachRequest; see _frames)."""
        self.outbox.put(frame)

    def stop(self, reason: str) -> None:
        """The caller's function failed: the worker leaves (its rows go to
        other workers) and work() re-raises the error."""
        self.outbox.put(None)


def work(
    channel_or_target: Union[grpc.Channel, str],
    session_id: str,
    token: str,
    grad: Optional[GradFn] = None,
    log_density: Optional[LogDensityFn] = None,
    *,
    batch: Optional[BatchFn] = None,
    name: Optional[str] = None,
    timeout: Optional[float] = None,
) -> None:
    """Serves a running session as one of its evaluators until it ends.

    ``session_id`` and ``token`` are the session's (``Registered.session_id``
    and ``Registered.resume_token``, which the owner receives); ``grad`` (with
    ``log_density`` when needed) or ``batch`` are the same functions a
    :class:`Session` takes. The server shares each request's rows among
    the session's evaluators by their measured speed, and gives the rows of
    a worker that leaves to others, so workers may start and stop at any
    time and the draws do not depend on them. ``name`` is shown in the
    session's progress reports (default: the host name).

    Returns when the session ends. Raises the caller's function's error
    (the worker leaves first), or :class:`SessionError` for a server
    status (NOT_FOUND: no such running session; PERMISSION_DENIED: a wrong
    token).
    """
    if (grad is None) == (batch is None):
        raise TypeError("sluice_client: give either grad (with log_density if needed) or batch")
    w = _Worker(grad, log_density, batch)
    _alloc.keep_frame_pages()
    own = isinstance(channel_or_target, str)
    channel = connect(channel_or_target, DEFAULT_MAX_MESSAGE_BYTES) if own else channel_or_target
    assert isinstance(channel, grpc.Channel)
    w.outbox.put(pb.AttachRequest(attach=pb.Attach(session_id=session_id, token=token, name=name or socket.gethostname())))
    rpc = channel.stream_stream(
        ATTACH_METHOD,
        request_serializer=_frames.serializer(pb.AttachRequest),
        response_deserializer=_read_attach_response,
    )
    call = rpc(iter(w.outbox.get, None), timeout=timeout)
    try:
        for kind, p in call:
            if kind != "points":
                continue
            w._hold(p)
            err = w._answer(p)
            if err is not None:
                call.cancel()
                raise err
    except grpc.RpcError as err:
        raise SessionError.from_rpc_error(err, None) from None
    finally:
        w.outbox.put(None)
        if own:
            channel.close()


def work_from_env(
    grad: Optional[GradFn] = None,
    log_density: Optional[LogDensityFn] = None,
    *,
    batch: Optional[BatchFn] = None,
    channel_factory: Optional[Callable[[str], grpc.Channel]] = None,
) -> None:
    """:func:`work` for a worker started by a batch system: the server is
    ``$SLUICE_TARGET``, the session ``$SLUICE_SESSION_ID`` with the token
    ``$SLUICE_TOKEN`` (or the contents of the file ``$SLUICE_TOKEN_FILE``),
    and the worker is named ``worker-$SLUICE_WORKER_INDEX@host``. With
    ``$SLUICE_CA_FILE`` set the channel uses TLS with those authorities;
    otherwise it is plain text (:func:`connect`). ``channel_factory``, when
    given, builds the channel from the target instead.
    """
    target, session_id = os.environ.get(ENV_TARGET, ""), os.environ.get(ENV_SESSION_ID, "")
    if not target or not session_id:
        raise ValueError(f"sluice_client: {ENV_TARGET} and {ENV_SESSION_ID} must be set")
    token = os.environ.get(ENV_TOKEN, "")
    if not token and os.environ.get(ENV_TOKEN_FILE):
        with open(os.environ[ENV_TOKEN_FILE], encoding="utf-8") as f:
            token = f.read().strip()
    if not token:
        raise ValueError(f"sluice_client: {ENV_TOKEN} (or {ENV_TOKEN_FILE}) must be set")
    host = socket.gethostname()
    index = os.environ.get(ENV_WORKER_INDEX, "")
    name = f"worker-{index}@{host}" if index else f"worker@{host}"
    opts = [
        ("grpc.max_send_message_length", DEFAULT_MAX_MESSAGE_BYTES),
        ("grpc.max_receive_message_length", DEFAULT_MAX_MESSAGE_BYTES),
    ]
    if channel_factory is not None:
        channel = channel_factory(target)
    elif os.environ.get(ENV_CA_FILE):
        with open(os.environ[ENV_CA_FILE], "rb") as f:
            creds = grpc.ssl_channel_credentials(root_certificates=f.read())
        channel = grpc.secure_channel(target, creds, options=opts)
    else:
        channel = connect(target, DEFAULT_MAX_MESSAGE_BYTES)
    try:
        work(channel, session_id, token, grad, log_density, batch=batch, name=name)
    finally:
        channel.close()
