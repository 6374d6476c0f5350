"""Tests of work(): Python workers attached to a running session (the
Attach rpc) share its rows, and the draws are those of one client answering
everything, bit for bit (the server draws the noise; the kernel sees one
complete answer per request however the rows were shared).

Needs a running `sluice serve` whose address is in SLUICE_TARGET
(client/python/python_test.go starts one).
"""

from __future__ import annotations

import threading
import time
import unittest
from typing import List

import numpy as np

import sluice_client as sc
from test_sluice_client import DEADLINE_SECONDS, require_target


def grad(x: np.ndarray) -> np.ndarray:
    """Gradient of log pi for N(0, I)."""
    return -x


def spec(owner_evaluates: bool) -> sc.Spec:
    return sc.Spec(dim=3, chains=12, start=np.array([1.0, -1.0, 0.5]), step=0.1, burn_in=5,
                   draws_per_chain=40, seed=404, owner_evaluates=owner_evaluates)


def draws_of(s: sc.Session) -> List[np.ndarray]:
    return [e.values.copy() for e in s if isinstance(e, sc.Draws)]


class WorkTests(unittest.TestCase):
    def test_workers_give_the_one_client_draws(self) -> None:
        target = require_target()
        one = draws_of(sc.Session(target, spec(True), grad, timeout=DEADLINE_SECONDS))
        for n in (1, 3):
            errors: List[BaseException] = []
            threads: List[threading.Thread] = []

            def start_workers(r: sc.Registered) -> None:
                for i in range(n):
                    delay = 0.0005 * i  # different speeds

                    def slow_grad(x: np.ndarray, delay: float = delay) -> np.ndarray:
                        time.sleep(delay * x.shape[0])
                        return grad(x)

                    def run(i: int = i, fn=slow_grad) -> None:
                        try:
                            sc.work(target, r.session_id, r.resume_token, fn, name=f"py-{i}", timeout=DEADLINE_SECONDS)
                        except BaseException as err:  # reported below
                            errors.append(err)

                    t = threading.Thread(target=run)
                    t.start()
                    threads.append(t)

            s = sc.Session(target, spec(False), grad, timeout=DEADLINE_SECONDS, on_registered=start_workers)
            pooled = draws_of(s)
            for t in threads:
                t.join(DEADLINE_SECONDS)
            self.assertEqual(errors, [])
            assert s.summary is not None
            # CHECK_FAILED (a short run's verdict) still delivers every draw.
            self.assertIn(s.summary.reason, (sc.FinishReason.DRAWS_COLLECTED, sc.FinishReason.CHECK_FAILED))
            a, b = np.concatenate(one), np.concatenate(pooled)
            self.assertEqual(a.shape, b.shape)
            self.assertTrue(np.array_equal(a.view(np.uint64), b.view(np.uint64)), f"{n} workers: draws differ")

    def test_wrong_token_is_refused(self) -> None:
        target = require_target()
        with self.assertRaises(sc.SessionError) as ctx:
            sc.work(target, "no-such-session", "0" * 32, grad, timeout=DEADLINE_SECONDS)
        self.assertEqual(ctx.exception.code.name, "NOT_FOUND")


if __name__ == "__main__":
    unittest.main()
