#!/usr/bin/python3
"""Benchmark: the Python client sampling through sluice against a
hand-written numpy LMC loop doing the same steps in-process.

Target: a Gaussian with diagonal precision d (d_i evenly spaced in [1, 10]),
gradient -d * x, in dimension --dim with --chains chains, step --step. Both
sides make the same unadjusted Langevin steps,

    x <- x + h * grad(x) + sqrt(2 h) * xi,

and hand every kept draw (all chains, every --keep-every-th step) to the
caller: through sluice as Draws frames, in-process as a view of the state.
The in-process loop works in place on preallocated arrays; the gradient
function is the same one in both. With --grad-cost-ms the gradient also
sleeps that long per batch, standing in for an expensive model. Figures
are draws per second (chains x kept steps / wall time) and milliseconds
per step, the median of --repeats rounds each; the runs alternate
(sluice, numpy, sluice, numpy, ...) and the ratio is the median of the
rounds' own ratios (sluice time per step over numpy's), so load that
changes during the run weighs on both sides alike.

Run a server first (`go run ./cmd/sluice serve --addr 127.0.0.1:7070`), then

    /usr/bin/python3 client/python/bench.py --target 127.0.0.1:7070

or let `go run ./cmd/sluice bench` (which starts its own server) or
`go test -run XXX -bench PythonClient -benchtime 1x ./client/python/` run it. --json prints one JSON object instead of text.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from typing import Callable, Dict

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import sluice_client as sc  # noqa: E402


def through_sluice(target: str, grad: Callable[[np.ndarray], np.ndarray], dim: int, chains: int,
                   step: float, steps: int, keep_every: int, limit: int) -> Dict[str, float]:
    spec = sc.Spec(dim=dim, chains=chains, start=np.zeros(dim), step=step, keep_every=keep_every,
                   draws_per_chain=steps // keep_every, seed=1, max_message_bytes=limit)
    got = [0]

    def on_draws(d: sc.Draws) -> None:
        got[0] += d.rows

    t0 = time.perf_counter()
    summary = sc.run(target, spec, grad, on_draws=on_draws, timeout=600, keep_draws=False)
    seconds = time.perf_counter() - t0
    if summary.reason != sc.FinishReason.DRAWS_COLLECTED or got[0] != chains * (steps // keep_every):
        raise RuntimeError(f"bench: session ended with {summary.reason} after {got[0]} draws")
    return {"seconds": seconds, "draws": got[0], "steps": steps}


def in_process(grad: Callable[[np.ndarray], np.ndarray], dim: int, chains: int, step: float,
               steps: int, keep_every: int) -> Dict[str, float]:
    rng = np.random.default_rng(1)
    x = np.zeros((chains, dim))
    noise = np.empty_like(x)
    scale = np.sqrt(2.0 * step)
    got = 0
    checksum = 0.0
    t0 = time.perf_counter()
    for n in range(1, steps + 1):
        g = grad(x)
        g *= step
        x += g
        rng.standard_normal(out=noise)
        noise *= scale
        x += noise
        if n % keep_every == 0:
            got += chains  # the caller gets the state, as on_draws gets a view
            checksum += x[0, 0]
    seconds = time.perf_counter() - t0
    if not np.isfinite(checksum):
        raise RuntimeError("bench: in-process chain diverged")
    return {"seconds": seconds, "draws": got, "steps": steps}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--target", default="127.0.0.1:7070")
    ap.add_argument("--dim", type=int, default=1000)
    ap.add_argument("--chains", type=int, default=64)
    ap.add_argument("--step", type=float, default=0.05)
    ap.add_argument("--steps", type=int, default=300, help="steps per run through sluice")
    ap.add_argument("--local-steps", type=int, default=1000, help="steps per in-process run")
    ap.add_argument("--keep-every", type=int, default=1)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--max-message-bytes", type=int, default=16 << 20)
    ap.add_argument("--grad-cost-ms", type=float, default=0.0,
                    help="milliseconds the gradient sleeps per batch, on both sides")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()

    d = np.linspace(1.0, 10.0, args.dim)
    if not args.step * d.max() < 2.0:
        raise SystemExit("bench: step too large for the precision (needs h * max(d) < 2)")

    if args.grad_cost_ms < 0 or args.repeats < 1:
        raise SystemExit("bench: --grad-cost-ms must be >= 0 and --repeats >= 1")
    cost = args.grad_cost_ms / 1e3

    def grad(x: np.ndarray) -> np.ndarray:
        if cost > 0:
            time.sleep(cost)
        return -d * x

    # Warm up both (channel set-up, first allocations), then alternate.
    through_sluice(args.target, grad, args.dim, args.chains, args.step, 20, 1, args.max_message_bytes)
    in_process(grad, args.dim, args.chains, args.step, 20, 1)
    remote, local = [], []
    for _ in range(args.repeats):
        remote.append(through_sluice(args.target, grad, args.dim, args.chains, args.step, args.steps,
                                     args.keep_every, args.max_message_bytes))
        local.append(in_process(grad, args.dim, args.chains, args.step, args.local_steps, args.keep_every))
    remote_ms = [r["seconds"] / r["steps"] * 1e3 for r in remote]
    local_ms = [r["seconds"] / r["steps"] * 1e3 for r in local]
    out = {
        "dim": args.dim,
        "chains": args.chains,
        "keep_every": args.keep_every,
        "grad_cost_ms": args.grad_cost_ms,
        "sluice_draws_per_second": float(np.median([r["draws"] / r["seconds"] for r in remote])),
        "sluice_ms_per_step": float(np.median(remote_ms)),
        "sluice_ms_per_step_rounds": remote_ms,
        "numpy_draws_per_second": float(np.median([r["draws"] / r["seconds"] for r in local])),
        "numpy_ms_per_step": float(np.median(local_ms)),
        "numpy_ms_per_step_rounds": local_ms,
        "ratio": float(np.median([a / b for a, b in zip(remote_ms, local_ms)])),
    }
    if args.json:
        print(json.dumps(out))
    else:
        print(f"dim {args.dim}, {args.chains} chains, keep every {args.keep_every}, "
              f"gradient cost {args.grad_cost_ms:g} ms; median of {args.repeats} alternating rounds")
        print(f"  through sluice:     {out['sluice_draws_per_second']:12.0f} draws/s  "
              f"({out['sluice_ms_per_step']:.3f} ms per step)")
        print(f"  in-process numpy:   {out['numpy_draws_per_second']:12.0f} draws/s  "
              f"({out['numpy_ms_per_step']:.3f} ms per step)")
        print(f"  sluice / in-process: {out['ratio']:.2f}x (time per step)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
