"""Planner factories used by the sweep tests. They live in an importable module (not in a test file or a conftest)
so that spawned pool workers and Dask workers can import them by their import path, as they would a real
planner's module (``tests.sweep.sweep_planners:rules_twin``)."""

from __future__ import annotations

import os

import numpy as np

from wmplan.plan.base import Decision, RulePlanner

CRASH_DENSITY = 36.0
"""The lane-1 density of the cells that the failing planners fail on."""


def rules_twin(params, **options):
    """The rule-based ego under another name: with the same seeds it must give the same rows as "rules"."""
    return RulePlanner(params)


class _Gentle(RulePlanner):
    def decide(self, obs):
        d = super().decide(obs)
        return Decision(actions=d.actions * np.array([0.5, 1.0]))


def gentle(params, **options):
    """A different planner: the rule-based ego with its accelerations halved (enough to tell the planners apart)."""
    return _Gentle(params)


def _dense(params) -> bool:
    return bool(np.isclose(params.scenario.traffic.density_veh_per_km[1], CRASH_DENSITY))


def raises_on_dense(params, **options):
    """Like "rules", but raises on the cells with lane-1 density CRASH_DENSITY (a bug in a planner)."""
    if _dense(params):
        raise RuntimeError("planner bug on a dense cell")
    return RulePlanner(params)


def exits_on_dense(params, **options):
    """Like "rules", but the worker process dies on the dense cells (a killed worker)."""
    if _dense(params):
        os._exit(3)
    return RulePlanner(params)


FLAKY_ENV = "WMPLAN_TEST_FLAKY"
"""How ``flaky`` behaves on the dense cells: "raise", "exit" or anything else (work like "rules"); read in the
worker, which inherits the environment."""


def flaky(params, **options):
    """ "rules", or on the dense cells a planner bug or a dying worker, as the environment variable FLAKY_ENV says."""
    mode = os.environ.get(FLAKY_ENV, "")
    if mode == "raise":
        return raises_on_dense(params)
    if mode == "exit":
        return exits_on_dense(params)
    return RulePlanner(params)
