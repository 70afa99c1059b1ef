"""Sweep scaling: cells per minute with 1 and 2 workers on the same sweep, and their ratio ``scaling_2x``.

What is measured: ``wmplan.sweep.run_sweep`` on one small sweep (onramp-merge, the rule-based ego, the density of
main lane 1 on a grid, ``episodes_per_cell`` episodes per cell so that a cell takes about a second and the start of
the worker processes does not dominate), into a fresh folder each time, plots off:

* ``cells_per_min["1"]``: ``workers=1`` (cells run one after another in this process);
* ``cells_per_min["2"]``: ``workers=2`` (a spawned process pool; its start-up time is included);
* ``scaling_2x`` = rate with 2 workers / rate with 1; the design target is >= 1.8 on a 2-core machine;
* ``rows_identical``: both runs wrote the same ``results.parquet`` rows, apart from the wall-clock ``decision_ms``
  column (they must).
* ``cpu_seconds``: CPU time of this process and the pool's workers per run; ``cpu_utilisation`` = CPU seconds /
  (workers x wall seconds), below 1 when other programs took the cores; ``scaling_2x_if_idle`` = 2 x CPU(1) / CPU(2),
  the scaling that the 2-worker run's extra work (start-up, transfers) would allow on otherwise idle cores. It is a
  projection, reported beside the measured ``scaling_2x``, not instead of it.

Each configuration is timed ``repeats`` times, alternating 1 and 2 workers, and the median is kept. Wall-clock time
depends on what else the machine is doing: the load average before and after is recorded with the numbers, and
``cpu_count`` tells how many cores there were to share.

Usage: ``python benchmarks/sweep_scaling.py [--quick] [--json FILE]``; ``wmplan bench`` calls :func:`run`.
Importing this module runs nothing.
"""

from __future__ import annotations

import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

from wmplan import benchkit

FULL = dict(num_cells=24, episodes_per_cell=384, repeats=3)
QUICK = dict(num_cells=8, episodes_per_cell=96, repeats=1)
TARGET_SCALING_2X = 1.8


def _sweep(num_cells: int, episodes_per_cell: int):
    from wmplan.sweep import parse_sweep

    densities = [round(8.0 + 2.0 * i, 1) for i in range(num_cells)]
    return parse_sweep(
        {
            "name": "bench-scaling",
            "base": "onramp-merge",
            "vary": {"traffic.density_veh_per_km[1]": densities},
            "planners": ["rules"],
            "seed": 1,
            "episodes_per_cell": episodes_per_cell,
        },
        source="<benchmark>",
    )


def _cpu_s() -> float:
    """CPU seconds of this process plus its finished children (the pool's workers, once the pool is shut down)."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _time_run(sweep, workers: int, root: Path, tag: str) -> tuple[float, float, Path]:
    """(wall seconds, CPU seconds, output folder) of one run."""
    from wmplan.sweep import run_sweep

    out = root / tag
    cpu0, start = _cpu_s(), time.perf_counter()
    run_sweep(sweep, out, workers=workers, progress=False, plots=False)
    return time.perf_counter() - start, _cpu_s() - cpu0, out


def run(quick: bool = False) -> dict:
    """Measure and return the JSON-ready result (see the module docstring)."""
    import pyarrow.parquet as pq

    cfg = QUICK if quick else FULL
    sweep = _sweep(cfg["num_cells"], cfg["episodes_per_cell"])
    machine = benchkit.machine()
    times: dict[int, list[float]] = {1: [], 2: []}
    cpu: dict[int, list[float]] = {1: [], 2: []}
    identical = True
    with tempfile.TemporaryDirectory(prefix="wmplan-bench-sweep-") as tmp:
        root = Path(tmp)
        for r in range(cfg["repeats"]):
            outs = {}
            for workers in (1, 2):
                seconds, cpu_s, outs[workers] = _time_run(sweep, workers, root, f"w{workers}-r{r}")
                times[workers].append(seconds)
                cpu[workers].append(cpu_s)
            tables = [pq.read_table(outs[w] / "results.parquet") for w in (1, 2)]
            identical &= tables[0].drop_columns(["decision_ms"]).equals(tables[1].drop_columns(["decision_ms"]))
    seconds = {w: statistics.median(ts) for w, ts in times.items()}
    cpu_med = {w: statistics.median(cs) for w, cs in cpu.items()}
    rate = {w: 60.0 * cfg["num_cells"] / s for w, s in seconds.items()}
    scaling = rate[2] / rate[1]
    return {
        "cells": cfg["num_cells"],
        "episodes_per_cell": cfg["episodes_per_cell"],
        "repeats": cfg["repeats"],
        "seconds": {str(w): s for w, s in seconds.items()},
        "seconds_all": {str(w): ts for w, ts in times.items()},
        "cells_per_min": {str(w): r for w, r in rate.items()},
        "cpu_seconds": {str(w): c for w, c in cpu_med.items()},
        "cpu_utilisation": {str(w): cpu_med[w] / (w * seconds[w]) for w in seconds},
        "scaling_2x_if_idle": 2.0 * cpu_med[1] / cpu_med[2],
        "scaling_2x": scaling,
        "target_scaling_2x": TARGET_SCALING_2X,
        "meets_target": scaling >= TARGET_SCALING_2X,
        "rows_identical": bool(identical),
        "benchmark": "sweep_scaling",
        "quick": quick,
        "machine": {**machine, "load_avg_1min_at_end": benchkit.load_avg()},
        "caution": benchkit.CAUTION,
    }


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(run, __doc__.splitlines()[0], argv)


if __name__ == "__main__":  # the spawned sweep workers import this file as __mp_main__; they must not rerun it
    sys.exit(main())
