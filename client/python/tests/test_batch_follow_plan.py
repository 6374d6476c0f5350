"""Tests of the richer parts of the wire API: the ``batch`` callback (log
densities, Hessians, Hessian-vector products, gradient replicates),
accuracy targets, the Plan rpc and the Follow rpc.

Like test_sluice_client.py, the live tests need a running `sluice serve`
whose address is in SLUICE_TARGET (client/python/python_test.go starts one);
the scripted tests need no server.
"""

from __future__ import annotations

import math
import os
import queue
import threading
import unittest
from typing import Dict, List, Optional, Set, Tuple

import grpc
import numpy as np

import sluice_client as sc
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb
from test_sluice_client import (
    _FINISHED,
    _REGISTERED,
    DEADLINE_SECONDS,
    Z_MAX,
    _ScriptedChannel,
    batch_means,
    require_target,
)

#: Print the z-scores of the statistical checks (SLUICE_TEST_VERBOSE=1).
VERBOSE = bool(os.environ.get("SLUICE_TEST_VERBOSE"))

#: The correlated precision of the live Gaussian tests, and the mean. Its
#: eigenvalues are 0.5480, 1.5513 and 2.4006 (numpy.linalg.eigvalsh).
Q = np.array([[2.0, 0.6, 0.3], [0.6, 1.5, -0.4], [0.3, -0.4, 1.0]])
MU = np.array([1.0, -0.5, 2.0])


def gaussian_answer(b: sc.Batch) -> sc.Answer:
    """Everything a Batch can ask of log pi for pi = N(MU, Q^-1): log pi up to
    a constant, its gradient -Q (x - MU), its Hessian -Q, and Hessian-vector
    products -Q v (Q is symmetric)."""
    d = b.points - MU
    qd = d @ Q
    return sc.Answer(
        gradients=-qd,
        log_densities=-0.5 * np.einsum("ij,ij->i", d, qd),
        hessians=np.broadcast_to(-Q, (b.rows, 3, 3)),
        hessian_vectors=None if b.vectors is None else -(b.vectors @ Q),
    )


def per_chain(blocks: List[sc.Draws], chains: int, dim: int) -> np.ndarray:
    """Stacks draw blocks into a (chains, draws, dim) array in step order."""
    values = np.concatenate([b.values for b in blocks])
    chain_of = np.concatenate([b.chains for b in blocks])
    n = values.shape[0] // chains
    x = np.empty((chains, n, dim))
    for c in range(chains):
        x[c] = values[chain_of == c]
    return x


def moment_zscores(x: np.ndarray, mu: np.ndarray, cov: np.ndarray, batch: int) -> List[float]:
    """z-scores of the per-coordinate means against mu and of the covariance
    entries (i <= j) against cov, with batch-means MCSEs. With the exact mean
    mu, E[(x_i - mu_i)(x_j - mu_j)] is the covariance entry itself."""
    dim = x.shape[2]
    z = []
    for i in range(dim):
        m, se = batch_means(x[:, :, i], batch)
        z.append((m - mu[i]) / se)
    for i in range(dim):
        for j in range(i, dim):
            m, se = batch_means((x[:, :, i] - mu[i]) * (x[:, :, j] - mu[j]), batch)
            z.append((m - cov[i, j]) / se)
    return z


def sym_fn(a: np.ndarray, f: "np.ufunc", h: float) -> np.ndarray:
    """f(-h a) for a symmetric matrix a, by its eigendecomposition."""
    lam, v = np.linalg.eigh(a)
    return (v * f(-h * lam)) @ v.T


# --- scripted frames --------------------------------------------------------


def _points(
    x: np.ndarray,
    quantities: List[int],
    replicates: int = 0,
    vectors: Optional[np.ndarray] = None,
    groups: Tuple[int, ...] = (),
    full_data: bool = False,
) -> pb.SessionResponse:
    rows, dim = x.shape
    return pb.SessionResponse(
        points=pb.Points(
            request_id=3,
            first_row=0,
            rows=rows,
            dim=dim,
            total_rows=rows,
            points=sc.to_wire(x),
            chains=list(range(rows)),
            quantities=quantities,
            vectors=b"" if vectors is None else sc.to_wire(vectors),
            minibatch_groups=list(groups),
            full_data=full_data,
            replicates=replicates,
        )
    )


class ScriptedBatchTests(unittest.TestCase):
    """What the client sends for each quantity of a Points frame, against
    the layouts of proto/sluice/v1/sluice.proto (messages Points and
    Evaluations) and the array convention, checked with numpy reshapes."""

    X = np.array([[1.0, 2.0], [3.0, -4.0], [0.5, 0.25]])

    def spec(self) -> sc.Spec:
        return sc.Spec(dim=2, chains=3, start=[0.0, 0.0], step=0.1)

    def sent_evaluations(self, ch: _ScriptedChannel) -> List[pb.SessionRequest]:
        assert ch.call is not None
        return ch.call.sent[1:]

    def test_replicates_are_rows_by_replicates_by_dim(self) -> None:
        # "row r's replicate j is the (r*replicates + j)-th block of dim
        # values" (Evaluations.gradients); minibatch groups and the full-data
        # flag reach the Batch as sent.
        seen: List[sc.Batch] = []
        g = np.arange(3 * 2 * 2, dtype=np.float64).reshape(3, 2, 2) - 5.5

        def batch(b: sc.Batch) -> sc.Answer:
            seen.append(b)
            return sc.Answer(gradients=g, log_densities=np.zeros(3))  # log densities not asked: not sent

        ch = _ScriptedChannel([_REGISTERED, _points(self.X, [pb.QUANTITY_GRADIENT], 2, groups=(4, 4, -1)), _FINISHED])
        sc.run(ch, self.spec(), batch=batch)  # type: ignore[arg-type]
        (b,) = seen
        self.assertEqual((b.rows, b.dim, b.replicates, b.full_data), (3, 2, 2, False))
        self.assertTrue(b.want_gradient and not (b.want_log_density or b.want_hessian or b.want_hessian_vector))
        np.testing.assert_array_equal(b.points, self.X)
        np.testing.assert_array_equal(b.chains, [0, 1, 2])
        assert b.minibatch_groups is not None
        np.testing.assert_array_equal(b.minibatch_groups, [4, 4, -1])
        self.assertIsNone(b.vectors)
        (s,) = self.sent_evaluations(ch)
        ev = s.evaluations
        blocks = sc.from_wire(ev.gradients, 3 * 2, 2)
        for r in range(3):
            for j in range(2):
                np.testing.assert_array_equal(blocks[r * 2 + j], g[r, j])
        self.assertEqual(ev.log_densities, b"")

    def test_hessians_and_hessian_vectors(self) -> None:
        # Hessians: rows x dim x dim, point r's matrix the r-th block of
        # dim*dim values, row-major; Hessian-vector products rows x dim
        # (Evaluations.hessians, .hessian_vectors).
        h = np.stack([np.array([[1.0, 0.5], [0.5, 3.0]]) * (r + 1) for r in range(3)])
        v = np.array([[1.0, 0.0], [0.0, 1.0], [2.0, -1.0]])
        vec_seen: List[np.ndarray] = []

        def batch(b: sc.Batch) -> sc.Answer:
            if b.vectors is not None:
                vec_seen.append(b.vectors.copy())
            return sc.Answer(
                gradients=-b.points,
                hessians=h,
                hessian_vectors=None if b.vectors is None else np.einsum("rij,rj->ri", h, b.vectors),
            )

        ch = _ScriptedChannel(
            [
                _REGISTERED,
                _points(self.X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_HESSIAN]),
                _points(self.X, [pb.QUANTITY_HESSIAN_VECTOR], vectors=v),
                _FINISHED,
            ]
        )
        sc.run(ch, self.spec(), batch=batch)  # type: ignore[arg-type]
        first, second = (s.evaluations for s in self.sent_evaluations(ch))
        np.testing.assert_array_equal(sc.from_wire(first.gradients, 3, 2), -self.X)
        np.testing.assert_array_equal(sc.from_wire(first.hessians, 3, 4).reshape(3, 2, 2), h)
        self.assertEqual(first.hessian_vectors, b"")
        np.testing.assert_array_equal(vec_seen[0], v)
        hv = sc.from_wire(second.hessian_vectors, 3, 2)
        np.testing.assert_array_equal(hv[2], h[2] @ v[2])
        self.assertEqual((second.gradients, second.hessians), (b"", b""))

    def test_missing_quantity_stops_before_sending(self) -> None:
        ch = _ScriptedChannel([_REGISTERED, _points(self.X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_LOG_DENSITY]), _FINISHED])
        with self.assertRaisesRegex(ValueError, "asks for log_densities, but the answer has none"):
            sc.run(ch, self.spec(), batch=lambda b: sc.Answer(gradients=-b.points))  # type: ignore[arg-type]
        (s,) = self.sent_evaluations(ch)
        self.assertEqual(s.WhichOneof("frame"), "stop")

    def test_grad_cannot_answer_replicates_or_hessians(self) -> None:
        # A request the simple callbacks cannot answer raises before any
        # evaluation is sent; the client sends Stop in its place, and grad is
        # never called.
        for frame, pattern in (
            (_points(self.X, [pb.QUANTITY_GRADIENT], 2), "2 gradient replicates per point"),
            (_points(self.X, [pb.QUANTITY_GRADIENT, pb.QUANTITY_HESSIAN]), "asks for Hessians"),
            (_points(self.X, [pb.QUANTITY_HESSIAN_VECTOR], vectors=self.X), "asks for Hessian-vector products"),
        ):
            calls = [0]

            def grad(x: np.ndarray) -> np.ndarray:
                calls[0] += 1
                return -x

            ch = _ScriptedChannel([_REGISTERED, frame, _FINISHED])
            with self.assertRaisesRegex(ValueError, pattern):
                sc.run(ch, self.spec(), grad)  # type: ignore[arg-type]
            (s,) = self.sent_evaluations(ch)
            self.assertEqual(s.WhichOneof("frame"), "stop")
            self.assertEqual(calls[0], 0)

    def test_spec_carries_the_new_register_fields(self) -> None:
        # Field by field against sluice.proto, message Register.
        spec = sc.Spec(
            dim=2,
            chains=2,
            start=[0.0, 0.0],
            step=0.0,
            kernel="sgld",
            curvature=sc.Curvature(strong_convexity=1.0, smoothness=4.0, start_distance=2.0, penalty_centre=[1.0, -1.0]),
            wants=sc.Wants(min_bulk_ess=400.0, max_rhat=1.01, eps=0.1, metric="tv"),
            friction=3.0,
            inverse_mass=0.5,
            krylov_tolerance=1e-6,
            krylov_max_iterations=12,
            noise=sc.Noise(variance=2.0, bias=0.1, data_size=1000, minibatch_size=10, replicates=2),
            schedule=sc.Schedule(0.01, 10.0, 0.55),
            anchor_every=7,
            fixed_point_tolerance=1e-5,
            fixed_point_iterations=50,
        )
        r = spec.to_register()
        self.assertEqual((r.curvature.strong_convexity, r.curvature.smoothness, r.curvature.start_distance), (1, 4, 2))
        np.testing.assert_array_equal(sc.from_wire(r.curvature.penalty_centre, 1, 2), [[1.0, -1.0]])
        self.assertEqual((r.wants.min_bulk_ess, r.wants.max_rhat, r.wants.eps, r.wants.metric), (400, 1.01, 0.1, pb.METRIC_TV))
        self.assertEqual((r.friction, r.inverse_mass, r.krylov_tolerance, r.krylov_max_iterations), (3, 0.5, 1e-6, 12))
        n = r.noise
        self.assertEqual(
            (n.kind, n.variance, n.bias, n.data_size, n.minibatch_size, n.replicates),
            (pb.GRADIENT_KIND_STOCHASTIC, 2, 0.1, 1000, 10, 2),
        )
        self.assertEqual((r.schedule.a, r.schedule.b, r.schedule.gamma), (0.01, 10, 0.55))
        self.assertEqual((r.anchor_every, r.fixed_point_tolerance, r.fixed_point_iterations), (7, 1e-5, 50))
        # Absent parts stay absent (exact gradients, constant step, no targets).
        plain = sc.Spec(dim=1, start=[0.0], step=0.1).to_register()
        self.assertFalse(any(plain.HasField(f) for f in ("curvature", "wants", "noise", "schedule")))
        with self.assertRaisesRegex(ValueError, "metric 'l2'"):
            sc.Spec(dim=1, start=[0.0], step=0.1, wants=sc.Wants(eps=0.1, metric="l2")).to_register()


# --- against the server -----------------------------------------------------


class LiveBatchTests(unittest.TestCase):
    """Kernels that need the batch callback, against a real `sluice serve`."""

    target = ""

    @classmethod
    def setUpClass(cls) -> None:
        cls.target = require_target()

    def test_mala_matches_the_gaussian_exactly(self) -> None:
        # MALA's accept/reject step makes pi exactly invariant (detailed
        # balance; Roberts and Tweedie 1996), and the step is
        # frozen after burn-in, so the kept draws of N(MU, Q^-1) have mean
        # MU and covariance Q^-1 with no discretisation bias. Checked entry
        # by entry by z-scores with batch-means MCSEs; 9 checks at
        # |z| < Z_MAX have a family-wise false-alarm rate below 6.1e-5.
        chains, dim, burn_in, n = 16, 3, 400, 2000
        rows: List[int] = []
        asks: Set[Tuple[bool, bool, bool, bool]] = set()

        def batch(b: sc.Batch) -> sc.Answer:
            rows.append(b.rows)
            asks.add((b.want_gradient, b.want_log_density, b.want_hessian, b.want_hessian_vector))
            return gaussian_answer(b)

        start = MU + 3.0 * np.cos(np.arange(chains * dim)).reshape(chains, dim)
        spec = sc.Spec(
            dim=dim,
            chains=chains,
            kernel="mala",
            start=start,
            step=0.3,
            burn_in=burn_in,
            draws_per_chain=n,
            seed=20240612,
            progress_every_steps=500,
        )
        blocks: List[sc.Draws] = []
        progress: List[sc.Progress] = []
        summary = sc.run(
            self.target, spec, batch=batch, on_draws=blocks.append, on_progress=progress.append, timeout=DEADLINE_SECONDS
        )
        self.assertEqual(summary.reason, sc.FinishReason.DRAWS_COLLECTED)
        # MALA asks log density and gradient, at the starts once and then at
        # one proposal per chain per step (sluice.proto Register.kernel).
        self.assertEqual(asks, {(True, True, False, False)})
        # Before sampling, the server's gradient check (on by default for
        # kernels that ask for log densities) evaluates 3 start points, each
        # with 1 + 4 x 2 rows (the point and x +- t v, x +- 2t v in two
        # directions): 27 rows.
        check_rows = 3 * 9
        self.assertEqual(summary.progress.evaluations_used, chains * (burn_in + n + 1) + check_rows)
        self.assertEqual(sum(rows), chains * (burn_in + n + 1) + check_rows)
        # The step adapts during burn-in only (toward acceptance 0.574, the optimal rate of
        # Roberts and Rosenthal 1998).
        after = [p for p in progress if p.steps > burn_in]
        self.assertTrue(after and not any(p.kernel.adapting for p in after))
        h = after[-1].kernel.step
        self.assertEqual(after[-1].kernel.acceptance_rates.shape, (chains,))

        x = per_chain(blocks, chains, dim)
        self.assertEqual(x.shape, (chains, n, dim))
        # Batches of 200 draws against the integrated autocorrelation time
        # the server's ESS implies, tau = draws / ESS (a guard on the
        # batch-means assumption, not the reference).
        batch_len = 200
        ess = min(min(p.bulk_ess, p.tail_ess) for p in summary.progress.parameters)
        self.assertEqual(len(summary.progress.parameters), dim)
        self.assertGreater(batch_len, 20 * chains * n / ess)

        z = moment_zscores(x, MU, np.linalg.inv(Q), batch_len)
        self.assertLess(max(abs(v) for v in z), Z_MAX, f"z-scores against Q^-1: {np.round(z, 2)}")
        # The same check has the power to see the bias the correction
        # removes: unadjusted Langevin at MALA's step would leave
        # Sigma_h = [Q (I - h Q / 2)]^-1 invariant (derived here: a Gaussian
        # AR(1) recursion and its Lyapunov equation), which
        # the draws reject.
        self.assertLess(h * np.linalg.eigvalsh(Q).max(), 2.0)
        sigma_h = np.linalg.inv(Q @ (np.eye(dim) - h * Q / 2))
        z_ula = moment_zscores(x, MU, sigma_h, batch_len)
        self.assertGreater(max(abs(v) for v in z_ula), Z_MAX, f"z against Sigma_h: {np.round(z_ula, 1)}")
        if VERBOSE:
            print(f"\nmala h {h:.4f} tau {chains * n / ess:.2f}\nz vs Q^-1 {np.round(z, 2)}\nz vs Sigma_h {np.round(z_ula, 1)}")

    def test_ozaki_with_hessians_is_exact_beyond_the_lmc_limit(self) -> None:
        # For a Gaussian target the Ozaki step is the exact transition of the
        # Langevin diffusion over time h: x' | x ~ N(MU + e^{-hQ}(x - MU),
        # Q^-1 (I - e^{-2hQ})), so the stationary covariance is Q^-1 for
        # every h > 0 and the lag-one covariance is e^{-hQ} Q^-1
        # (derived here: the Ozaki step of Dalalyan 2017 solves the linear
        # Langevin equation exactly). The step h = 1 is beyond LMC's stability
        # limit 2 / lambda_max = 0.833 (|1 - h lambda| < 1). 18 checks at
        # |z| < Z_MAX: family-wise false-alarm rate below 1.3e-4.
        chains, dim, burn_in, n, h = 16, 3, 30, 1600, 1.0
        lam = np.linalg.eigvalsh(Q)
        self.assertGreater(h * lam.max(), 2.0)
        asks: Set[Tuple[bool, bool, bool, bool]] = set()

        def batch(b: sc.Batch) -> sc.Answer:
            asks.add((b.want_gradient, b.want_log_density, b.want_hessian, b.want_hessian_vector))
            return gaussian_answer(b)

        start = MU + 3.0 * np.sin(np.arange(chains * dim)).reshape(chains, dim)
        spec = sc.Spec(
            dim=dim, chains=chains, kernel="ozaki", start=start, step=h, burn_in=burn_in, draws_per_chain=n, seed=31
        )
        blocks: List[sc.Draws] = []
        summary = sc.run(self.target, spec, batch=batch, on_draws=blocks.append, timeout=DEADLINE_SECONDS)
        self.assertEqual(summary.reason, sc.FinishReason.DRAWS_COLLECTED)
        self.assertEqual(asks, {(True, False, True, False)})  # gradient and Hessian (sluice.proto Register.kernel)
        self.assertEqual(summary.progress.evaluations_used, chains * (burn_in + n))
        assert summary.registered is not None
        self.assertEqual(summary.registered.step, h)

        # Each eigen-direction is AR(1) with rho = e^{-h lambda}; the slowest
        # has tau = (1 + rho)/(1 - rho) = 3.74 (AR(1), derived here), and products
        # mix faster (Isserlis), so batches of 100 draws are about 27 tau.
        # Burn-in shrinks the start's distance by rho^30 < 1e-7.
        rho = np.exp(-h * lam.min())
        tau_max = (1 + rho) / (1 - rho)
        batch_len = 100
        self.assertGreater(batch_len, 25 * tau_max)
        self.assertLess(rho**burn_in, 1e-7)
        x = per_chain(blocks, chains, dim)
        cov = np.linalg.inv(Q)
        z = moment_zscores(x, MU, cov, batch_len)
        lag1 = sym_fn(Q, np.exp, h) @ cov  # E[(x_{t+1} - MU)(x_t - MU)^T]
        d = x - MU
        for i in range(dim):
            for j in range(dim):
                m, se = batch_means(d[:, 1:, i] * d[:, :-1, j], batch_len)
                z.append((m - lag1[i, j]) / se)
        self.assertLess(max(abs(v) for v in z), Z_MAX, f"z-scores: {np.round(z, 2)}")
        if VERBOSE:
            print(f"\nozaki z {np.round(z, 2)}")

    def test_simple_grad_refuses_hessians_before_sending(self) -> None:
        spec = sc.Spec(dim=3, chains=4, kernel="ozaki", start=MU, step=0.5, draws_per_chain=10, seed=2)
        session = sc.Session(self.target, spec, lambda x: -(x - MU) @ Q, timeout=DEADLINE_SECONDS)
        with self.assertRaisesRegex(ValueError, r"asks for Hessians \(kernel 'ozaki'\).*pass batch="):
            for _ in session:
                pass
        assert session.summary is not None
        self.assertEqual(session.summary.reason, sc.FinishReason.STOPPED)
        self.assertEqual(session.summary.progress.evaluations_used, 0)

    def test_replicated_noisy_gradients_measure_the_noise(self) -> None:
        # Two replicates per point, each the exact gradient plus independent
        # N(0, s^2) noise per coordinate. The server's estimate is the mean
        # over requests of the replicates' unbiased sample variance (common
        # practice), so it is unbiased for s^2 and, requests being
        # independent, within 4 of its standard errors (normal tail, 6e-5
        # two-sided). Each replicate counts as one evaluation (sluice.proto,
        # GradientNoise.replicates).
        s2, chains, dim, steps = 4.0, 4, 3, 400
        rng = np.random.default_rng(20240613)
        rows = [0]
        shapes: Set[Tuple[int, bool]] = set()

        def batch(b: sc.Batch) -> sc.Answer:
            rows[0] += b.rows
            shapes.add((b.replicates, b.full_data))
            g = -(b.points - MU) @ Q
            return sc.Answer(gradients=g[:, None, :] + rng.normal(0.0, np.sqrt(s2), (b.rows, b.replicates, dim)))

        spec = sc.Spec(
            dim=dim,
            chains=chains,
            kernel="sgld",
            start=MU,
            step=0.05,
            draws_per_chain=steps,
            seed=41,
            noise=sc.Noise(replicates=2),
        )
        summary = sc.run(self.target, spec, batch=batch, timeout=DEADLINE_SECONDS)
        # 400 steps of 0.05 are short for these chains: the verdict may
        # fail the mixing check (R-hat above 1.1), and then says so.
        if summary.reason != sc.FinishReason.DRAWS_COLLECTED:
            self.assertEqual(summary.reason, sc.FinishReason.CHECK_FAILED, summary.message)
            self.assertIn("check mixing failed", summary.message)
        self.assertEqual(summary.draws_received, chains * steps)
        self.assertEqual(shapes, {(2, False)})
        self.assertEqual(rows[0], chains * steps)
        self.assertEqual(summary.progress.evaluations_used, 2 * rows[0])
        noise = summary.progress.noise
        assert noise is not None
        self.assertEqual(noise.requests, steps)
        self.assertEqual(noise.declared, 0.0)
        self.assertGreater(noise.variance_se, 0.0)
        self.assertLess(abs(noise.variance - s2), 4 * noise.variance_se, f"{noise}")
        if VERBOSE:
            print(f"\nnoise {noise}, z {(noise.variance - s2) / noise.variance_se:.2f}")

    def test_simple_grad_refuses_replicates(self) -> None:
        spec = sc.Spec(
            dim=2, chains=2, kernel="sgld", start=[0.0, 0.0], step=0.1, draws_per_chain=5, seed=3, noise=sc.Noise(replicates=2)
        )
        with self.assertRaisesRegex(ValueError, "2 gradient replicates per point"):
            sc.run(self.target, spec, lambda x: -x, timeout=DEADLINE_SECONDS)


class LiveTargetAndPlanTests(unittest.TestCase):
    """Accuracy targets and the Plan rpc, against a real `sluice serve`."""

    target = ""

    @classmethod
    def setUpClass(cls) -> None:
        cls.target = require_target()

    def test_min_bulk_ess_target_is_met(self) -> None:
        # The session finishes with TARGET_MET as soon as every target holds,
        # judged at the last progress report (sluice.proto, Wants and
        # FinishReason): that report shows every parameter's bulk-ESS at or
        # above the target, and none before it did.
        want = 400.0
        spec = sc.Spec(
            dim=3,
            chains=4,
            start=MU,
            step=0.3,
            burn_in=50,
            seed=14,
            progress_every_steps=50,
            wants=sc.Wants(min_bulk_ess=want),
            max_evaluations=4 * 20000,  # a safety net: BUDGET_SPENT would fail the test
        )
        progress: List[sc.Progress] = []
        summary = sc.run(self.target, spec, lambda x: -(x - MU) @ Q, on_progress=progress.append, timeout=DEADLINE_SECONDS)
        self.assertEqual(summary.reason, sc.FinishReason.TARGET_MET)
        # The final report is judged at the step the target was met (the
        # last periodic report may come from an earlier step).
        last = summary.progress
        self.assertEqual(len(last.parameters), 3)
        self.assertTrue(all(p.bulk_ess >= want for p in last.parameters), f"{last.parameters}")
        (t,) = last.targets
        self.assertEqual((t.name, t.want, t.met, t.projected_evaluations), ("min_bulk_ess", want, True, 0))
        self.assertEqual(t.current, min(p.bulk_ess for p in last.parameters))
        # Earlier reports with measured parameters fell short. (Reports
        # before the first measurement carry no parameters; the session does
        # not judge the target on them.)
        measured = [p for p in progress[:-1] if p.parameters]
        self.assertTrue(measured)
        for p in measured:
            self.assertLess(min(q.bulk_ess for q in p.parameters), want)
            self.assertFalse(p.targets[0].met)
        self.assertEqual(summary.progress.state, sc.State.FINISHED)

    def test_plan_matches_the_tv_test_vector(self) -> None:
        # The TV rule of Dalalyan (2017), total-variation theorem with a
        # Gaussian start and its corollary (from memory): T = (4 log(1/e) +
        # p log(M/m)) / (2m), h = e^2 / (M^2 p T), K = ceil(T/h). The server
        # plans for e = 0.9 eps, keeping a tenth of eps for the shift of its
        # mode search's start: m = 1, M = 4, p = 2, eps = 0.1 gives
        # T = 6.202185578423634, h = 4.081222607730081e-05, K = 151969.
        res = sc.plan(self.target, sc.Curvature(strong_convexity=1.0, smoothness=4.0), 2, 0.1, "tv", timeout=DEADLINE_SECONDS)
        e = 0.09
        T = (4 * math.log(1 / e) + 2 * math.log(4)) / 2
        h = e * e / (16 * 2 * T)
        self.assertAlmostEqual(res.step / h, 1.0, delta=1e-8)
        self.assertAlmostEqual(res.horizon / T, 1.0, delta=1e-8)
        self.assertAlmostEqual(h / 4.081222607730081e-05, 1.0, delta=1e-12)
        self.assertEqual(res.iterations, 151969)
        self.assertEqual((res.evaluations_per_chain, res.evaluations, res.seconds), (151969, 151969, -1.0))
        self.assertTrue(res.constants_recalled)
        self.assertEqual((res.bound.metric, res.bound.source, res.penalty), ("tv", "declared", 0.0))
        self.assertTrue(res.bound.guaranteed)
        self.assertLessEqual(res.bound.value, 0.1)
        # The rule splits e = 0.09 evenly between its two terms; the start
        # term also carries the tenth of eps kept for the start's shift.
        self.assertAlmostEqual(res.bound.start_term, 0.045 + 0.01, delta=1e-6)
        self.assertAlmostEqual(res.bound.discretisation_term, 0.045, delta=1e-6)
        # Paired exact check (derived here: the exact variance recursion of
        # ULA on a Gaussian): ULA on N(0, diag(1, 1/4)) from
        # N(0, I/4) run K steps of size h has per-coordinate variance
        # v_K = v_inf + (1 - h lam)^(2K) (v_0 - v_inf), v_inf = 1/(lam (1 - h lam/2)):
        # (1.00001733, 0.25002041), and TV to pi 2.04e-05 <= eps (grid
        # integration, computed for this check with numpy).
        lam = np.array([1.0, 4.0])
        v_inf = 1.0 / (lam * (1.0 - res.step * lam / 2.0))
        v = v_inf + (1.0 - res.step * lam) ** (2 * res.iterations) * (0.25 - v_inf)
        np.testing.assert_allclose(v, [1.00001733, 0.25002041], atol=5e-9)
        xs, ys = np.linspace(-9.0, 9.0, 2001), np.linspace(-4.5, 4.5, 2001)

        def normal(t: np.ndarray, var: float) -> np.ndarray:
            return np.exp(-t * t / (2 * var)) / np.sqrt(2 * np.pi * var)

        p = np.outer(normal(xs, v[0]), normal(ys, v[1]))
        q = np.outer(normal(xs, 1.0), normal(ys, 0.25))
        tv = 0.5 * np.abs(p - q).sum() * (xs[1] - xs[0]) * (ys[1] - ys[0])
        self.assertAlmostEqual(tv, 2.04e-05, delta=0.005e-05)

    def test_eps_target_plans_the_step_and_reports_the_bound(self) -> None:
        # With declared m = 1, M = 4 on a 2-D target, wants eps = 0.1 in TV
        # and step 0, the server plans the step and the steps per chain by
        # the rule of Dalalyan (2017) (from memory; paired with the exact
        # Gaussian check of test_plan_matches_the_tv_test_vector) for nine
        # tenths of eps, 0.09: a tenth is left to the shift term of the mode
        # search that starts the chains (docs/methods.md, section 2.5).
        # T = (4 log(1/0.09) + 2 log 4)/2, h = 0.09^2/(16 * 2 * T) =
        # 4.0812226077300796e-05 and K = ceil(T/h) = 151969 (computed with
        # Python's math module). The start is the mode 0, where the
        # gradient is 0: the search certifies it with one gradient and adds
        # no shift. Every progress report then carries the declared bound
        # after k steps,
        #   (1/2) exp{(p/4) log(M/m) - m k h / 2} + (p M^2 h (k h) / 4)^(1/2),
        # and the eps target, unmet, with (k_eps - k) * chains evaluations to
        # go: k_eps is the first step count whose bound is within eps. With
        # no shift it comes before K (the plan left a tenth of eps for it).
        h, k_plan, chains = 4.0812226077300796e-05, 151969, 2
        spec = sc.Spec(
            dim=2,
            chains=chains,
            start=np.zeros(2),
            step=0.0,
            draws_per_chain=3,
            seed=3,
            progress_every_steps=1,
            curvature=sc.Curvature(strong_convexity=1.0, smoothness=4.0),
            wants=sc.Wants(eps=0.1, metric="tv"),
        )
        progress: List[sc.Progress] = []
        summary = sc.run(
            self.target, spec, lambda x: -x * np.array([1.0, 4.0]), on_progress=progress.append, timeout=DEADLINE_SECONDS
        )
        self.assertEqual(summary.reason, sc.FinishReason.DRAWS_COLLECTED)  # long before K steps
        reg = summary.registered
        assert reg is not None
        self.assertAlmostEqual(reg.step / h, 1.0, delta=1e-8)
        self.assertEqual(reg.planned_steps, k_plan)
        self.assertEqual([p.steps for p in progress], [1, 2, 3])
        ks = np.arange(k_plan + 1)
        bounds = 0.5 * np.exp(0.5 * np.log(4.0) - ks * h / 2) + np.sqrt(2 * 16.0 * h * (ks * h) / 4)
        k_eps = int(np.argmax(bounds <= 0.1))
        self.assertTrue(0 < k_eps < k_plan)
        for p in progress:
            b = p.bound
            assert b is not None
            k = p.steps
            start = 0.5 * np.exp(0.5 * np.log(4.0) - k * h / 2)
            disc = np.sqrt(2 * 16.0 * h * (k * h) / 4)
            self.assertEqual((b.metric, b.source, b.guaranteed), ("tv", "declared", True))
            self.assertIn("guaranteed", b.label)
            self.assertAlmostEqual(b.start_term, start, delta=1e-8)
            self.assertAlmostEqual(b.discretisation_term, disc, delta=1e-8)
            self.assertAlmostEqual(b.value, start + disc, delta=1e-8)
            self.assertEqual((b.noise_term, b.bias_term), (0.0, 0.0))
            (t,) = p.targets
            self.assertEqual((t.name, t.want, t.met), ("eps", 0.1, False))
            self.assertEqual(t.current, b.value)
            self.assertEqual(t.projected_evaluations, (k_eps - k) * chains)
            self.assertEqual(p.kernel.step, reg.step)
            self.assertIsNone(p.noise)  # exact gradients

    def test_plan_names_a_bad_eps(self) -> None:
        # The TV rule needs eps in (0, 1/2) (Dalalyan 2017, from memory; sluice.proto,
        # rpc Plan: INVALID_ARGUMENT naming the field).
        with self.assertRaises(sc.SessionError) as cm:
            sc.plan(self.target, sc.Curvature(strong_convexity=1.0, smoothness=4.0), 2, 0.7, "tv", timeout=DEADLINE_SECONDS)
        self.assertEqual(cm.exception.code, grpc.StatusCode.INVALID_ARGUMENT)
        self.assertEqual(cm.exception.field, "eps")
        self.assertIn("plan failed", str(cm.exception))
        with self.assertRaisesRegex(ValueError, "metric"):
            sc.plan(self.target, sc.Curvature(strong_convexity=1.0, smoothness=4.0), 2, 0.1, "kl")


class LiveFollowTests(unittest.TestCase):
    """The Follow rpc against a real `sluice serve` (which keeps draws for
    followers: --follow-buffer, on by default)."""

    target = ""

    @classmethod
    def setUpClass(cls) -> None:
        cls.target = require_target()

    def test_follow_resumes_without_loss_or_duplicate(self) -> None:
        # sluice.proto, rpc Follow: a consumer that disconnects and comes back
        # with the next sequence number gets every draw after it, with no loss
        # and no duplicate, then the session's Finished frame. The session
        # runs in a thread and is held at its 100th request until the
        # follower has disconnected once, so the follower demonstrably reads
        # a running session and resumes in the middle of it.
        chains, dim, n = 4, 3, 300
        spec = sc.Spec(dim=dim, chains=chains, start=MU, step=0.2, draws_per_chain=n, seed=8)
        ids: "queue.Queue[Tuple[str, str]]" = queue.Queue()
        release = threading.Event()
        own: List[sc.Draws] = []
        result: Dict[str, object] = {}
        calls = [0]

        def grad(x: np.ndarray) -> np.ndarray:
            calls[0] += 1
            if calls[0] == 100:
                release.wait(DEADLINE_SECONDS)
            return -(x - MU) @ Q

        def keep(d: sc.Draws) -> None:
            own.append(sc.Draws(d.seq, d.values.copy(), d.chains.copy(), d.iterations.copy()))

        def session() -> None:
            try:
                result["summary"] = sc.run(
                    self.target,
                    spec,
                    grad,
                    on_draws=keep,
                    on_registered=lambda r: ids.put((r.session_id, r.resume_token)),
                    timeout=DEADLINE_SECONDS,
                )
            except BaseException as err:  # reported by the main thread
                result["error"] = err
                ids.put(("", ""))
            finally:
                release.set()

        th = threading.Thread(target=session, daemon=True)
        th.start()
        try:
            sid, token = ids.get(timeout=DEADLINE_SECONDS)
            self.assertNotEqual(sid, "", f"session failed: {result.get('error')!r}")
            got: List[sc.Draws] = []
            with sc.follow(self.target, sid, token, 0, timeout=DEADLINE_SECONDS) as f1:
                for i, ev in enumerate(f1):
                    if i == 0:  # the header comes first
                        self.assertIsInstance(ev, sc.FollowHeader)
                        assert isinstance(ev, sc.FollowHeader)
                        self.assertEqual((ev.session_id, ev.dim, ev.chains, ev.draws_per_chain), (sid, spec.dim, chains, n))
                        continue
                    if isinstance(ev, sc.Progress):
                        continue
                    self.assertIsInstance(ev, sc.Draws)
                    assert isinstance(ev, sc.Draws)
                    got.append(ev)
                    if f1.next_seq >= 150:
                        break  # disconnect mid-stream
            resume = f1.next_seq
            # At most 99 steps were made while the session was held.
            self.assertLessEqual(resume, 99 * chains)
            self.assertFalse(release.is_set())
            release.set()
            events = list(sc.follow(self.target, sid, token, resume, timeout=DEADLINE_SECONDS))
        finally:
            release.set()
            th.join(DEADLINE_SECONDS)
        self.assertNotIn("error", result)
        own_summary = result["summary"]
        assert isinstance(own_summary, sc.Summary)
        self.assertIsInstance(events[-1], sc.Summary)
        self.assertIsInstance(events[0], sc.FollowHeader)
        self.assertTrue(all(isinstance(e, (sc.Draws, sc.Progress)) for e in events[1:-1]))
        fsum = events[-1]
        assert isinstance(fsum, sc.Summary)
        first_draws = next(e for e in events if isinstance(e, sc.Draws))
        self.assertEqual(first_draws.seq, resume)
        got.extend(e for e in events[:-1] if isinstance(e, sc.Draws))

        # Every draw once, in order, equal to what the session's own client got.
        self.assertEqual(np.concatenate([np.arange(d.seq, d.seq + d.rows) for d in got]).tolist(), list(range(chains * n)))
        for field in ("values", "chains", "iterations"):
            a = np.concatenate([getattr(d, field) for d in got])
            b = np.concatenate([getattr(d, field) for d in own])
            self.assertEqual(a.tobytes(), b.tobytes(), field)
        self.assertEqual(fsum.reason, sc.FinishReason.DRAWS_COLLECTED)
        self.assertEqual(fsum.draws_received, chains * n - resume)
        self.assertIsNone(fsum.registered)
        self.assertEqual(fsum.parameters, own_summary.parameters)
        # The summaries keep the draws received (keep_draws defaults to
        # True): the session's all of them, the resumed follower's from
        # `resume` on, the same bytes as the blocks delivered.
        assert own_summary.draws is not None and fsum.draws is not None
        own_values = np.concatenate([d.values for d in own])
        self.assertEqual(own_summary.draws.tobytes(), own_values.tobytes())
        self.assertEqual(fsum.draws.tobytes(), own_values[resume:].tobytes())
        self.assertEqual(fsum.draw_chains.tobytes(), np.concatenate([d.chains for d in own])[resume:].tobytes())

        # From exactly the end: no draws, only the summary. Beyond it:
        # OUT_OF_RANGE naming from_seq.
        tail = list(sc.follow(self.target, sid, token, chains * n, timeout=DEADLINE_SECONDS))
        self.assertIsInstance(tail[0], sc.FollowHeader)
        self.assertFalse(any(isinstance(e, sc.Draws) for e in tail))
        self.assertIsInstance(tail[-1], sc.Summary)
        with self.assertRaises(sc.SessionError) as cm:
            list(sc.follow(self.target, sid, token, chains * n + 1, timeout=DEADLINE_SECONDS))
        self.assertEqual((cm.exception.code, cm.exception.field), (grpc.StatusCode.OUT_OF_RANGE, "from_seq"))

    def test_follow_unknown_session_is_not_found(self) -> None:
        with self.assertRaises(sc.SessionError) as cm:
            for _ in sc.follow(self.target, "no-such-session", "0" * 32, timeout=DEADLINE_SECONDS):
                pass
        self.assertEqual((cm.exception.code, cm.exception.field), (grpc.StatusCode.NOT_FOUND, "session_id"))
        self.assertIn("follow failed", str(cm.exception))

    def test_follow_needs_the_token(self) -> None:
        # A known session with a wrong token gets the same answer as an
        # unknown one: the token's secrecy protects the id.
        spec = sc.Spec(dim=1, chains=2, start=[0.0], step=0.1, seed=3, draws_per_chain=5)
        summary = sc.run(self.target, spec, lambda x: -x, timeout=DEADLINE_SECONDS)
        reg = summary.registered
        assert reg is not None
        self.assertEqual((len(reg.session_id), len(reg.resume_token)), (32, 32))
        messages = []
        for sid, token in ((reg.session_id, "f" * 32), (reg.session_id, ""), ("no-such-session", reg.resume_token)):
            with self.assertRaises(sc.SessionError) as cm:
                list(sc.follow(self.target, sid, token, timeout=DEADLINE_SECONDS))
            self.assertEqual((cm.exception.code, cm.exception.field), (grpc.StatusCode.NOT_FOUND, "session_id"))
            messages.append(cm.exception.message)
        self.assertEqual(len(set(messages)), 1, messages)
        events = list(sc.follow(self.target, reg.session_id, reg.resume_token, timeout=DEADLINE_SECONDS))
        self.assertEqual(sum(e.rows for e in events if isinstance(e, sc.Draws)), 10)


if __name__ == "__main__":
    unittest.main()
