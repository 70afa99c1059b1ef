"""Planners and predictors of the crafted triage cases (importable by path: ``tests.triage.plugins:...``).

Invented for the tests; they drive nothing but the crafted scenarios beside this file.
"""

from __future__ import annotations

import numpy as np

from wmplan.evaluate.planners import make_mpc
from wmplan.plan.base import Decision
from wmplan.plan.mpc import CostWeights, PlannerConfig
from wmplan.plan.predictors import Predictor, builtin_predictor
from wmplan.sim.features import F_VALID


class _Held:
    """A planner that applies one fixed command at every decision (0.2 s) and predicts no risk."""

    decision_dt_s = 0.2
    horizon_decisions = 1

    def __init__(self, accel_mps2: float):
        self.accel_mps2 = accel_mps2

    def reset(self, episode_keys: np.ndarray) -> None:
        """Nothing to remember."""

    def decide(self, obs) -> Decision:
        """The fixed command for every episode of the batch."""
        b = obs.state.num_scenes
        return Decision(actions=np.tile([self.accel_mps2, 0.0], (b, 1)))


def cruise_planner(params):
    """Keeps its speed and its heading, whatever is ahead."""
    return _Held(0.0)


def standstill_planner(params):
    """Stays where it is (full braking at a standstill)."""
    return _Held(-params.max_brake_mps2)


class _Blind(Predictor):
    """Constant-velocity futures with every other vehicle removed: it ignores all traffic (and so any cut-in)."""

    name = "blind"

    def __init__(self, inner: Predictor):
        self.inner = inner

    def predict(self, ctx, actions, num_futures, *, generator):
        rows = self.inner.predict(ctx, actions, num_futures, generator=generator).clone()
        rows[..., 1:, F_VALID] = 0.0
        return rows


def blind_predictor(params, horizon, plan_dt_s):
    """The predictor of ``mpc+tests.triage.plugins:blind_predictor``."""
    return _Blind(builtin_predictor("constant-velocity", params, horizon=horizon, plan_dt_s=plan_dt_s))


def reckless_oracle(params):
    """The sampling planner over the oracle's futures, with a cost that ignores every risk and rewards speed."""
    weights = CostWeights(progress=5.0, collision=0.0, from_behind=0.0, cvar=0.0, ttc=0.0, headway=0.0)
    return make_mpc("oracle", params, config=PlannerConfig(weights=weights))
