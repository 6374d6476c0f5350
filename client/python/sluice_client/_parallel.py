"""Splitting one Points frame over a ``concurrent.futures.Executor``: the
rows are cut into contiguous blocks, each block is evaluated by the
caller's function on a worker, and the answers are written back in row
order into one array per quantity, so that the wire bytes are exactly
those of an evaluation of the whole frame at once.

The functions submitted to the executor are defined at module level here
and take the caller's function as an argument, so that a process pool
(or a Dask or MPI pool) pickles only that function and the block's
arrays."""

from __future__ import annotations

import concurrent.futures as cf
import dataclasses
import os
import pickle
from typing import Callable, List, Optional, Sequence, Tuple

import numpy as np
import numpy.typing as npt

from ._types import Answer, Batch


def default_split(executor: cf.Executor) -> int:
    """The number of blocks a frame is cut into when ``split`` is not given:
    the executor's worker count where it exposes one (the standard
    library's pools and mpi4py's MPIPoolExecutor keep it in
    ``_max_workers``), else the machine's CPU count."""
    n = getattr(executor, "_max_workers", None)
    if isinstance(n, int) and n > 0:
        return n
    return os.cpu_count() or 1


def block_bounds(rows: int, split: int) -> List[Tuple[int, int]]:
    """Cuts rows 0..rows-1 into min(split, rows) contiguous blocks whose
    sizes differ by at most one (the larger ones first), as (start, stop)
    pairs in row order."""
    n = max(1, min(split, rows))
    size, extra = divmod(rows, n)
    out = []
    a = 0
    for i in range(n):
        b = a + size + (1 if i < extra else 0)
        out.append((a, b))
        a = b
    return out


def check_picklable(executor: cf.Executor, fns: Sequence[Optional[Callable[..., object]]]) -> None:
    """Raises TypeError, before anything is sent, when the executor is a
    process pool of the standard library and a function cannot be pickled
    by the standard pickle (a lambda, a nested function, a method of an
    object that does not pickle). Other executors (Dask's, which use
    cloudpickle; MPI pools) report such a failure from the first frame."""
    if not isinstance(executor, cf.ProcessPoolExecutor):
        return
    for fn in fns:
        if fn is None:
            continue
        try:
            pickle.dumps(fn)
        except Exception as err:
            raise TypeError(
                f"sluice_client: a process pool needs a picklable callback, and {fn!r} is not ({err}); "
                "define it at module level (in an importable module when the pool spawns its workers), "
                "or use functools.partial of such a function"
            ) from err


def _read_only(a: Optional[np.ndarray]) -> Optional[np.ndarray]:
    """A worker of a process pool receives a writable copy; the callback's
    contract is a read-only array wherever it runs."""
    if a is not None and a.flags.writeable:
        a = a.view()
        a.flags.writeable = False
    return a


def eval_simple_block(
    grad: Optional[Callable[[np.ndarray], npt.ArrayLike]],
    log_density: Optional[Callable[[np.ndarray], npt.ArrayLike]],
    points: np.ndarray,
) -> Tuple[Optional[np.ndarray], Optional[np.ndarray]]:
    """Runs on a worker: the gradients (when grad is given) and log
    densities (when log_density is given) of one block of rows."""
    points = _read_only(points)  # type: ignore[assignment]
    g = None if grad is None else np.asarray(grad(points))
    ld = None if log_density is None else np.asarray(log_density(points))
    return g, ld


def eval_batch_block(batch: Callable[[Batch], Answer], b: Batch) -> Answer:
    """Runs on a worker: the caller's batch function on one block."""
    b = dataclasses.replace(b, points=_read_only(b.points), vectors=_read_only(b.vectors))
    ans = batch(b)
    if not isinstance(ans, Answer):
        raise TypeError(f"sluice_client: batch returned {type(ans).__name__}; want sluice_client.Answer")
    return ans


def gather(
    futures: List["cf.Future[object]"],
    bounds: List[Tuple[int, int]],
    request_id: int,
    first_row: int,
) -> List[object]:
    """Waits for every block's result in row order. On the first exception
    it cancels the blocks not yet started and re-raises the exception with
    a note naming the rows of the block that failed."""
    out: List[object] = []
    for i, f in enumerate(futures):
        try:
            out.append(f.result())
        except BaseException as err:
            for g in futures[i + 1 :]:
                g.cancel()
            a, b = bounds[i]
            if isinstance(err, Exception):
                err.add_note(
                    f"sluice_client: raised while evaluating rows {first_row + a}..{first_row + b - 1} "
                    f"of request {request_id} on the executor"
                )
            raise
    return out


def shaped(name: str, value: Optional[npt.ArrayLike], *shapes: Tuple[int, ...]) -> np.ndarray:
    """value as an array of one of the shapes, or ValueError naming the
    quantity."""
    if value is None:
        raise ValueError(f"sluice_client: the server asks for {name}, but the answer has none")
    a = np.asarray(value)
    if a.shape not in shapes:
        want_text = " or ".join(str(sh) for sh in shapes)
        raise ValueError(f"sluice_client: the answer's {name} have shape {a.shape}; want {want_text}")
    return a


def assemble(
    answers: List[Answer],
    bounds: List[Tuple[int, int]],
    rows: int,
    dim: int,
    gradient: bool,
    log_density: bool,
    hessian: bool,
    hessian_vector: bool,
    replicates: int,
) -> Answer:
    """One Answer for the whole frame from the blocks' answers, each
    quantity asked for checked per block (present, of the block's shape)
    and copied into one row-major array; quantities not asked for are left
    out."""
    out = Answer()
    if gradient:
        g = np.empty((rows, replicates, dim))
        for ans, (a, b) in zip(answers, bounds):
            n = b - a
            shapes = [(n, replicates, dim)] if replicates > 1 else [(n, dim), (n, 1, dim)]
            g[a:b] = shaped("gradients", ans.gradients, *shapes).reshape(n, replicates, dim)
        out.gradients = g if replicates > 1 else g.reshape(rows, dim)
    if log_density:
        ld = np.empty(rows)
        for ans, (a, b) in zip(answers, bounds):
            ld[a:b] = shaped("log_densities", ans.log_densities, (b - a,))
        out.log_densities = ld
    if hessian:
        h = np.empty((rows, dim, dim))
        for ans, (a, b) in zip(answers, bounds):
            h[a:b] = shaped("hessians", ans.hessians, (b - a, dim, dim))
        out.hessians = h
    if hessian_vector:
        hv = np.empty((rows, dim))
        for ans, (a, b) in zip(answers, bounds):
            hv[a:b] = shaped("hessian_vectors", ans.hessian_vectors, (b - a, dim))
        out.hessian_vectors = hv
    return out
