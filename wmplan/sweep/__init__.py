"""Declarative scenario sweeps: sweep files, their cells, and a resumable cell runner.

See :mod:`wmplan.sweep.spec` for the file format and :mod:`wmplan.sweep.runner` for executors and the output
folder. Every cell's episodes run through the one closed loop (:func:`wmplan.evaluate.closed_loop.run_episodes`)
with a planner spec of :mod:`wmplan.evaluate.planners`.
"""

from wmplan.sweep.cells import Cell, expand_cells
from wmplan.sweep.runner import read_results, run_sweep
from wmplan.sweep.spec import (
    RandomRange,
    Sweep,
    SweepError,
    SweepSpec,
    load_sweep,
    parse_sweep,
    sweep_from_yaml,
)

__all__ = [
    "Cell",
    "RandomRange",
    "Sweep",
    "SweepError",
    "SweepSpec",
    "expand_cells",
    "load_sweep",
    "parse_sweep",
    "read_results",
    "run_sweep",
    "sweep_from_yaml",
]
