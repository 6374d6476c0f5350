"""Keeping the pages of large frames: glibc's malloc thresholds.

Every step moves arrays of hundreds of kilobytes through this process: gRPC
copies each received message several times and each answer once more,
numpy allocates the caller's gradients, the client joins the answer's
bytes. glibc's malloc serves a block above its mmap threshold (128 KiB at
start) with a fresh mapping, and gives free memory at the top of a heap
back to the system once it exceeds the trim threshold (twice the mmap
threshold); it raises both as blocks that large are freed, but a few
hundred-kilobyte blocks freed in turn still hand their pages back and take
fresh ones at every step. Each fresh page is a page fault: measured on the
loaded 2-core development machine (a virtual machine), 1.1-1.3 ms to
allocate and fill a 256 KB array, against 3.5 us with the thresholds
raised; the client's own CPU per step at 64 x 1000 in lock step was 5.4
ms with glibc's defaults and 1.5-1.7 ms with them raised (README, "the
client's own CPU").

A session, a worker (:func:`work`) and a follower call
:func:`keep_frame_pages` when they are made. It sets both thresholds to
the largest values glibc's own adjustment reaches (an mmap threshold of 32 MiB, the largest it allows
on 64-bit systems, and a trim threshold of twice that), as the adjustment
would after one 32 MiB block is freed, so it never lowers them below what
glibc could have chosen. The cost: up to 64 MiB of free memory at the top
of each malloc heap stays with the process instead of going back to the
system. It does nothing when the environment already sets malloc's
parameters (MALLOC_MMAP_THRESHOLD_, MALLOC_TRIM_THRESHOLD_,
MALLOC_TOP_PAD_, MALLOC_MMAP_MAX_ or glibc.malloc tunables in
GLIBC_TUNABLES), when SLUICE_CLIENT_MALLOC=keep asks to leave malloc alone,
and where the C library is not glibc."""

from __future__ import annotations

import ctypes
import os
import sys
import threading

#: mallopt parameters (malloc.h).
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3

#: The largest mmap threshold glibc accepts and reaches by itself on 64-bit
#: systems (DEFAULT_MMAP_THRESHOLD_MAX), and the trim threshold its
#: adjustment sets with it.
MMAP_THRESHOLD = 32 << 20
TRIM_THRESHOLD = 2 * MMAP_THRESHOLD

#: The environment variable that leaves malloc alone when set to "keep".
ENV = "SLUICE_CLIENT_MALLOC"

_USER_SETTINGS = ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_", "MALLOC_TOP_PAD_", "MALLOC_MMAP_MAX_")

_lock = threading.Lock()
_done = False
_applied = False


def _glibc() -> "ctypes.CDLL | None":
    if not sys.platform.startswith("linux") or sys.maxsize < 2**32:
        return None
    try:
        libc = ctypes.CDLL("libc.so.6")
        libc.gnu_get_libc_version  # glibc only (musl has no such function)
        libc.mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
        libc.mallopt.restype = ctypes.c_int
    except (OSError, AttributeError):
        return None
    return libc


def keep_frame_pages() -> bool:
    """Raises glibc's malloc thresholds once per process (see the module's
    description); returns whether they are raised."""
    global _done, _applied
    with _lock:
        if _done:
            return _applied
        _done = True
        if os.environ.get(ENV, "") == "keep":
            return False
        if any(k in os.environ for k in _USER_SETTINGS) or "glibc.malloc." in os.environ.get("GLIBC_TUNABLES", ""):
            return False
        libc = _glibc()
        if libc is None:
            return False
        # The trim threshold first: setting either turns glibc's own
        # adjustment off, and the mmap threshold may then stay where it is.
        if libc.mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD) != 1:
            return False
        _applied = libc.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1
        return _applied
