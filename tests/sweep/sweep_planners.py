"""Planners used by the sweep tests. They live in an importable module (not in a test file or a conftest) so that
spawned pool workers and Dask workers can import them by reference, as they would a real planner's module."""

from __future__ import annotations

import os

import numpy as np

from wmplan.sweep.episodes import rules_episodes

CRASH_DENSITY = 36.0
"""The lane-1 density of the cells that the failing planners fail on."""


def rules_twin(scenario, seeds, **options):
    """The rule-based ego under another name: with the same seeds it must give the same outcomes as "rules"."""
    return rules_episodes(scenario, seeds, **options)


def gentle(scenario, seeds, **options):
    """A different planner: the rule-based ego's rows with progress halved (enough to tell the planners apart)."""
    rows = rules_episodes(scenario, seeds)
    return [{**r, "progress_m": 0.5 * r["progress_m"], "note": "gentle"} for r in rows]


def raises_on_dense(scenario, seeds, **options):
    """Like "rules", but raises on the cells with lane-1 density CRASH_DENSITY (a bug in a planner)."""
    if np.isclose(scenario.traffic.density_veh_per_km[1], CRASH_DENSITY):
        raise RuntimeError("planner bug on a dense cell")
    return rules_episodes(scenario, seeds)


def exits_on_dense(scenario, seeds, **options):
    """Like "rules", but the worker process dies on the dense cells (a killed worker)."""
    if np.isclose(scenario.traffic.density_veh_per_km[1], CRASH_DENSITY):
        os._exit(3)
    return rules_episodes(scenario, seeds)
