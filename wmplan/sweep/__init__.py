"""Declarative scenario sweeps: sweep files, closed-loop episode runners, and a resumable cell runner.

See :mod:`wmplan.sweep.spec` for the file format, :mod:`wmplan.sweep.episodes` for planners and episode rows, and
:mod:`wmplan.sweep.runner` for executors and the output folder.
"""

from wmplan.intervals import wilson_interval
from wmplan.sweep.cells import Cell, expand_cells
from wmplan.sweep.episodes import (
    REQUIRED_KEYS,
    closed_loop,
    get_planner,
    planner_names,
    register_planner,
    run_episodes,
    unregister_planner,
)
from wmplan.sweep.mpc_planners import register_mpc_planners
from wmplan.sweep.runner import cli_sweep, read_results, run_sweep
from wmplan.sweep.spec import (
    RandomRange,
    Sweep,
    SweepError,
    SweepSpec,
    load_sweep,
    parse_sweep,
    sweep_from_yaml,
)

register_mpc_planners()

__all__ = [
    "REQUIRED_KEYS",
    "Cell",
    "RandomRange",
    "Sweep",
    "SweepError",
    "SweepSpec",
    "cli_sweep",
    "closed_loop",
    "expand_cells",
    "get_planner",
    "load_sweep",
    "parse_sweep",
    "planner_names",
    "read_results",
    "register_planner",
    "run_episodes",
    "run_sweep",
    "sweep_from_yaml",
    "unregister_planner",
    "wilson_interval",
]
