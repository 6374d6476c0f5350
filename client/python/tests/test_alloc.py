"""glibc's malloc thresholds (sluice_client._alloc): with them raised, a
loop that allocates, fills and frees a few 256 KB arrays in turn (as every
step of a session does with its frames) takes no fresh pages from the
kernel after the first rounds; left alone, glibc hands pages back and
faults fresh ones in at every round. The count is the kernel's own
(getrusage's minor page faults, POSIX). Each case runs in a fresh
interpreter, since the thresholds are the process's. No timing."""

from __future__ import annotations

import os
import subprocess
import sys
from typing import Dict, Tuple

import pytest

_SCRIPT = r"""
import resource, sys
import numpy as np
from sluice_client import _alloc
applied = _alloc.keep_frame_pages()
def churn(n):
    for _ in range(n):
        a = np.ones(32768)
        b = a + 1.0
        c = b.tobytes()
        del a, b, c
churn(10)
f0 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
churn(200)
print(int(applied), (resource.getrusage(resource.RUSAGE_SELF).ru_minflt - f0) / 200)
"""

_ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _run(extra: Dict[str, str]) -> Tuple[bool, float]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_") and k not in ("GLIBC_TUNABLES", "SLUICE_CLIENT_MALLOC")}
    env.update(extra)
    env["PYTHONPATH"] = _ROOT + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", _SCRIPT], env=env, capture_output=True, text=True, timeout=300, check=True)
    applied, faults = out.stdout.split()
    return applied == "1", float(faults)


def _glibc() -> bool:
    try:
        return bool(os.confstr("CS_GNU_LIBC_VERSION"))
    except (ValueError, OSError):
        return False


@pytest.mark.skipif(not sys.platform.startswith("linux") or not _glibc(), reason="glibc's malloc only")
def test_raised_thresholds_stop_the_page_faults() -> None:
    applied, faults = _run({})
    assert applied
    # 256 KB arrays are 64 pages each; a round fills three.
    assert faults < 4, faults
    left, faults_left = _run({"SLUICE_CLIENT_MALLOC": "keep"})
    assert not left
    assert faults_left > 32, faults_left  # the churn the raised thresholds avoid


@pytest.mark.skipif(not sys.platform.startswith("linux") or not _glibc(), reason="glibc's malloc only")
@pytest.mark.parametrize("env", [{"MALLOC_TRIM_THRESHOLD_": "1048576"}, {"MALLOC_MMAP_THRESHOLD_": "65536"},
                                 {"GLIBC_TUNABLES": "glibc.malloc.trim_threshold=1048576"}])
def test_settings_of_the_environment_are_kept(env: Dict[str, str]) -> None:
    applied, _ = _run(env)
    assert not applied
