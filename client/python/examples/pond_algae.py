#!/usr/bin/python3
"""Calibrate the growth rate and carrying capacity of an algae bloom in a
pond from weekly turbidity readings, with each batch of gradients spread
over a pool of worker processes.

The readings below were invented for this example: logistic growth

    dB/dt = r B (1 - B / K),   B(0) = 2 mg/L,

run at r = 0.35 per day and K = 48 mg/L, read every 3 days for 30 days,
plus Gaussian noise of 2 mg/L, rounded to 0.1 mg/L.

The model is integrated by classical fourth-order Runge-Kutta with a small
fixed step, one point at a time in plain Python, carrying the
sensitivities dB/dlog r and dB/dlog K along (forward sensitivity
equations), which gives the exact gradient of the discrete model. It is
deliberately slow, about 20 ms per point on one core, like a simulation
code: every batch asks for one point per chain, so with --workers N the
points of a batch are solved N at a time.

Statistics: readings ~ N(B(t), 2²) independently; priors log r ~ N(log 0.3,
0.5²), log K ~ N(log 40, 0.5²). The client finds the posterior mode of (log r, log K) by Newton's
method and samples whitened coordinates z around it.

Run a server (`go run ./cmd/sluice serve --addr 127.0.0.1:7070`), then

    /usr/bin/python3 client/python/examples/pond_algae.py --target 127.0.0.1:7070 --workers 4

The draws are the same with any number of workers (the gradient is
deterministic and the seed fixed); only the wall time changes.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import functools
import math
import multiprocessing
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import sluice_client as sc  # noqa: E402

DAYS = np.arange(0.0, 31.0, 3.0)
READINGS = np.array([0.4, 5.8, 8.8, 27.0, 37.0, 42.2, 45.4, 47.9, 47.2, 47.5, 49.4])
SIGMA = 2.0
B0 = 2.0
PRIOR_MEAN = np.array([math.log(0.3), math.log(40.0)])
PRIOR_SD = np.array([0.5, 0.5])
#: Runge-Kutta step in days: small enough that the solution is
#: converged, and slow enough in plain Python to stand in for a simulator.
DT = 0.005


def solve(log_r: float, log_k: float) -> "tuple[np.ndarray, np.ndarray, np.ndarray]":
    """B at DAYS and its sensitivities to log r and log K, by RK4 on the
    logistic equation and its forward sensitivity equations."""
    r, k = math.exp(log_r), math.exp(log_k)

    def f(b: float, sr: float, sk: float) -> "tuple[float, float, float]":
        growth = r * b * (1.0 - b / k)
        dfdb = r * (1.0 - 2.0 * b / k)
        # d/dlog r of the right-hand side is r * dF/dr = growth; d/dlog K is
        # K * dF/dK = r b^2 / K.
        return growth, dfdb * sr + growth, dfdb * sk + r * b * b / k

    steps_per_reading = int(round((DAYS[1] - DAYS[0]) / DT))
    b, sr, sk = B0, 0.0, 0.0
    out_b, out_r, out_k = [b], [sr], [sk]
    for _ in range(len(DAYS) - 1):
        for _ in range(steps_per_reading):
            k1 = f(b, sr, sk)
            k2 = f(b + 0.5 * DT * k1[0], sr + 0.5 * DT * k1[1], sk + 0.5 * DT * k1[2])
            k3 = f(b + 0.5 * DT * k2[0], sr + 0.5 * DT * k2[1], sk + 0.5 * DT * k2[2])
            k4 = f(b + DT * k3[0], sr + DT * k3[1], sk + DT * k3[2])
            b += DT / 6.0 * (k1[0] + 2.0 * k2[0] + 2.0 * k3[0] + k4[0])
            sr += DT / 6.0 * (k1[1] + 2.0 * k2[1] + 2.0 * k3[1] + k4[1])
            sk += DT / 6.0 * (k1[2] + 2.0 * k2[2] + 2.0 * k3[2] + k4[2])
        out_b.append(b)
        out_r.append(sr)
        out_k.append(sk)
    return np.array(out_b), np.array(out_r), np.array(out_k)


def grad(theta: np.ndarray) -> np.ndarray:
    """Gradient of the log posterior at each row (log r, log K). At module
    level, so that a process pool can pickle it."""
    out = np.empty_like(theta)
    for i, (log_r, log_k) in enumerate(theta):
        b, sr, sk = solve(log_r, log_k)
        resid = (READINGS - b) / SIGMA**2
        out[i, 0] = resid @ sr
        out[i, 1] = resid @ sk
    return out - (theta - PRIOR_MEAN) / PRIOR_SD**2


def hessian(theta: np.ndarray, eps: float = 1e-5) -> np.ndarray:
    """The Hessian of the log posterior by central differences of grad."""
    pts = np.array([theta + eps * e for e in np.eye(2)] + [theta - eps * e for e in np.eye(2)])
    g = grad(pts)
    h = (g[:2] - g[2:]) / (2 * eps)
    return 0.5 * (h + h.T)


def find_mode(theta: np.ndarray, iterations: int = 30) -> np.ndarray:
    """Newton's method with step halving on the log posterior's gradient
    (its Hessian is negative definite near the mode)."""
    for _ in range(iterations):
        g = grad(theta[None, :])[0]
        h = hessian(theta)
        step = np.linalg.solve(h, -g)
        if not np.all(np.linalg.eigvalsh(h) < 0):
            step = 1e-4 * g  # not concave here: a small gradient step
        while np.abs(step).max() > 0.5:
            step /= 2
        theta = theta + step
        if np.abs(step).max() < 1e-10:
            break
    return theta


def whitened_grad(centre: np.ndarray, w: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Gradient in whitened coordinates z, theta = centre + W z: W^T grad.
    Given to the pool as functools.partial(whitened_grad, centre, w), which
    pickles."""
    return grad(centre + z @ w.T) @ w


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--target", default="127.0.0.1:7070")
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="worker processes (0: none)")
    ap.add_argument("--chains", type=int, default=8)
    ap.add_argument("--draws", type=int, default=300)
    ap.add_argument("--burn-in", type=int, default=200)
    ap.add_argument("--seed", type=int, default=11)
    args = ap.parse_args()

    t0 = time.perf_counter()
    grad(PRIOR_MEAN[None, :])
    print(f"one gradient: {1e3 * (time.perf_counter() - t0):.0f} ms")
    # Whitening: W W^T is the inverse of minus the Hessian at the mode, so
    # one step size suits both directions of the (strongly correlated)
    # posterior; draws are mapped back to (log r, log K) below.
    centre = find_mode(PRIOR_MEAN.copy())
    w = np.linalg.cholesky(np.linalg.inv(-hessian(centre)))
    spec = sc.Spec(dim=2, chains=args.chains, start=np.zeros(2), step=0.3, burn_in=args.burn_in,
                   draws_per_chain=args.draws, seed=args.seed, names=["z1", "z2"])
    pool = None
    if args.workers > 0:
        # Workers come from a fork server started before any gRPC channel
        # exists: forking a process whose gRPC threads run is not safe.
        pool = cf.ProcessPoolExecutor(args.workers, mp_context=multiprocessing.get_context("forkserver"))
    try:
        t0 = time.perf_counter()
        summary = sc.run(args.target, spec, functools.partial(whitened_grad, centre, w), executor=pool)
        seconds = time.perf_counter() - t0
    finally:
        if pool is not None:
            pool.shutdown()
    print(summary)
    assert summary.draws is not None
    theta = centre + summary.draws @ w.T
    r, k = np.exp(theta).mean(axis=0)
    print(f"posterior means: r = {r:.3f} per day, K = {k:.1f} mg/L; "
          f"{seconds:.1f} s with {args.workers or 'no'} worker processes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
