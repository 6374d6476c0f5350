"""Run by test_executor.MPIExecutorTests under
`mpiexec -n 3 python3 -m mpi4py.futures mpi_identical.py`: rank 0 runs
this file with mpi4py's MPIPoolExecutor, whose workers are the other two
ranks, and checks that the draws of the live sessions are those of the
same sessions without an executor. Needs SLUICE_TARGET."""

from __future__ import annotations

import sys

import numpy as np
from mpi4py.futures import MPIPoolExecutor

from test_executor import live_sessions


def main() -> int:
    want = live_sessions(None)
    with MPIPoolExecutor() as pool:
        got = live_sessions(pool, 2)
    for (wd, wc), (gd, gc), kernel in zip(want, got, ("lmc", "mala", "ozaki")):
        if not (np.array_equal(wc, gc) and np.array_equal(wd, gd)):
            print(f"mpi: draws differ with kernel {kernel}")
            return 1
    print("mpi: identical draws (lmc, mala, ozaki)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
