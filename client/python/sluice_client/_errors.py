"""Exceptions of the Python client, and the decoding of a failed session's
status detail."""

from __future__ import annotations

from typing import Optional, Sequence, Tuple

import grpc
from google.protobuf.message import DecodeError

from ._proto import sluice_client_rpc_pb2 as rpc
from ._types import Summary

#: Trailing-metadata key under which gRPC servers send the rich status
#: (a serialised status message with typed details).
STATUS_DETAILS_KEY = "grpc-status-details-bin"

#: Full name of the bad-request detail type; an Any's type URL ends in
#: "/" followed by it.
BAD_REQUEST_TYPE = "google.rpc.BadRequest"


class SluiceError(Exception):
    """Base class of the client's own exceptions."""


class SessionError(SluiceError):
    """The server ended the session (or a Follow or Plan call) with an error
    status.

    ``code`` is the gRPC status code (for bad input
    ``grpc.StatusCode.INVALID_ARGUMENT``, for an oversize message
    ``RESOURCE_EXHAUSTED``; Follow also gives ``OUT_OF_RANGE`` and
    ``NOT_FOUND``), ``message`` the status message, ``field`` and
    ``description`` the first field violation of the status's bad-request
    detail ("" when there is none), ``violations`` every (field,
    description) pair. ``summary`` is the summary the server sent before the
    error (a Finished frame with reason FAILED), or None. ``received`` (a
    session's error only; else the same as ``summary``) is what the client
    received before the error: the server's summary when there is one, else
    a Summary with reason UNSPECIFIED holding the draws and the last
    progress that arrived.
    """

    def __init__(
        self,
        code: grpc.StatusCode,
        message: str,
        violations: Sequence[Tuple[str, str]] = (),
        summary: Optional[Summary] = None,
        call: str = "session",
    ) -> None:
        self.code = code
        self.message = message
        self.violations = tuple(violations)
        self.field = self.violations[0][0] if self.violations else ""
        self.description = self.violations[0][1] if self.violations else ""
        self.summary = summary
        self.received: Optional[Summary] = summary
        super().__init__(f"sluice {call} failed: {code.name}: {message}")

    @classmethod
    def from_rpc_error(
        cls, err: grpc.RpcError, summary: Optional[Summary] = None, call: str = "session"
    ) -> "SessionError":
        """Builds a SessionError from the error a gRPC call raised (which is
        also a grpc.Call: code, details, trailing metadata); ``call`` names
        the rpc in the exception's text ("session", "follow", "plan")."""
        code = err.code() if hasattr(err, "code") else grpc.StatusCode.UNKNOWN
        message = err.details() if hasattr(err, "details") else str(err)
        trailing = err.trailing_metadata() if hasattr(err, "trailing_metadata") else None
        return cls(code or grpc.StatusCode.UNKNOWN, message or "", field_violations(trailing), summary, call)


class ProtocolError(SluiceError):
    """The server's frames broke the wire protocol (a malformed frame, or the
    stream ended without a Finished frame)."""


class DrawsLostError(ProtocolError):
    """The draws' sequence numbers showed a gap or a repeat: a fault between
    server and client. ``expected`` and ``got`` are the sequence numbers."""

    def __init__(self, expected: int, got: int) -> None:
        self.expected = expected
        self.got = got
        super().__init__(f"sluice_client: draws lost or repeated: got sequence {got}, expected {expected}")


def field_violations(trailing_metadata: Optional[Sequence[Tuple[str, object]]]) -> Tuple[Tuple[str, str], ...]:
    """Returns the (field, description) pairs of every bad-request detail in
    a call's trailing metadata; () when there is none or it cannot be
    decoded (the status code and message are still reported)."""
    for key, value in trailing_metadata or ():
        if key != STATUS_DETAILS_KEY or not isinstance(value, (bytes, bytearray)):
            continue
        status = rpc.Status()
        try:
            status.ParseFromString(bytes(value))
        except DecodeError:  # a malformed detail must not hide the status itself
            return ()
        out = []
        for detail in status.details:
            if detail.type_url.rsplit("/", 1)[-1] != BAD_REQUEST_TYPE:
                continue
            bad = rpc.BadRequest()
            try:
                bad.ParseFromString(detail.value)
            except DecodeError:
                continue
            out.extend((v.field, v.description) for v in bad.field_violations)
        return tuple(out)
    return ()
