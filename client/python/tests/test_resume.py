"""Resuming after a broken stream, against scripted calls: the second call
of a Session must start with Resume (the session's id, token and the next
draw needed; sluice.proto, message Resume), and iteration sees every draw
once; a Follower follows again from next_seq. No server needed."""

from __future__ import annotations

import unittest
from typing import Callable, Iterator, List, Optional, Union

import grpc
import numpy as np

import sluice_client as sc
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb

FAST = sc.ResumePolicy(attempts=3, first=0.001, max_wait=0.01)


class _Broken(grpc.RpcError):
    """A call's error as grpc raises it: code() and details()."""

    def __init__(self, code: grpc.StatusCode, details: str) -> None:
        super().__init__(details)
        self._code, self._details = code, details

    def code(self) -> grpc.StatusCode:
        return self._code

    def details(self) -> str:
        return self._details

    def trailing_metadata(self) -> tuple:
        return ()


Step = Union[pb.SessionResponse, pb.FollowResponse, _Broken]


class _Call:
    def __init__(self, first: object, script: List[Step], deserialize: Callable[[bytes], object]) -> None:
        self.first = first
        self._script = script
        self._deserialize = deserialize

    def __iter__(self) -> Iterator[object]:
        for s in self._script:
            if isinstance(s, _Broken):
                raise s
            yield self._deserialize(s.SerializeToString())  # as gRPC hands frames over

    def cancel(self) -> bool:
        return True


class _Channel:
    """Plays one script per call and records each call's first request."""

    def __init__(self, scripts: List[List[Step]]) -> None:
        self.scripts = scripts
        self.firsts: List[object] = []

    def stream_stream(self, method: str, request_serializer: object, response_deserializer: Callable[[bytes], object]) -> object:
        def start(requests: Iterator[pb.SessionRequest], timeout: Optional[float] = None) -> _Call:
            first = next(requests)
            self.firsts.append(first)
            return _Call(first, self.scripts[len(self.firsts) - 1], response_deserializer)

        return start

    def unary_stream(self, method: str, request_serializer: object, response_deserializer: Callable[[bytes], object]) -> object:
        def start(request: pb.FollowRequest, timeout: Optional[float] = None) -> _Call:
            self.firsts.append(request)
            return _Call(request, self.scripts[len(self.firsts) - 1], response_deserializer)

        return start


def _draws(seq: int, rows: int) -> pb.Draws:
    return pb.Draws(
        seq=seq,
        rows=rows,
        dim=1,
        values=sc.to_wire(np.arange(seq, seq + rows, dtype=np.float64).reshape(rows, 1)),
        chains=[0] * rows,
        iterations=list(range(seq + 1, seq + rows + 1)),
    )


def _registered(resumed: bool) -> pb.SessionResponse:
    return pb.SessionResponse(
        registered=pb.Registered(session_id="s1", resume_token="t1", seed=1, kernel="lmc", step=0.1, resumed=resumed)
    )


_FINISHED = pb.Finished(reason=pb.FINISH_REASON_DRAWS_COLLECTED)


class ResumeTests(unittest.TestCase):
    def test_session_resumes_after_unavailable(self) -> None:
        ch = _Channel(
            [
                [_registered(False), pb.SessionResponse(draws=_draws(0, 2)), _Broken(grpc.StatusCode.UNAVAILABLE, "gone")],
                [_registered(True), pb.SessionResponse(draws=_draws(2, 1)), pb.SessionResponse(finished=_FINISHED)],
            ]
        )
        regs: List[sc.Registered] = []
        got: List[sc.Draws] = []
        spec = sc.Spec(dim=1, chains=1, start=[0.0], step=0.1)
        s = sc.Session(ch, spec, lambda x: -x, on_registered=regs.append, resume=FAST)  # type: ignore[arg-type]
        with s:
            for ev in s:
                if isinstance(ev, sc.Draws):
                    got.append(ev)
        self.assertEqual(len(ch.firsts), 2)
        first, second = ch.firsts
        assert isinstance(first, pb.SessionRequest) and isinstance(second, pb.SessionRequest)
        self.assertEqual(first.WhichOneof("frame"), "register")
        self.assertEqual(second.WhichOneof("frame"), "resume")
        self.assertEqual((second.resume.session_id, second.resume.token, second.resume.next_seq), ("s1", "t1", 2))
        self.assertEqual([d.seq for d in got], [0, 2])
        self.assertEqual(len(regs), 1)
        self.assertEqual(s.resumes, 1)
        assert s.summary is not None and s.registered is not None
        self.assertEqual(s.summary.draws_received, 3)
        self.assertTrue(s.registered.resumed)

    def test_other_errors_and_exhausted_attempts_raise(self) -> None:
        spec = sc.Spec(dim=1, chains=1, start=[0.0], step=0.1)
        bad = _Channel([[_registered(False), _Broken(grpc.StatusCode.INVALID_ARGUMENT, "bad")]])
        with self.assertRaises(sc.SessionError) as cm:
            sc.run(bad, spec, lambda x: -x, resume=FAST)  # type: ignore[arg-type]
        self.assertEqual(cm.exception.code, grpc.StatusCode.INVALID_ARGUMENT)
        gone = [[_registered(False), _Broken(grpc.StatusCode.UNAVAILABLE, "gone")]] + [
            [_Broken(grpc.StatusCode.UNAVAILABLE, "still gone")] for _ in range(3)
        ]
        ch = _Channel(gone)
        with self.assertRaises(sc.SessionError) as cm:
            sc.run(ch, spec, lambda x: -x, resume=FAST)  # type: ignore[arg-type]
        self.assertEqual(cm.exception.code, grpc.StatusCode.UNAVAILABLE)
        self.assertEqual(len(ch.firsts), 4)  # the first call and 3 attempts

    def test_follower_follows_again_from_next_seq(self) -> None:
        ch = _Channel(
            [
                [pb.FollowResponse(draws=_draws(0, 2)), _Broken(grpc.StatusCode.UNAVAILABLE, "suspended")],
                [pb.FollowResponse(draws=_draws(2, 2)), pb.FollowResponse(finished=_FINISHED)],
            ]
        )
        f = sc.follow(ch, "s1", "t1", resume=FAST)  # type: ignore[arg-type]
        events = list(f)
        self.assertEqual([e.seq for e in events if isinstance(e, sc.Draws)], [0, 2])
        self.assertIsInstance(events[-1], sc.Summary)
        reqs = [r for r in ch.firsts if isinstance(r, pb.FollowRequest)]
        self.assertEqual([(r.session_id, r.token, r.from_seq) for r in reqs], [("s1", "t1", 0), ("s1", "t1", 2)])
        self.assertEqual(f.resumes, 1)


if __name__ == "__main__":
    unittest.main()
