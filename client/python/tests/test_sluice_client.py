"""Tests of the Python client.

LiveServerTests need a running `sluice serve` whose address is in the
SLUICE_TARGET environment variable; client/python/python_test.go builds
the server, starts it on loopback, sets the variable and runs this file
(`go test ./client/python/`). Without the variable they fail rather than
skip. The other tests drive the client with scripted frames and need no
server.
"""

from __future__ import annotations

import os
import socket
import struct
import threading
import unittest
from typing import Callable, Iterator, List, Optional

import grpc
import numpy as np

import sluice_client as sc
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb

TARGET = os.environ.get("SLUICE_TARGET", "")

#: Bounded waits: every session in these tests has this gRPC deadline.
DEADLINE_SECONDS = 60.0

#: Two-sided z threshold for the statistical checks below: 9 checks at
#: |z| < 4.5 have a family-wise false-alarm rate below 9 * 6.8e-6 = 6.1e-5
#: when the draws follow the reference law (normal tail; Bonferroni).
Z_MAX = 4.5


def batch_means(series: np.ndarray, batch: int) -> "tuple[float, float]":
    """Mean of a (chains, n) array of a scalar series and its Monte Carlo
    standard error by non-overlapping batch means: each chain is cut into
    n // batch batches of `batch` consecutive values; with batches much
    longer than the integrated autocorrelation time the batch means are
    nearly independent with a common variance, so the MCSE of their mean is
    their standard deviation over the square root of their number (batch
    means, common practice)."""
    chains, n = series.shape
    k = n // batch
    means = series[:, : k * batch].reshape(chains, k, batch).mean(axis=2).ravel()
    return float(means.mean()), float(means.std(ddof=1) / np.sqrt(means.size))


def require_target() -> str:
    if not TARGET:
        raise RuntimeError(
            "SLUICE_TARGET is not set: these tests need a running sluice server; "
            "run them with `go test ./client/python/`, which starts one"
        )
    return TARGET


class WireArrayTests(unittest.TestCase):
    """The array convention of proto/sluice/v1/sluice.proto: little-endian
    float64, row-major, element (r, c) at byte offset 8*(r*C + c). Checked
    against the standard library's struct packing."""

    def test_to_wire_is_row_major_little_endian(self) -> None:
        a = np.array([[1.5, -2.0, 3.25], [np.pi, 1e-300, -0.0]])
        want = b"".join(struct.pack("<d", a[r, c]) for r in range(2) for c in range(3))
        self.assertEqual(sc.to_wire(a), want)
        # A transposed (non-contiguous) or big-endian array is written the
        # same way.
        self.assertEqual(sc.to_wire(np.ascontiguousarray(a.T).T), want)
        self.assertEqual(sc.to_wire(a.astype(">f8")), want)

    def test_from_wire_reads_row_major(self) -> None:
        vals = [0.5, 1.0, -7.0, 2.5, 1e10, -3.0]
        b = struct.pack("<6d", *vals)
        got = sc.from_wire(b, 2, 3)
        self.assertEqual(got.shape, (2, 3))
        self.assertEqual(got[1, 0], vals[3])  # offset 8*(1*3 + 0)
        np.testing.assert_array_equal(got.ravel(), vals)

    def test_spec_start_shapes(self) -> None:
        spec = sc.Spec(dim=2, chains=3, start=[1.0, 2.0], step=0.1)
        self.assertEqual(spec.to_register().start_rows, 1)
        spec = sc.Spec(dim=2, chains=3, start=np.arange(6.0).reshape(3, 2), step=0.1)
        reg = spec.to_register()
        self.assertEqual(reg.start_rows, 3)
        np.testing.assert_array_equal(sc.from_wire(reg.start, 3, 2), np.arange(6.0).reshape(3, 2))
        with self.assertRaises(ValueError):
            sc.Spec(dim=2, chains=3, start=[1.0, 2.0, 3.0], step=0.1).to_register()


class _ScriptedCall:
    """Stands in for a gRPC stream: takes the client's Register, then plays
    server frames, collecting the client's answer after every Points frame
    (the client answers before it reads on, as the protocol asks). Each
    request goes through the client's request serializer and is parsed
    back by protobuf, as a server would read it; each frame is serialized
    by protobuf and handed to the client's response deserializer, as gRPC
    does."""

    def __init__(
        self,
        requests: Iterator[object],
        script: List[pb.SessionResponse],
        serialize: Callable[[object], bytes],
        deserialize: Callable[[bytes], object] = pb.SessionResponse.FromString,
    ) -> None:
        self._requests = requests
        self._script = script
        self._serialize = serialize
        self._deserialize = deserialize
        self.sent: List[pb.SessionRequest] = []
        self.cancelled = False

    def _next(self) -> pb.SessionRequest:
        return pb.SessionRequest.FromString(self._serialize(next(self._requests)))

    def __iter__(self) -> Iterator[pb.SessionResponse]:
        self.sent.append(self._next())
        for frame in self._script:
            yield self._deserialize(frame.SerializeToString())
            if frame.WhichOneof("frame") == "points":
                self.sent.append(self._next())

    def cancel(self) -> bool:
        self.cancelled = True
        return True


class _ScriptedChannel:
    """Has the one method of grpc.Channel that the client uses."""

    def __init__(self, script: List[pb.SessionResponse]) -> None:
        self.script = script
        self.call: Optional[_ScriptedCall] = None
        self.method = ""

    def stream_stream(
        self, method: str, request_serializer: Callable[[object], bytes], response_deserializer: Callable[[bytes], object]
    ) -> object:
        self.method = method

        def start(requests: Iterator[object], timeout: Optional[float] = None) -> _ScriptedCall:
            self.call = _ScriptedCall(requests, self.script, request_serializer, response_deserializer)
            return self.call

        return start


def _draws(seq: int, rows: int, dim: int = 2) -> pb.SessionResponse:
    return pb.SessionResponse(
        draws=pb.Draws(
            seq=seq,
            rows=rows,
            dim=dim,
            values=sc.to_wire(np.zeros((rows, dim))),
            chains=list(range(rows)),
            iterations=[1] * rows,
        )
    )


_REGISTERED = pb.SessionResponse(registered=pb.Registered(session_id="s", seed=1, kernel="lmc", step=0.1))
_FINISHED = pb.SessionResponse(finished=pb.Finished(reason=pb.FINISH_REASON_DRAWS_COLLECTED))


class ScriptedProtocolTests(unittest.TestCase):
    """The client's side of the frame rules in proto/sluice/v1/sluice.proto,
    against scripted server frames."""

    def spec(self) -> sc.Spec:
        return sc.Spec(dim=2, chains=3, start=[0.0, 0.0], step=0.1)

    def test_sequence_gap_raises_and_cancels(self) -> None:
        # Draws rows are numbered seq, seq+1, ...: after seq 0 with 2 rows the
        # next frame must start at 2 (sluice.proto, message Draws).
        ch = _ScriptedChannel([_REGISTERED, _draws(0, 2), _draws(3, 1), _FINISHED])
        got = []
        with self.assertRaises(sc.DrawsLostError) as cm:
            sc.run(ch, self.spec(), lambda x: -x, on_draws=got.append)  # type: ignore[arg-type]
        self.assertEqual((cm.exception.expected, cm.exception.got), (2, 3))
        self.assertEqual(len(got), 1)
        assert ch.call is not None
        self.assertTrue(ch.call.cancelled)
        self.assertEqual(ch.method, "/sluice.v1.SluiceService/Session")

    def test_repeated_draws_raise(self) -> None:
        ch = _ScriptedChannel([_REGISTERED, _draws(0, 2), _draws(0, 2), _FINISHED])
        with self.assertRaises(sc.DrawsLostError):
            sc.run(ch, self.spec(), lambda x: -x)  # type: ignore[arg-type]

    def test_stream_without_finished_raises(self) -> None:
        ch = _ScriptedChannel([_REGISTERED, _draws(0, 2)])
        with self.assertRaises(sc.ProtocolError):
            sc.run(ch, self.spec(), lambda x: -x)  # type: ignore[arg-type]

    def test_split_request_parts_answered_each_with_echo(self) -> None:
        # A request split over Points frames with one request_id and
        # consecutive first_rows; each part is answered on its own, echoing
        # request_id and first_row (sluice.proto, rpc Session).
        x = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])
        parts = [
            pb.SessionResponse(
                points=pb.Points(
                    request_id=7,
                    first_row=lo,
                    rows=hi - lo,
                    dim=2,
                    total_rows=3,
                    points=sc.to_wire(x[lo:hi]),
                    chains=list(range(lo, hi)),
                    quantities=[pb.QUANTITY_GRADIENT],
                )
            )
            for lo, hi in ((0, 2), (2, 3))
        ]
        ch = _ScriptedChannel([_REGISTERED, *parts, _FINISHED])
        summary = sc.run(ch, self.spec(), lambda p: -2.0 * p)  # type: ignore[arg-type]
        self.assertEqual(summary.reason, sc.FinishReason.DRAWS_COLLECTED)
        assert ch.call is not None
        sent = ch.call.sent
        self.assertEqual(sent[0].WhichOneof("frame"), "register")
        self.assertEqual([s.WhichOneof("frame") for s in sent[1:]], ["evaluations", "evaluations"])
        for s, (lo, hi) in zip(sent[1:], ((0, 2), (2, 3))):
            ev = s.evaluations
            self.assertEqual((ev.request_id, ev.first_row, ev.rows, ev.dim), (7, lo, hi - lo, 2))
            np.testing.assert_array_equal(sc.from_wire(ev.gradients, hi - lo, 2), -2.0 * x[lo:hi])
            self.assertEqual(ev.log_densities, b"")  # not asked for: must be empty


    def test_draws_by_reference_are_rebuilt(self) -> None:
        # A Draws frame may name rows of the request whose Points frames
        # came last (point_rows >= 0) and carry only the other rows in
        # values, in order (sluice.proto, message Draws); the session
        # rebuilds the full block, here from a request split over two parts.
        x = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])
        parts = [
            pb.SessionResponse(
                points=pb.Points(
                    request_id=9,
                    first_row=lo,
                    rows=hi - lo,
                    dim=2,
                    total_rows=3,
                    points=sc.to_wire(x[lo:hi]),
                    chains=list(range(lo, hi)),
                    quantities=[pb.QUANTITY_GRADIENT],
                )
            )
            for lo, hi in ((0, 2), (2, 3))
        ]
        other = np.array([[-0.0, 7.5]])

        def draws(request_id: int) -> pb.SessionResponse:
            return pb.SessionResponse(
                draws=pb.Draws(
                    seq=0,
                    rows=3,
                    dim=2,
                    values=sc.to_wire(other),
                    chains=[0, 1, 2],
                    iterations=[1, 1, 1],
                    from_request_id=request_id,
                    point_rows=[2, -1, 0],
                )
            )

        got: List[np.ndarray] = []
        ch = _ScriptedChannel([_REGISTERED, *parts, draws(9), _FINISHED])
        summary = sc.run(ch, self.spec(), lambda p: -p, on_draws=lambda d: got.append(d.values))  # type: ignore[arg-type]
        want = np.array([x[2], other[0], x[0]])
        self.assertEqual(len(got), 1)
        self.assertEqual(got[0].tobytes(), want.tobytes())  # bit for bit, -0.0 included
        self.assertFalse(got[0].flags.writeable)
        assert summary.draws is not None
        self.assertEqual(np.asarray(summary.draws).reshape(-1, 2).tobytes(), want.tobytes())
        assert ch.call is not None
        self.assertTrue(ch.call.sent[0].register.accepts_draw_references)
        self.assertTrue(ch.call.sent[0].register.draws_in_points)
        # The same draws carried in the request's last Points frame
        # (Points.draws, register.draws_in_points): handed on as if a
        # Draws frame came right after it.
        carrying = pb.SessionResponse()
        carrying.CopyFrom(parts[1])
        carrying.points.draws.CopyFrom(draws(9).draws)
        got.clear()
        ch = _ScriptedChannel([_REGISTERED, parts[0], carrying, _FINISHED])
        summary = sc.run(ch, self.spec(), lambda p: -p, on_draws=lambda d: got.append(d.values))  # type: ignore[arg-type]
        self.assertEqual(len(got), 1)
        self.assertEqual(got[0].tobytes(), want.tobytes())
        self.assertEqual(summary.draws_received, 3)
        assert ch.call is not None
        self.assertEqual(len(ch.call.sent), 3)  # register, then both parts answered
        # A reference to another request than the last one is a protocol
        # error, never silently wrong draws.
        ch = _ScriptedChannel([_REGISTERED, *parts, draws(8), _FINISHED])
        with self.assertRaises(sc.ProtocolError):
            sc.run(ch, self.spec(), lambda p: -p)  # type: ignore[arg-type]
        # full_draws=True tells the server not to send references.
        ch = _ScriptedChannel([_REGISTERED, _FINISHED])
        sc.run(ch, self.spec(), lambda p: -p, full_draws=True)  # type: ignore[arg-type]
        assert ch.call is not None
        self.assertFalse(ch.call.sent[0].register.accepts_draw_references)
        self.assertFalse(ch.call.sent[0].register.draws_in_points)


class UnreachableServerTests(unittest.TestCase):
    def test_no_server_raises_unavailable(self) -> None:
        # A loopback port that nothing listens on: the kernel picks a free
        # port, which is closed again before the client dials it.
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        spec = sc.Spec(dim=1, start=[0.0], step=0.1, draws_per_chain=1)
        with self.assertRaises(sc.SessionError) as cm:
            sc.run(f"127.0.0.1:{port}", spec, lambda x: -x, timeout=DEADLINE_SECONDS)
        self.assertEqual(cm.exception.code, grpc.StatusCode.UNAVAILABLE)
        self.assertIsNone(cm.exception.summary)


class LiveServerTests(unittest.TestCase):
    """Sessions against a real `sluice serve` on loopback."""

    target = ""

    @classmethod
    def setUpClass(cls) -> None:
        cls.target = require_target()

    def test_gaussian_draws_match_ula_stationary_law(self) -> None:
        # Target N(mu, Q^-1) with a correlated precision Q. Unadjusted
        # Langevin with step h leaves N(mu, Sigma_h) invariant, with
        # Sigma_h = [Q (I - h Q / 2)]^-1 (derived here: the Lyapunov equation of
        # the Gaussian AR(1) recursion), not Q^-1; the mean
        # is exact. Draws are compared with that closed form, entry by
        # entry, by z-scores with batch-means MCSEs.
        Q = np.array([[2.0, 0.6, 0.3], [0.6, 1.5, -0.4], [0.3, -0.4, 1.0]])
        mu = np.array([1.0, -0.5, 2.0])
        h = 0.25
        dim, chains = 3, 16
        lam = np.linalg.eigvalsh(Q)
        self.assertLess(h * lam.max(), 2.0)  # stability: |1 - h lam| < 1
        sigma_h = np.linalg.inv(Q @ (np.eye(dim) - h * Q / 2))
        # Along each eigenvector of Q the chain is AR(1) with rho = 1 - h*lam,
        # tau = (2 - h lam) / (h lam) (AR(1), derived here): 13.6 at the slowest.
        # Products of two coordinates mix products of these AR(1) terms
        # (Isserlis), whose autocorrelations rho_a^k rho_b^k decay faster, so
        # tau_max bounds every series checked here. Batches of 400 draws are
        # about 29 tau_max: their means are nearly uncorrelated and the
        # batch-means variance is within a few percent of the truth.
        rho = 1 - h * lam.min()
        tau_max = (1 + rho) / (1 - rho)
        batch = 400
        self.assertGreater(batch, 25 * tau_max)
        draws_per_chain = 4000  # 10 batches per chain, 160 in all
        # Dispersed starts; burn-in shrinks the slowest distance by
        # rho^300 < 1e-18.
        start = mu + 4.0 * np.cos(np.arange(chains * dim).reshape(chains, dim))
        burn_in = 300
        self.assertLess(rho**burn_in, 1e-18)
        spec = sc.Spec(
            dim=dim,
            chains=chains,
            start=start,
            step=h,
            burn_in=burn_in,
            draws_per_chain=draws_per_chain,
            seed=20240611,
            names=["a", "b", "c"],
        )
        blocks: List[sc.Draws] = []
        progress: List[sc.Progress] = []
        summary = sc.run(
            self.target,
            spec,
            lambda x: -(x - mu) @ Q,  # grad log pi; Q symmetric
            on_draws=blocks.append,
            on_progress=progress.append,
            timeout=DEADLINE_SECONDS,
        )
        # Bookkeeping against the request (sluice.proto: Register, Draws,
        # Finished) and the LMC cost of one gradient per chain per step
        # (sluice.proto, Register.kernel).
        self.assertEqual(summary.reason, sc.FinishReason.DRAWS_COLLECTED)
        self.assertEqual(summary.draws_received, chains * draws_per_chain)
        self.assertEqual(summary.progress.evaluations_used, chains * (burn_in + draws_per_chain))
        self.assertEqual(summary.names, ("a", "b", "c"))
        assert summary.registered is not None
        self.assertEqual(summary.registered.seed, 20240611)
        self.assertEqual(summary.registered.evaluations_per_step, chains)
        values = np.concatenate([b.values for b in blocks])
        chain_of = np.concatenate([b.chains for b in blocks])
        iters = np.concatenate([b.iterations for b in blocks])
        self.assertEqual(values.shape, (chains * draws_per_chain, dim))
        x = np.empty((chains, draws_per_chain, dim))
        for c in range(chains):
            mine = chain_of == c
            np.testing.assert_array_equal(iters[mine], burn_in + np.arange(1, draws_per_chain + 1))
            x[c] = values[mine]

        # The server's summary is the sample mean and sd (divisor n-1) of
        # the same draws: equal to numpy's up to rounding.
        np.testing.assert_allclose(summary.mean, values.mean(axis=0), rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(summary.sd, values.std(axis=0, ddof=1), rtol=1e-9)
        self.assertTrue(all(p.count == chains * draws_per_chain for p in summary.parameters))

        def zscores(cov_ref: np.ndarray) -> List[float]:
            z = []
            for i in range(dim):
                m, se = batch_means(x[:, :, i], batch)
                z.append((m - mu[i]) / se)
            for i in range(dim):
                for j in range(i, dim):
                    # With the exact mean mu, E[(x_i - mu_i)(x_j - mu_j)] is
                    # the covariance entry itself: no estimated-mean bias.
                    m, se = batch_means((x[:, :, i] - mu[i]) * (x[:, :, j] - mu[j]), batch)
                    z.append((m - cov_ref[i, j]) / se)
            return z

        z = zscores(sigma_h)
        self.assertLess(max(abs(v) for v in z), Z_MAX, f"z-scores against Sigma_h: {np.round(z, 2)}")
        # The same check tells the discretised law from the target: against
        # Q^-1 it rejects at the same threshold (the variances along the
        # stiff directions are inflated by 1/(1 - h lam / 2), up to 1.43).
        z_target = zscores(np.linalg.inv(Q))
        self.assertGreater(max(abs(v) for v in z_target), Z_MAX, f"z against Q^-1: {np.round(z_target, 1)}")
        if os.environ.get("SLUICE_TEST_VERBOSE"):
            print(f"\nz vs Sigma_h {np.round(z, 2)}\nz vs Q^-1   {np.round(z_target, 1)}")

    def test_nan_gradient_raises_session_error_naming_the_field(self) -> None:
        def grad(x: np.ndarray) -> np.ndarray:
            g = -x.copy()
            g[1, 1] = np.nan
            return g

        spec = sc.Spec(dim=2, chains=3, start=[0.5, -0.5], step=0.1, draws_per_chain=10, seed=3)
        with self.assertRaises(sc.SessionError) as cm:
            sc.run(self.target, spec, grad, timeout=DEADLINE_SECONDS)
        e = cm.exception
        # sluice.proto, rpc Session: bad input ends the session with
        # INVALID_ARGUMENT and a BadRequest detail naming the field, after a
        # Finished frame with reason FAILED.
        self.assertEqual(e.code, grpc.StatusCode.INVALID_ARGUMENT)
        self.assertEqual(e.field, "evaluations.gradients")
        self.assertIn("not finite", e.description)
        self.assertIn("chain 1, coordinate 1", e.message)
        assert e.summary is not None
        self.assertEqual(e.summary.reason, sc.FinishReason.FAILED)

    def test_bad_register_field_is_named(self) -> None:
        spec = sc.Spec(dim=2, chains=3, start=[0.0, 0.0], step=-1.0)
        with self.assertRaises(sc.SessionError) as cm:
            sc.run(self.target, spec, lambda x: -x, timeout=DEADLINE_SECONDS)
        self.assertEqual(cm.exception.code, grpc.StatusCode.INVALID_ARGUMENT)
        self.assertEqual(cm.exception.field, "register.step")

    def test_evaluator_error_stops_then_reraises(self) -> None:
        calls = [0]

        class ModelBroke(Exception):
            pass

        def grad(x: np.ndarray) -> np.ndarray:
            calls[0] += 1
            if calls[0] == 5:
                raise ModelBroke("solver diverged")
            return -x

        # One request at a time (chain_groups=1), so that the fifth request
        # is the fifth step's.
        spec = sc.Spec(dim=2, chains=4, start=[0.0, 0.0], step=0.1, draws_per_chain=100, seed=5, chain_groups=1)
        session = sc.Session(self.target, spec, grad, timeout=DEADLINE_SECONDS)
        events = []
        with self.assertRaises(ModelBroke):
            for ev in session:
                events.append(ev)
        # Stop was sent in place of the fifth answer: four steps were made,
        # their draws delivered, and the session finished as stopped.
        assert session.summary is not None
        self.assertEqual(session.summary.reason, sc.FinishReason.STOPPED)
        self.assertEqual(session.summary.progress.evaluations_used, 4 * 4)
        self.assertEqual(session.draws_received, 4 * 4)
        self.assertEqual(sum(e.rows for e in events if isinstance(e, sc.Draws)), 16)

    def test_wrong_gradient_shape_is_caught_before_sending(self) -> None:
        spec = sc.Spec(dim=3, chains=4, start=[0.0, 0.0, 0.0], step=0.1, draws_per_chain=10, seed=5)
        session = sc.Session(self.target, spec, lambda x: -x[:, :2], timeout=DEADLINE_SECONDS)
        with self.assertRaisesRegex(ValueError, r"shape \(4, 2\); want \(rows, dim\) = \(4, 3\)"):
            for _ in session:
                pass
        assert session.summary is not None
        self.assertEqual(session.summary.reason, sc.FinishReason.STOPPED)
        self.assertEqual(session.summary.progress.evaluations_used, 0)

    def test_stop_from_the_loop_and_other_thread(self) -> None:
        spec = sc.Spec(dim=2, chains=2, start=[0.0, 0.0], step=0.1, seed=9)  # no limit: only Stop ends it
        session = sc.Session(self.target, spec, lambda x: -x, timeout=DEADLINE_SECONDS)
        n = 0
        for ev in session:
            if isinstance(ev, sc.Draws):
                n += ev.rows
                if n >= 50:
                    session.stop("enough")
        assert session.summary is not None
        self.assertEqual(session.summary.reason, sc.FinishReason.STOPPED)
        self.assertEqual(session.summary.draws_received, n)
        self.assertGreaterEqual(n, 50)

        session = sc.Session(self.target, spec, lambda x: -x, timeout=DEADLINE_SECONDS)
        timer = threading.Timer(0.2, session.stop)
        timer.start()
        try:
            for _ in session:
                pass
        finally:
            timer.cancel()
        assert session.summary is not None
        self.assertEqual(session.summary.reason, sc.FinishReason.STOPPED)

    def test_split_requests_and_seed_give_identical_draws(self) -> None:
        # The same seed and the same answers give bit-identical draws
        # (sluice.proto, Register.seed), also when a small message limit
        # makes the server split every request into parts (Points).
        chains, dim = 16, 3

        def sample(limit: int, full_draws: bool = False) -> "tuple[np.ndarray, sc.Summary]":
            spec = sc.Spec(
                dim=dim,
                chains=chains,
                start=np.linspace(-1, 1, chains * dim),
                step=0.2,
                burn_in=5,
                keep_every=3,
                draws_per_chain=20,
                seed=77,
                max_message_bytes=limit,
            )
            blocks: List[np.ndarray] = []
            s = sc.run(
                self.target,
                spec,
                lambda x: -x * np.array([1.0, 2.0, 0.5]),
                on_draws=lambda d: blocks.append(d.values.copy()),
                timeout=DEADLINE_SECONDS,
                full_draws=full_draws,
            )
            return np.concatenate(blocks), s

        whole, s1 = sample(sc.DEFAULT_MAX_MESSAGE_BYTES)
        # 1024 bytes of framing allowance plus 8*(dim+1)+16 = 48 bytes per
        # row (the server's split rule): 5 rows per part, 4 parts per step.
        limit = 1024 + 5 * 48
        split, s2 = sample(limit)
        assert s2.registered is not None
        self.assertEqual(s2.registered.max_message_bytes, limit)
        self.assertEqual(s1.draws_received, chains * 20)
        self.assertEqual(whole.tobytes(), split.tobytes())
        # Draws sent by reference (the default) and in full are the same.
        for lim in (sc.DEFAULT_MAX_MESSAGE_BYTES, limit):
            full, _ = sample(lim, full_draws=True)
            self.assertEqual(whole.tobytes(), full.tobytes())


if __name__ == "__main__":
    unittest.main()
