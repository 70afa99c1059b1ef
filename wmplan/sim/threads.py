"""The engine on several cores of one process: scenes split into contiguous chunks, one chunk per thread.

Scenes never interact and every random draw is a hash of the scene's own key and step, so a chunk advanced on its
own gives bit for bit what it gives inside the whole batch (tests/sim/test_threads.py checks this across batch
sizes and thread counts). The compiled step (:mod:`wmplan.sim.kernel`) releases the interpreter lock for its whole
run, so threads of one process share the work of one step with little lost; a step of fewer than
``MIN_SCENES_PER_THREAD`` scenes per thread is not split (handing a chunk to a thread costs some tens of
microseconds). ``benchmarks/sim_throughput.py`` (``threaded``) measures both.

The thread count is ``WMPLAN_SIM_THREADS`` if set, else the number of cores this process may use, at most 4.
Workers of a process pool (sweeps, stress tests) set it to 1, so that N workers use N cores, not N^2 threads.
A call of :func:`map_chunks` from inside one of its own threads runs its chunks one after the other (no nesting).
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
MIN_SCENES_PER_THREAD = 128

_pool_lock = threading.Lock()
_pools: dict[int, ThreadPoolExecutor] = {}
_local = threading.local()  # .worker: True in the pool's threads


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


def _mark_worker() -> None:
    _local.worker = True


def _pool(threads: int) -> ThreadPoolExecutor:
    with _pool_lock:
        pool = _pools.get(threads)
        if pool is None:
            pool = _pools[threads] = ThreadPoolExecutor(
                threads, thread_name_prefix="wmplan-sim", initializer=_mark_worker
            )
        return pool


def map_chunks(fn: Callable[[int, int], T], num_scenes: int, threads: int | None = None) -> list[T]:
    """Call ``fn(start, stop)`` for each chunk of scenes, in parallel threads; results in chunk order.

    ``fn`` must touch only its own scenes (it may write into its own rows of shared output arrays). An exception in
    any chunk is raised here, after every chunk has finished.
    """
    if num_scenes < 2 * MIN_SCENES_PER_THREAD:  # one chunk whatever the thread count
        return [fn(0, num_scenes)]
    bounds = chunk_bounds(num_scenes, sim_threads() if threads is None else threads)
    if len(bounds) == 1 or getattr(_local, "worker", False):
        return [fn(a, b) for a, b in bounds]
    futures = [_pool(len(bounds)).submit(fn, a, b) for a, b in bounds]
    errors = [f.exception() for f in futures]
    for err in errors:
        if err is not None:
            raise err
    return [f.result() for f in futures]
