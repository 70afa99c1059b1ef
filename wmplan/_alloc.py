"""Keep freed memory in the process instead of handing it back to the operating system at once (glibc only).

The engine and the forward model make many short-lived arrays of 0.1-30 MB. By default glibc serves blocks above
a threshold with fresh memory maps and returns freed memory at the top of the heap to the system, so the next
array of the same size starts on untouched pages, and every page costs a fault in the kernel. On a 30-episode
closed-loop evaluation that was measured here at 4.8 million page faults and 12 s of system time out of 59 s of wall
time; with the settings below, 0.23 million and 0.7 s, and 45 s of wall time (``wmplan evaluate onramp-merge
--episodes 30 --planners mpc+latent --threads 1``, one machine, loaded).

``mallopt`` (glibc, ``man 3 mallopt``): blocks up to 32 MB come from the heap (``M_MMAP_THRESHOLD``, its maximum on
64-bit systems), and up to 512 MB of free heap is kept (``M_TRIM_THRESHOLD``). The price is a resident size that
stays near its peak. The ``wmplan`` command calls :func:`tune_malloc` at its start (importing the package does not; a
long Python session may call it itself). Set the environment variable ``WMPLAN_MALLOC_TUNING=0`` to leave the
allocator alone; on systems without glibc nothing happens.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
MMAP_THRESHOLD_BYTES = 32 * 1024 * 1024
TRIM_THRESHOLD_BYTES = 512 * 1024 * 1024

applied = False


def tune_malloc() -> bool:
    """Apply the settings once; True if glibc took them."""
    global applied
    if applied:
        return True
    if os.environ.get("WMPLAN_MALLOC_TUNING", "1") == "0" or not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
    ok &= mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES) == 1
    applied = bool(ok)
    return applied
