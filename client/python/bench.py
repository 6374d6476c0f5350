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

--grad-cost-ms T makes each gradient batch sleep T milliseconds (like a
remote model: the interpreter is free meanwhile); --grad-ms T adds a busy
wait of T milliseconds instead (holding the interpreter lock like a model
written in Python). Both apply to both loops. --request-paths also
measures, alternating with the runs above, bare session loops on other
request paths that grpcio allows (without the client package's checks
and its read-ahead thread, with its frame reader and encoding, draws in
Points frames; wall and CPU per step), to show which is fastest: the synchronous stream
fed by an iterator over a queue.SimpleQueue (the path the client uses), and
grpc.aio with call.write/call.read on one event loop. --baseline DIR also
measures, in the same alternating rounds, the sluice_client package found
in DIR (another version of the client), so a change shows as a before and
after ratio from one run:

    git archive <commit> client/python/sluice_client | tar -x -C /tmp/base
    /usr/bin/python3 client/python/bench.py --baseline /tmp/base/client/python

Both clients then share this process, and with it glibc's malloc
thresholds, which the client raises when its first session starts
(sluice_client._alloc): run with SLUICE_CLIENT_MALLOC=keep to compare the
two without that, or run the other tree's own bench.py in a process of its
own. --chain-groups N sets Register.chain_groups for the sessions through
sluice (0, the default, lets the server choose; 1 is lock step).
"""

from __future__ import annotations

import argparse
import asyncio
import concurrent.futures as cf
import importlib.util
import json
import queue
import os
import sys
import time
from typing import Any, Callable, Dict

import grpc
import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import sluice_client as sc  # noqa: E402
from sluice_client import _frames, _wire  # noqa: E402
from sluice_client._proto.sluice.v1 import sluice_pb2 as pb  # noqa: E402


#: The server's process id (--server-pid), whose CPU time is read from
#: /proc around each run; 0 when not given.
SERVER_PID = 0


def server_cpu() -> float:
    """The server process's CPU seconds so far (user and system, every
    thread), from /proc/PID/stat; 0 without --server-pid."""
    if not SERVER_PID:
        return 0.0
    with open(f"/proc/{SERVER_PID}/stat", encoding="ascii") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def load_baseline(directory: str) -> Any:
    """Imports the sluice_client package found in directory (another
    version of the client, for instance `git archive <commit>
    client/python/sluice_client | tar -x -C DIR` then
    DIR/client/python) under the name sluice_client_baseline."""
    root = os.path.join(os.path.abspath(directory), "sluice_client")
    spec = importlib.util.spec_from_file_location("sluice_client_baseline", os.path.join(root, "__init__.py"),
                                                  submodule_search_locations=[root])
    if spec is None or spec.loader is None:
        raise SystemExit(f"bench: no sluice_client package in {directory}")
    mod = importlib.util.module_from_spec(spec)
    sys.modules["sluice_client_baseline"] = mod
    spec.loader.exec_module(mod)
    return mod


#: Register.chain_groups for the sessions through sluice (--chain-groups):
#: 0 lets the server choose.
CHAIN_GROUPS = 0


def through_sluice(target: str, grad: Callable[[np.ndarray], np.ndarray], dim: int, chains: int,
                   step: float, steps: int, keep_every: int, limit: int, client: Any = sc,
                   executor: Any = None) -> Dict[str, float]:
    spec = client.Spec(dim=dim, chains=chains, start=np.zeros(dim), step=step, keep_every=keep_every,
                   draws_per_chain=steps // keep_every, seed=1, max_message_bytes=limit,
                   chain_groups=CHAIN_GROUPS)
    got = [0]

    def on_draws(d: Any) -> None:
        got[0] += d.rows

    t0, c0, s0 = time.perf_counter(), time.process_time(), server_cpu()
    extra: Dict[str, Any] = {} if executor is None else {"executor": executor, "split": 1}
    summary = client.run(target, spec, grad, on_draws=on_draws, timeout=600, keep_draws=False, **extra)
    seconds, cpu, server = time.perf_counter() - t0, time.process_time() - c0, server_cpu() - s0
    done = (client.FinishReason.DRAWS_COLLECTED, client.FinishReason.CHECK_FAILED)
    if summary.reason not in done or got[0] != chains * (steps // keep_every):
        raise RuntimeError(f"bench: session ended with {summary.reason} after {got[0]} draws")
    return {"seconds": seconds, "cpu": cpu, "server_cpu": server, "draws": got[0], "steps": steps}


def in_process(grad: Callable[[np.ndarray], np.ndarray], dim: int, chains: int, step: float,
               steps: int, keep_every: int) -> Dict[str, float]:
    rng = np.random.default_rng(1)
    x = np.zeros((chains, dim))
    noise = np.empty_like(x)
    scale = np.sqrt(2.0 * step)
    got = 0
    checksum = 0.0
    t0, c0, s0 = time.perf_counter(), time.process_time(), server_cpu()
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
    seconds, cpu, server = time.perf_counter() - t0, time.process_time() - c0, server_cpu() - s0
    if not np.isfinite(checksum):
        raise RuntimeError("bench: in-process chain diverged")
    return {"seconds": seconds, "cpu": cpu, "server_cpu": server, "draws": got, "steps": steps}


def _bare_spec(dim: int, chains: int, step: float, steps: int, limit: int) -> pb.Register:
    reg = sc.Spec(dim=dim, chains=chains, start=np.zeros(dim), step=step, draws_per_chain=steps, seed=1,
                  max_message_bytes=limit).to_register()
    reg.accepts_draw_references = True  # as the client does
    reg.draws_in_points = True
    return reg


#: The client's response deserializer (sluice_client._wire): (kind, frame).
_bare_read = _wire.response_reader(pb.SessionResponse, "points", "draws")


def _bare_answer(grad: Callable[[np.ndarray], np.ndarray], p: Any) -> bytes:
    """The answer as the client builds it (sluice_client._frames)."""
    x = np.frombuffer(p.points, dtype="<f8").reshape(p.rows, p.dim)
    g = np.asarray(grad(x), dtype="<f8")
    return _frames.evaluations(_frames.SESSION_EVALUATIONS, p.request_id, p.first_row, p.rows, p.dim, gradients=g)


def _bare_rows(kind: Any, m: Any) -> int:
    """Draw rows in a frame: a draws frame's, or those riding in Points."""
    if kind == "draws":
        return int(m.rows)
    if kind == "points" and m.draws is not None:
        return int(m.draws.rows)
    return 0


def bare_sync_queue(target: str, grad: Callable[[np.ndarray], np.ndarray], dim: int, chains: int,
                    step: float, steps: int, limit: int) -> Dict[str, float]:
    """A bare session loop on the synchronous stream, requests from an
    iterator over a SimpleQueue (the client's path, without its checks and
    without its read-ahead thread; the client's frame reader)."""
    opts = [("grpc.max_send_message_length", limit), ("grpc.max_receive_message_length", limit)]
    with grpc.insecure_channel(target, options=opts) as ch:
        rpc = ch.stream_stream(sc.SESSION_METHOD, request_serializer=_frames.serializer(pb.SessionRequest),
                               response_deserializer=_bare_read)
        q: "queue.SimpleQueue[object]" = queue.SimpleQueue()
        q.put(pb.SessionRequest(register=_bare_spec(dim, chains, step, steps, limit)))
        got = 0
        t0, c0 = time.perf_counter(), time.process_time()
        call = rpc(iter(q.get, None), timeout=600)
        for kind, m in call:
            if kind == "points":
                q.put(_bare_answer(grad, m))
            got += _bare_rows(kind, m)
            if kind == "finished":
                break
        q.put(None)
        seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    if got != chains * steps:
        raise RuntimeError(f"bench: bare sync session ended after {got} draws")
    return {"seconds": seconds, "cpu": cpu, "draws": got, "steps": steps}


def bare_aio(target: str, grad: Callable[[np.ndarray], np.ndarray], dim: int, chains: int,
             step: float, steps: int, limit: int) -> Dict[str, float]:
    """A bare session loop on grpc.aio: call.write and call.read on one
    event loop."""
    opts = [("grpc.max_send_message_length", limit), ("grpc.max_receive_message_length", limit)]

    async def go() -> Dict[str, float]:
        async with grpc.aio.insecure_channel(target, options=opts) as ch:
            rpc = ch.stream_stream(sc.SESSION_METHOD, request_serializer=_frames.serializer(pb.SessionRequest),
                                   response_deserializer=_bare_read)
            call = rpc(timeout=600)
            got = 0
            t0, c0 = time.perf_counter(), time.process_time()
            await call.write(pb.SessionRequest(register=_bare_spec(dim, chains, step, steps, limit)))
            while True:
                f = await call.read()
                if f is grpc.aio.EOF:
                    break
                kind, m = f
                if kind == "points":
                    await call.write(_bare_answer(grad, m))
                got += _bare_rows(kind, m)
                if kind == "finished":
                    break
            await call.done_writing()
            seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
        if got != chains * steps:
            raise RuntimeError(f"bench: bare aio session ended after {got} draws")
        return {"seconds": seconds, "cpu": cpu, "draws": got, "steps": steps}

    return asyncio.run(go())


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
    ap.add_argument("--grad-ms", type=float, default=0.0,
                    help="extra cost of each gradient evaluation in ms (busy wait), in both loops")
    ap.add_argument("--request-paths", action="store_true",
                    help="also measure bare loops on other grpcio request paths")
    ap.add_argument("--baseline", default="",
                    help="directory holding another sluice_client package, measured in the same rounds")
    ap.add_argument("--threads", type=int, default=0,
                    help="also measure the client with executor=ThreadPoolExecutor(N), split=1 (frames of "
                         "pipelined chain groups evaluated at the same time), in the same rounds")
    ap.add_argument("--chain-groups", type=int, default=0,
                    help="Register.chain_groups of the sessions through sluice (0: the server chooses; 1: lock step)")
    ap.add_argument("--server-pid", type=int, default=0,
                    help="the server's process id: also report its CPU time per step (Linux /proc)")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    global SERVER_PID, CHAIN_GROUPS
    SERVER_PID = args.server_pid
    CHAIN_GROUPS = args.chain_groups

    d = np.linspace(1.0, 10.0, args.dim)
    if not args.step * d.max() < 2.0:
        raise SystemExit("bench: step too large for the precision (needs h * max(d) < 2)")

    if args.grad_cost_ms < 0 or args.grad_ms < 0 or args.repeats < 1:
        raise SystemExit("bench: --grad-cost-ms and --grad-ms must be >= 0 and --repeats >= 1")
    cost = args.grad_cost_ms / 1e3
    extra = args.grad_ms * 1e-3

    def grad(x: np.ndarray) -> np.ndarray:
        if cost > 0:
            time.sleep(cost)
        if extra > 0:
            end = time.perf_counter() + extra
            while time.perf_counter() < end:
                pass
        return -d * x

    base = load_baseline(args.baseline) if args.baseline else None
    # Warm up both (channel set-up, first allocations), then alternate.
    through_sluice(args.target, grad, args.dim, args.chains, args.step, 20, 1, args.max_message_bytes)
    if base is not None:
        through_sluice(args.target, grad, args.dim, args.chains, args.step, 20, 1, args.max_message_bytes, base)
    in_process(grad, args.dim, args.chains, args.step, 20, 1)
    pool = cf.ThreadPoolExecutor(args.threads) if args.threads > 0 else None
    if pool is not None:
        through_sluice(args.target, grad, args.dim, args.chains, args.step, 20, 1, args.max_message_bytes,
                       executor=pool)
    paths = {"sync_queue": bare_sync_queue, "aio": bare_aio} if args.request_paths else {}
    for run in paths.values():
        run(args.target, grad, args.dim, args.chains, args.step, 20, args.max_message_bytes)
    remote, local, baseline, threaded = [], [], [], []
    bare: Dict[str, list] = {name: [] for name in paths}
    for _ in range(args.repeats):
        if base is not None:
            baseline.append(through_sluice(args.target, grad, args.dim, args.chains, args.step, args.steps,
                                           args.keep_every, args.max_message_bytes, base))
        remote.append(through_sluice(args.target, grad, args.dim, args.chains, args.step, args.steps,
                                     args.keep_every, args.max_message_bytes))
        local.append(in_process(grad, args.dim, args.chains, args.step, args.local_steps, args.keep_every))
        if pool is not None:
            threaded.append(through_sluice(args.target, grad, args.dim, args.chains, args.step, args.steps,
                                           args.keep_every, args.max_message_bytes, executor=pool))
        for name, run in paths.items():
            bare[name].append(run(args.target, grad, args.dim, args.chains, args.step, args.steps,
                                  args.max_message_bytes))
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
        "grad_ms": args.grad_ms,
        "chain_groups": args.chain_groups,
        "repeats": args.repeats,
        # The client's throughput as a fraction of the in-process loop's.
        "client_fraction": float(np.median([b / a for a, b in zip(remote_ms, local_ms)])),
    }
    for name, runs in bare.items():
        out[f"bare_{name}_ms_per_step"] = float(np.median([r["seconds"] / r["steps"] for r in runs])) * 1e3
        out[f"bare_{name}_cpu_ms_per_step"] = float(np.median([r["cpu"] / r["steps"] for r in runs])) * 1e3
    # CPU time per step of this process (every thread: the interpreter
    # and gRPC's), which waits for a core on a busy machine do not
    # inflate, and of the server when its pid is known.
    def cpu_ms(runs: list, key: str = "cpu") -> float:
        return float(np.median([r[key] / r["steps"] for r in runs])) * 1e3

    out["sluice_cpu_ms_per_step"] = cpu_ms(remote)
    out["numpy_cpu_ms_per_step"] = cpu_ms(local)
    if SERVER_PID:
        out["server_cpu_ms_per_step"] = cpu_ms(remote, "server_cpu")
    if base is not None:
        base_ms = [r["seconds"] / r["steps"] * 1e3 for r in baseline]
        out["baseline_cpu_ms_per_step"] = cpu_ms(baseline)
        if SERVER_PID:
            out["baseline_server_cpu_ms_per_step"] = cpu_ms(baseline, "server_cpu")
        out["baseline"] = os.path.abspath(args.baseline)
        out["baseline_ms_per_step"] = float(np.median(base_ms))
        out["baseline_ms_per_step_rounds"] = base_ms
        out["baseline_ratio"] = float(np.median([a / b for a, b in zip(base_ms, local_ms)]))
        out["baseline_client_fraction"] = float(np.median([b / a for a, b in zip(base_ms, local_ms)]))
        # How much faster this client is than the baseline, per round.
        out["speedup_over_baseline"] = float(np.median([a / b for a, b in zip(base_ms, remote_ms)]))
    if pool is not None:
        pool.shutdown()
        thr_ms = [r["seconds"] / r["steps"] * 1e3 for r in threaded]
        out["threads"] = args.threads
        out["threads_ms_per_step"] = float(np.median(thr_ms))
        out["threads_ms_per_step_rounds"] = thr_ms
        out["threads_cpu_ms_per_step"] = cpu_ms(threaded)
        out["threads_client_fraction"] = float(np.median([b / a for a, b in zip(thr_ms, local_ms)]))
    if args.json:
        print(json.dumps(out))
    else:
        print(f"dim {args.dim}, {args.chains} chains, keep every {args.keep_every}, "
              f"gradient sleep {args.grad_cost_ms:g} ms, busy {args.grad_ms:g} ms, chain groups "
              f"{args.chain_groups or 'automatic'}; "
              f"median of {args.repeats} alternating rounds")
        print(f"  through sluice:     {out['sluice_draws_per_second']:12.0f} draws/s  "
              f"({out['sluice_ms_per_step']:.3f} ms per step)")
        print(f"  in-process numpy:   {out['numpy_draws_per_second']:12.0f} draws/s  "
              f"({out['numpy_ms_per_step']:.3f} ms per step)")
        print(f"  sluice / in-process: {out['ratio']:.2f}x (time per step; client at "
              f"{out['client_fraction']:.2f} of in-process)")
        print(f"  CPU per step: client process {out['sluice_cpu_ms_per_step']:.3f} ms, numpy loop "
              f"{out['numpy_cpu_ms_per_step']:.3f} ms"
              + (f", server {out['server_cpu_ms_per_step']:.3f} ms" if SERVER_PID else ""))
        if pool is not None:
            print(f"  through sluice, executor=ThreadPoolExecutor({args.threads}), split=1: "
                  f"{out['threads_ms_per_step']:.3f} ms per step (client at {out['threads_client_fraction']:.2f} "
                  f"of in-process), CPU {out['threads_cpu_ms_per_step']:.3f} ms")
        for name in bare:
            print(f"  bare loop, {name:10s}: {out[f'bare_{name}_ms_per_step']:.3f} ms per step, "
                  f"CPU {out[f'bare_{name}_cpu_ms_per_step']:.3f} ms")
        if base is not None:
            print(f"  baseline client ({out['baseline']}): {out['baseline_ms_per_step']:.3f} ms per step, "
                  f"{out['baseline_ratio']:.2f}x numpy (client at {out['baseline_client_fraction']:.2f} of "
                  f"in-process); this client is {out['speedup_over_baseline']:.2f}x faster")
            print(f"    baseline CPU per step: client process {out['baseline_cpu_ms_per_step']:.3f} ms"
                  + (f", server {out['baseline_server_cpu_ms_per_step']:.3f} ms" if SERVER_PID else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
