"""Tests of batches spread over a concurrent.futures.Executor (the
``executor=`` and ``split=`` arguments of run and Session).

The reference is the same session without an executor: with a
deterministic callback the bytes the client sends, and so the server's
draws for a fixed seed, must be identical (sluice.proto, Register.seed:
the same seed and the same answers give the same draws). The scripted
tests compare the Evaluations frames byte for byte; the live tests need a
running `sluice serve` whose address is in SLUICE_TARGET (python_test.go
starts one) and compare the draws of whole sessions, with a process pool
of the standard library, a local Dask cluster, and mpi4py's MPI pool.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
import shutil
import subprocess
import sys
import threading
import unittest
from typing import Callable, Iterator, List, Optional, Tuple

import numpy as np

import executor_models as em
import sluice_client as sc
from sluice_client._parallel import block_bounds
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb
from test_batch_follow_plan import _points
from test_sluice_client import _FINISHED, _REGISTERED, DEADLINE_SECONDS, _ScriptedChannel, require_target

HERE = os.path.dirname(os.path.abspath(__file__))


def process_pool(workers: int = 2) -> cf.ProcessPoolExecutor:
    """A process pool whose workers come from a fork server started before
    any gRPC channel exists (forking a process with gRPC threads running
    is not safe), warmed up so that its start-up is not in a session."""
    pool = cf.ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("forkserver"))
    list(pool.map(abs, range(workers)))
    return pool


def sent(ch: _ScriptedChannel) -> List[bytes]:
    assert ch.call is not None
    return [m.SerializeToString() for m in ch.call.sent[1:]]


X = np.array([[0.5, -1.0, 2.0, 0.25], [1.5, 0.0, -0.5, 3.0], [-2.0, 1.0, 0.75, -1.25],
              [0.1, 0.2, 0.3, 0.4], [-0.6, 2.5, -1.5, 0.0]])
V = np.array([[1.0, 0.0, 0.0, 2.0], [0.0, 1.0, -1.0, 0.0], [0.5, 0.5, 0.5, 0.5],
              [3.0, -2.0, 1.0, 0.0], [0.0, 0.0, 0.0, 1.0]])


def script() -> List[pb.SessionResponse]:
    """Frames asking, between them, for every quantity."""
    return [
        _REGISTERED,
        _points(X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_HESSIAN]),
        _points(X, [pb.QUANTITY_HESSIAN_VECTOR], vectors=V),
        _points(X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_LOG_DENSITY], replicates=3, groups=(1, 1, 2, 2, -1)),
        _points(X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_LOG_DENSITY]),
        _FINISHED,
    ]


def spec4() -> sc.Spec:
    return sc.Spec(dim=4, chains=5, start=np.zeros(4), step=0.1)


class BlockBoundsTests(unittest.TestCase):
    def test_blocks_cover_rows_in_order(self) -> None:
        # Contiguous, in order, sizes differing by at most one (as
        # numpy.array_split cuts an array into that many parts).
        for rows in (1, 2, 5, 64, 67):
            for split in (1, 2, 3, 8, 100):
                got = block_bounds(rows, split)
                want = [(int(p[0]), int(p[-1]) + 1) for p in np.array_split(np.arange(rows), min(split, rows))]
                self.assertEqual(got, want, (rows, split))


class ScriptedExecutorTests(unittest.TestCase):
    """Every quantity split over an executor gives the bytes of the whole
    frame evaluated at once."""

    @classmethod
    def setUpClass(cls) -> None:
        cls.pool = process_pool(2)

    @classmethod
    def tearDownClass(cls) -> None:
        cls.pool.shutdown()

    def reference(self, **kw: object) -> List[bytes]:
        ch = _ScriptedChannel(script())
        sc.run(ch, spec4(), **kw)  # type: ignore[arg-type]
        return sent(ch)

    def test_batch_quantities_identical_bytes(self) -> None:
        want = self.reference(batch=em.answer)
        self.assertEqual(len(want), 4)
        with cf.ThreadPoolExecutor(3) as threads:
            for ex, split in ((threads, 1), (threads, 3), (threads, 5), (self.pool, 1), (self.pool, 2), (self.pool, 3),
                              (self.pool, 9)):
                ch = _ScriptedChannel(script())
                sc.run(ch, spec4(), batch=em.answer, executor=ex, split=split)  # type: ignore[arg-type]
                self.assertEqual(sent(ch), want, (type(ex).__name__, split))

    def test_grad_and_log_density_identical_bytes(self) -> None:
        frames = [_REGISTERED, _points(X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_LOG_DENSITY]),
                  _points(X, [pb.QUANTITY_GRADIENT]), _FINISHED]
        ch = _ScriptedChannel(frames)
        sc.run(ch, spec4(), em.grad, em.log_density)  # type: ignore[arg-type]
        want = sent(ch)
        ch = _ScriptedChannel(frames)
        sc.run(ch, spec4(), em.readonly_grad, em.log_density, executor=self.pool, split=3)  # type: ignore[arg-type]
        self.assertEqual(sent(ch), want)
        # The values against the closed form, row by row.
        ev = pb.SessionRequest.FromString(want[0]).evaluations
        np.testing.assert_array_equal(sc.from_wire(ev.gradients, 5, 4), em.grad(X))

    def test_blocks_see_their_rows(self) -> None:
        # 5 rows in 3 blocks: rows 0-1, 2-3, 4; each block's Batch has its
        # own first_row, row count, chains and minibatch groups.
        frames = [_REGISTERED, _points(X, [pb.QUANTITY_GRADIENT], groups=(7, 7, 8, 8, -1)), _FINISHED]
        ch = _ScriptedChannel(frames)
        sc.run(ch, spec4(), batch=em.describe, executor=self.pool, split=3)  # type: ignore[arg-type]
        ev = pb.SessionRequest.FromString(sent(ch)[0]).evaluations
        g = sc.from_wire(ev.gradients, 5, 4)
        np.testing.assert_array_equal(g[:, 0], [0, 0, 2, 2, 4])
        np.testing.assert_array_equal(g[:, 1], [2, 2, 2, 2, 1])
        np.testing.assert_array_equal(g[:, 2], [0, 1, 2, 3, 4])
        np.testing.assert_array_equal(g[:, 3], [7, 7, 8, 8, -1])

    def test_worker_error_stops_with_rows_named(self) -> None:
        frames = [_REGISTERED, _points(X, [pb.QUANTITY_GRADIENT]), _FINISHED]
        frames[1].points.request_id = em.FAIL_AT_REQUEST
        ch = _ScriptedChannel(frames)
        with self.assertRaises(em.ModelFailure) as ctx:
            sc.run(ch, spec4(), batch=em.failing_answer, executor=self.pool, split=2)  # type: ignore[arg-type]
        notes = "\n".join(getattr(ctx.exception, "__notes__", []))
        self.assertIn(f"rows 3..4 of request {em.FAIL_AT_REQUEST} on the executor", notes)
        (stop,) = ch.call.sent[1:]  # type: ignore[union-attr]
        self.assertEqual(stop.WhichOneof("frame"), "stop")
        self.assertIn("solver diverged", stop.stop.reason)

    def test_wrong_block_shape_is_caught(self) -> None:
        frames = [_REGISTERED, _points(X, [pb.QUANTITY_GRADIENT]), _FINISHED]
        ch = _ScriptedChannel(frames)
        with cf.ThreadPoolExecutor(2) as threads, self.assertRaisesRegex(
            ValueError, r"grad returned an array of shape \(3, 3\); want \(rows, dim\) = \(3, 4\)"
        ):
            sc.run(ch, spec4(), lambda x: -x[:, :3], executor=threads, split=2)  # type: ignore[arg-type]

    def test_unpicklable_callback_is_refused_before_sending(self) -> None:
        with self.assertRaisesRegex(TypeError, "process pool needs a picklable callback"):
            sc.Session("127.0.0.1:1", spec4(), lambda x: -x, executor=self.pool)
        with self.assertRaisesRegex(ValueError, "split must be an integer >= 1"):
            sc.Session("127.0.0.1:1", spec4(), em.grad, executor=self.pool, split=0)
        with self.assertRaisesRegex(TypeError, "split goes with executor"):
            sc.Session("127.0.0.1:1", spec4(), em.grad, split=2)


def live_sessions(executor: Optional[cf.Executor], split: Optional[int] = None) -> List[Tuple[np.ndarray, np.ndarray]]:
    """Three short sessions on the live server (kernels lmc with grad,
    mala with grad and log_density, ozaki with batch and Hessians); returns
    each one's (draws, chains)."""
    target = require_target()
    out = []
    runs = [
        (dict(kernel="lmc", step=0.2), dict(grad=em.grad)),
        (dict(kernel="mala", step=0.3), dict(grad=em.grad, log_density=em.log_density)),
        (dict(kernel="ozaki", step=0.5), dict(batch=em.answer)),
    ]
    for spec_kw, fn_kw in runs:
        spec = sc.Spec(dim=4, chains=6, start=np.full(4, 0.5), burn_in=20, draws_per_chain=40, seed=321,
                       **spec_kw)  # type: ignore[arg-type]
        s = sc.run(target, spec, executor=executor, split=split, timeout=DEADLINE_SECONDS,
                   **fn_kw)  # type: ignore[arg-type]
        # Short runs may end CHECK_FAILED (the verdict finds too few
        # effective draws): every draw is still delivered, which is what
        # this test compares.
        if s.reason not in (sc.FinishReason.DRAWS_COLLECTED, sc.FinishReason.CHECK_FAILED):
            raise AssertionError(f"{spec_kw}: {s.reason} {s.message}")
        assert s.draws is not None and s.draw_chains is not None
        out.append((s.draws, s.draw_chains))
    return out


class LiveExecutorTests(unittest.TestCase):
    def check_identical(self, executor: cf.Executor, split: Optional[int] = None) -> None:
        want = live_sessions(None)
        got = live_sessions(executor, split)
        for (wd, wc), (gd, gc), kernel in zip(want, got, ("lmc", "mala", "ozaki")):
            self.assertEqual(wd.shape, (6 * 40, 4), kernel)
            np.testing.assert_array_equal(gc, wc, kernel)
            np.testing.assert_array_equal(gd, wd, kernel)  # bit for bit

    def test_process_pool_gives_identical_draws(self) -> None:
        pool = process_pool(2)
        try:
            self.check_identical(pool, 3)
        finally:
            pool.shutdown()

    def test_process_pool_worker_error_ends_session(self) -> None:
        pool = process_pool(2)
        try:
            # One request of every chain at a time (chain_groups=1), so that
            # split=2 cuts each into rows 0..2 and 3..5.
            spec = sc.Spec(dim=4, chains=6, start=np.zeros(4), step=0.2, draws_per_chain=100, seed=5, chain_groups=1)
            session = sc.Session(require_target(), spec, batch=em.failing_answer, executor=pool, split=2,
                                 timeout=DEADLINE_SECONDS)
            with self.assertRaises(em.ModelFailure) as ctx:
                for _ in session:
                    pass
        finally:
            pool.shutdown()
        self.assertIn("rows 3..5 of request", "\n".join(getattr(ctx.exception, "__notes__", [])))
        # The client sent Stop and read the stream to its end: the server's
        # summary arrived, reason STOPPED, fewer evaluations than planned.
        assert session.summary is not None
        self.assertEqual(session.summary.reason, sc.FinishReason.STOPPED)
        self.assertLess(session.summary.progress.evaluations_used, 100 * 6)
        self.assertEqual(session.draws_received, session.summary.progress.evaluations_used)

    def test_dask_local_cluster_gives_identical_draws(self) -> None:
        import distributed

        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                      dashboard_address=None) as cluster, distributed.Client(cluster) as client:
            # The workers import executor_models by name, like the test.
            client.run(sys.path.insert, 0, HERE)
            self.check_identical(client.get_executor(), 2)


def mpi_launcher() -> Optional[str]:
    return shutil.which("mpiexec")


class MPIExecutorTests(unittest.TestCase):
    def test_mpi_pool_gives_identical_draws(self) -> None:
        launcher = mpi_launcher()
        if launcher is None:
            self.fail("mpiexec not found (apt-get install --no-install-recommends openmpi-bin python3-mpi4py)")
        env = dict(os.environ, PYTHONPATH=os.pathsep.join([HERE, os.environ.get("PYTHONPATH", "")]),
                   OMPI_MCA_btl="self,vader", OMPI_MCA_plm="isolated", OMPI_ALLOW_RUN_AS_ROOT="1",
                   OMPI_ALLOW_RUN_AS_ROOT_CONFIRM="1", OMPI_MCA_btl_vader_single_copy_mechanism="none",
                   OMPI_MCA_rmaps_base_oversubscribe="1")
        out = subprocess.run(
            [launcher, "-n", "3", sys.executable, "-m", "mpi4py.futures", os.path.join(HERE, "mpi_identical.py")],
            env=env, capture_output=True, text=True, timeout=600,
        )
        self.assertEqual(out.returncode, 0, out.stdout + out.stderr)
        self.assertIn("mpi: identical draws", out.stdout, out.stdout + out.stderr)


if __name__ == "__main__":
    unittest.main()


class _PipelinedCall:
    """Stands in for a gRPC stream whose server has several requests out
    at once (pipelined chain groups, Register.chain_groups): it plays
    every frame without waiting for answers, and collects the client's
    answers (one per Points frame, in the order the client sends them, or
    up to its Stop) before the Finished frame."""

    def __init__(self, requests: Iterator[object], script: List[pb.SessionResponse], serialize: Callable[[object], bytes],
                 deserialize: Callable[[bytes], object]) -> None:
        self._requests = requests
        self._script = script
        self._serialize = serialize
        self._deserialize = deserialize
        self.sent: List[pb.SessionRequest] = []

    def _next(self) -> pb.SessionRequest:
        return pb.SessionRequest.FromString(self._serialize(next(self._requests)))

    def __iter__(self) -> Iterator[pb.SessionResponse]:
        self.sent.append(self._next())
        out = 0
        for frame in self._script:
            kind = frame.WhichOneof("frame")
            if kind == "finished":
                # Every answer, or up to the client's Stop.
                while out > 0:
                    m = self._next()
                    self.sent.append(m)
                    if m.WhichOneof("frame") == "stop":
                        break
                    out -= 1
                out = 0
            yield self._deserialize(frame.SerializeToString())  # as gRPC hands frames over
            if kind == "points":
                out += 1

    def cancel(self) -> bool:
        return True


class _PipelinedChannel(_ScriptedChannel):
    def stream_stream(self, method: str, request_serializer: Callable[[object], bytes],
                      response_deserializer: Callable[[bytes], object]) -> object:
        def start(requests: Iterator[object], timeout: Optional[float] = None) -> _PipelinedCall:
            self.call = _PipelinedCall(requests, self.script, request_serializer,  # type: ignore[assignment]
                                       response_deserializer)
            return self.call  # type: ignore[return-value]

        return start


def two_groups() -> List[pb.SessionResponse]:
    """Two requests out at once: chains 0-1 (request 1) and 2-4 (request 2)."""
    frames = [_REGISTERED, _points(X[:2], [pb.QUANTITY_GRADIENT]), _points(X[2:], [pb.QUANTITY_GRADIENT]), _FINISHED]
    frames[1].points.request_id, frames[2].points.request_id = 1, 2
    frames[2].points.chains[:] = [2, 3, 4]
    return frames


class FrameOverlapTests(unittest.TestCase):
    """With an executor the session evaluates the requests of pipelined
    chain groups at the same time, and sends the answers in the order of
    their frames, the bytes of the same frames answered one at a time."""

    def reference(self) -> List[bytes]:
        ch = _PipelinedChannel(two_groups())
        sc.run(ch, spec4(), em.grad)  # type: ignore[arg-type]
        return sent(ch)

    def test_two_frames_in_evaluation_at_once(self) -> None:
        want = self.reference()
        self.assertEqual([pb.SessionRequest.FromString(m).evaluations.request_id for m in want], [1, 2])
        # Each call waits at a barrier for the other: the session passes
        # only if both frames are being evaluated at the same time (a
        # session that answers one frame at a time breaks the barrier
        # after its timeout, which raises).
        meet = threading.Barrier(2, timeout=60)

        def grad(x: np.ndarray) -> np.ndarray:
            meet.wait()
            return em.grad(x)

        ch = _PipelinedChannel(two_groups())
        with cf.ThreadPoolExecutor(2) as threads:
            sc.run(ch, spec4(), grad, executor=threads, split=1)  # type: ignore[arg-type]
        self.assertEqual(sent(ch), want)

    def test_answers_go_in_frame_order(self) -> None:
        want = self.reference()
        # The first frame's evaluation ends only after the second's has
        # returned: its answer is still sent first.
        second_done = threading.Event()

        def grad(x: np.ndarray) -> np.ndarray:
            if x.shape[0] == 2:
                if not second_done.wait(60):
                    raise AssertionError("the second frame was not evaluated while the first waited")
                return em.grad(x)
            g = em.grad(x)
            second_done.set()
            return g

        ch = _PipelinedChannel(two_groups())
        with cf.ThreadPoolExecutor(2) as threads:
            sc.run(ch, spec4(), grad, executor=threads, split=1)  # type: ignore[arg-type]
        self.assertEqual(sent(ch), want)

    def test_error_in_one_frame_stops_and_raises(self) -> None:
        def grad(x: np.ndarray) -> np.ndarray:
            if x.shape[0] == 3:
                raise em.ModelFailure("solver diverged")
            return em.grad(x)

        ch = _PipelinedChannel(two_groups())
        with cf.ThreadPoolExecutor(2) as threads, self.assertRaises(em.ModelFailure):
            sc.run(ch, spec4(), grad, executor=threads, split=1)  # type: ignore[arg-type]
        kinds = [m.WhichOneof("frame") for m in ch.call.sent[1:]]  # type: ignore[union-attr]
        self.assertIn("stop", kinds)

    def test_live_two_groups_identical_draws(self) -> None:
        # The live server with two chain groups: the draws with frames
        # evaluated at the same time on a thread pool equal those of the
        # session answering one frame at a time, bit for bit.
        target = require_target()

        def session(executor: Optional[cf.Executor]) -> Tuple[np.ndarray, np.ndarray]:
            spec = sc.Spec(dim=4, chains=6, start=np.full(4, 0.5), step=0.2, burn_in=10, draws_per_chain=60,
                           seed=99, chain_groups=2)
            kw = {} if executor is None else {"executor": executor, "split": 1}
            s = sc.run(target, spec, em.grad, timeout=DEADLINE_SECONDS, **kw)  # type: ignore[arg-type]
            if s.reason not in (sc.FinishReason.DRAWS_COLLECTED, sc.FinishReason.CHECK_FAILED):
                raise AssertionError(f"{s.reason} {s.message}")
            assert s.draws is not None and s.draw_chains is not None
            return s.draws, s.draw_chains

        wd, wc = session(None)
        with cf.ThreadPoolExecutor(2) as threads:
            gd, gc = session(threads)
        self.assertEqual(wd.shape, (6 * 60, 4))
        np.testing.assert_array_equal(gc, wc)
        np.testing.assert_array_equal(gd, wd)  # bit for bit
