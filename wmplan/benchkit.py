"""Helpers shared by the scripts under ``benchmarks/``: the machine's description, timers, the command line and
the JSON output. (In the package, not beside the scripts, so that a script imports it the same way whether it
runs as ``python benchmarks/NAME.py``, is loaded by path by ``wmplan bench``, or is imported by a test.)"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from collections.abc import Callable
from pathlib import Path

from wmplan.caution import CAUTION  # noqa: F401  (every benchmark's JSON carries it under "caution")


def load_avg() -> float | None:
    """The 1-minute load average, None where the system does not report it."""
    return os.getloadavg()[0] if hasattr(os, "getloadavg") else None


def machine(**extra) -> dict:
    """Platform, processor, Python and numpy versions, core count and the load average now (plus ``extra``)."""
    import numpy as np

    out = {
        "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "cpu_count": os.cpu_count(),
        "load_avg_1min_at_start": load_avg(),
    }
    if "numba" in sys.modules:
        out["numba"] = sys.modules["numba"].__version__
    if "torch" in sys.modules:
        out["torch"] = sys.modules["torch"].__version__
    out.update(extra)
    return out


def timed(fn: Callable[[], object], repeats: int) -> tuple[list[float], list[float], object]:
    """Wall-clock and process-CPU seconds of ``repeats`` calls of ``fn``, and the last call's result."""
    wall, cpu, out = [], [], None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return wall, cpu, out


def main(
    run: Callable[..., dict],
    description: str,
    argv: list[str] | None = None,
    add_arguments: Callable[[argparse.ArgumentParser], None] | None = None,
) -> int:
    """The command line of a benchmark: ``--quick``, ``--json FILE`` (written atomically) and any arguments
    ``add_arguments`` adds (passed to ``run`` by name); prints the result as JSON, with the ``caution`` key."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("--json", metavar="FILE", help="also write the results to FILE (atomically)")
    parser.add_argument("--quick", action="store_true", help="short runs (a smoke test, not for numbers)")
    if add_arguments is not None:
        add_arguments(parser)
    args = vars(parser.parse_args(argv))
    json_path = args.pop("json")
    result = run(**args)
    result.setdefault("caution", CAUTION)
    if json_path:
        from wmplan.io import atomic_write_json

        atomic_write_json(Path(json_path), result)
    print(json.dumps(result, indent=2))
    return 0
