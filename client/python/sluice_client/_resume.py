"""Resuming after a broken stream: which errors are worth it, and the
bounded exponential backoff between tries."""

from __future__ import annotations

import time
from dataclasses import dataclass

import grpc


@dataclass(frozen=True)
class ResumePolicy:
    """How a Session or a Follower resumes after its stream broke (status
    UNAVAILABLE: the server was killed, restarts or shuts down having
    checkpointed the session; or a reset stream): up to ``attempts`` tries
    in a row (0: never), waiting ``first``, 2 x ``first``, 4 x ``first``, ...
    seconds but never more than ``max_wait`` between two. A try that gets
    the session back resets the count."""

    attempts: int = 10
    first: float = 0.1
    max_wait: float = 5.0

    def wait(self, n: int) -> None:
        """Sleeps before try n (0-based)."""
        time.sleep(min(self.max_wait, self.first * (2 ** min(n, 30))))


def resumable(err: grpc.RpcError) -> bool:
    """Whether a call's error is a broken stream worth resuming after."""
    code = err.code() if hasattr(err, "code") else None
    if code == grpc.StatusCode.UNAVAILABLE:
        return True
    if code in (grpc.StatusCode.INTERNAL, grpc.StatusCode.UNKNOWN):
        details = (err.details() if hasattr(err, "details") else "") or ""
        return "RST_STREAM" in details or "stream reset" in details or "connection reset" in details.lower()
    return False
