"""Callbacks for the executor tests, at module level so that process
pools, Dask workers and MPI workers can unpickle them by reference
(a test module's nested functions cannot be pickled).

The target is our own: a smooth, non-Gaussian density in any dimension,
log pi(x) = sum_i [-x_i^2 / 2 - a_i log cosh(x_i - c_i)], with a_i in
[0, 0.8] and c_i in [-1, 1] fixed by the dimension. Every quantity is
computed row by row with element-wise numpy operations, so a block of
rows gives bit for bit the values of the same rows within the whole
batch.
"""

from __future__ import annotations

from typing import Tuple

import numpy as np

import sluice_client as sc


def _params(dim: int) -> Tuple[np.ndarray, np.ndarray]:
    return np.linspace(0.0, 0.8, dim), np.linspace(-1.0, 1.0, dim)


def grad(x: np.ndarray) -> np.ndarray:
    """Gradient of log pi: -x - a tanh(x - c)."""
    a, c = _params(x.shape[1])
    return -x - a * np.tanh(x - c)


def log_density(x: np.ndarray) -> np.ndarray:
    """log pi up to a constant."""
    a, c = _params(x.shape[1])
    return np.sum(-0.5 * x * x - a * np.log(np.cosh(x - c)), axis=1)


def hessian_diag(x: np.ndarray) -> np.ndarray:
    """The Hessian of log pi is diagonal: -1 - a (1 - tanh^2(x - c))."""
    a, c = _params(x.shape[1])
    t = np.tanh(x - c)
    return -1.0 - a * (1.0 - t * t)


def answer(b: sc.Batch) -> sc.Answer:
    """Every quantity a Batch can ask for. Replicate j of row r is the
    gradient plus j * 1e-3 * (first_row + r): it depends on the row's
    position in the frame, which checks that a block's first_row is
    shifted to its first row."""
    g = grad(b.points)
    rows, dim = b.points.shape
    if b.replicates > 1:
        shift = 1e-3 * (b.first_row + np.arange(rows))[:, None, None] * np.arange(b.replicates)[None, :, None]
        gradients = g[:, None, :] + shift
    else:
        gradients = g
    h = hessian_diag(b.points)
    hess = None
    if b.want_hessian:
        hess = np.zeros((rows, dim, dim))
        idx = np.arange(dim)
        hess[:, idx, idx] = h
    return sc.Answer(
        gradients=gradients,
        log_densities=log_density(b.points),
        hessians=hess,
        hessian_vectors=None if b.vectors is None else h * b.vectors,
    )


def describe(b: sc.Batch) -> sc.Answer:
    """Answers gradients that record what the block saw: column 0 its
    first_row, column 1 its row count, column 2 the chain, column 3 the
    minibatch group (-2 when None)."""
    rows = b.rows
    g = np.zeros((rows, b.dim))
    g[:, 0] = b.first_row
    g[:, 1] = rows
    g[:, 2] = b.chains
    g[:, 3] = -2 if b.minibatch_groups is None else b.minibatch_groups
    return sc.Answer(gradients=g)


class ModelFailure(Exception):
    """What the failing callback raises."""


#: The request at which failing_answer raises.
FAIL_AT_REQUEST = 6


def failing_answer(b: sc.Batch) -> sc.Answer:
    """Like answer, but raises ModelFailure in the block that does not start
    the frame, from request FAIL_AT_REQUEST on."""
    if b.request_id >= FAIL_AT_REQUEST and b.first_row > 0:
        raise ModelFailure(f"solver diverged in request {b.request_id}")
    return answer(b)


def readonly_grad(x: np.ndarray) -> np.ndarray:
    """Fails unless the points it gets are read-only, as the contract says."""
    if x.flags.writeable:
        raise AssertionError("points are writable on the worker")
    return grad(x)
