"""The engine on several cores of one process: scenes split into contiguous chunks, one chunk per thread.

Scenes never interact and every random draw is a hash of the scene's own key and step, so a chunk advanced on its
own gives bit for bit what it gives inside the whole batch (the determinism tests check this across batch sizes).
numpy releases the interpreter lock inside its array loops, so two threads stepping two halves of a batch overlap
most of their work; the Python between the numpy calls still runs one thread at a time, so only large batches
gain. Measured side by side on a 2-core machine while this module was written (open-road stepping, and the oracle
itself): 512 scenes ran at about half the one-thread speed on two threads, 2048 about even, and the oracle's 8192
futures (16 scenes x 64 plans x 8) 1.8x faster. ``benchmarks/sim_throughput.py`` (``threaded``) keeps measuring
the large-batch case.

The thread count is ``WMPLAN_SIM_THREADS`` if set, else the number of cores this process may use, at most 4.
Workers of a process pool (sweeps, stress tests) set it to 1, so that N workers use N cores, not N^2 threads.
Batches smaller than ``MIN_SCENES_PER_THREAD`` per thread are not split.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

import numpy as np

from wmplan.errors import ConfigError

T = TypeVar("T")
ENV_VAR = "WMPLAN_SIM_THREADS"
MAX_DEFAULT_THREADS = 4
MIN_SCENES_PER_THREAD = 2048

_pool_lock = threading.Lock()
_pools: dict[int, ThreadPoolExecutor] = {}


def sim_threads() -> int:
    """Threads the engine may use in this process (see the module docstring)."""
    raw = os.environ.get(ENV_VAR)
    if raw is not None:
        try:
            n = int(raw)
        except ValueError:
            n = 0
        if n < 1:
            raise ConfigError(f"environment variable {ENV_VAR}={raw!r}: must be a whole number >= 1")
        return n
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, MAX_DEFAULT_THREADS))


def chunk_bounds(num_scenes: int, threads: int) -> list[tuple[int, int]]:
    """Contiguous [start, stop) ranges of scenes, one per thread used (fewer for small batches)."""
    n = max(1, min(int(threads), num_scenes // MIN_SCENES_PER_THREAD))
    edges = np.linspace(0, num_scenes, n + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def _pool(threads: int) -> ThreadPoolExecutor:
    with _pool_lock:
        pool = _pools.get(threads)
        if pool is None:
            pool = _pools[threads] = ThreadPoolExecutor(threads, thread_name_prefix="wmplan-sim")
        return pool


def map_chunks(fn: Callable[[int, int], T], num_scenes: int, threads: int | None = None) -> list[T]:
    """Call ``fn(start, stop)`` for each chunk of scenes, in parallel threads; results in chunk order.

    ``fn`` must touch only its own scenes (it may write into its own rows of shared output arrays). An exception in
    any chunk is raised here, after every chunk has finished.
    """
    bounds = chunk_bounds(num_scenes, sim_threads() if threads is None else threads)
    if len(bounds) == 1:
        return [fn(*bounds[0])]
    futures = [_pool(len(bounds)).submit(fn, a, b) for a, b in bounds]
    errors = [f.exception() for f in futures]
    for err in errors:
        if err is not None:
            raise err
    return [f.result() for f in futures]
