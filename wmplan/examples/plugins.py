"""A planner and a predictor of your own, plugged into wmplan by import path.

Run them with ``wmplan evaluate open-road --planners rules,wmplan.examples.plugins:make_cruise`` (your own planner)
or ``--planners mpc+wmplan.examples.plugins:make_braking_predictor`` (the sampling planner over your own
predictor); the same strings work in a sweep file's ``planners`` and in ``wmplan stress --planner``. Copy this file
into a module of your own and name it instead.
"""

from __future__ import annotations

import numpy as np
import torch

from wmplan.plan.base import Decision, Observation
from wmplan.plan.predictors import DecisionContext, Predictor, builtin_predictor
from wmplan.sim.features import F_VALID, F_VX, F_X
from wmplan.sim.params import SimParams


class SteadyCruise:
    """Keeps its lane and a target speed, braking in proportion to how short the time gap to the car ahead is."""

    decision_dt_s = 0.2  # seconds between decisions
    horizon_decisions = 1  # it predicts no risk, so this is not used

    def __init__(self, params: SimParams, target_speed_mps: float = 25.0, gap_s: float = 2.0):
        self.params = params
        self.target = target_speed_mps
        self.gap_s = gap_s

    def reset(self, episode_keys: np.ndarray) -> None:
        """Nothing random, nothing to remember."""

    def decide(self, obs: Observation) -> Decision:
        """Actions (B, 2): acceleration toward the target speed, less when closing on the car ahead."""
        s = obs.state
        v = s.ego_speed_mps  # (B,)
        ahead = s.valid & (s.x_m > s.x_m[:, :1]) & (np.abs(s.y_m - s.y_m[:, :1]) < 1.5)  # same lane, in front
        ahead[:, 0] = False
        gap = np.where(ahead, s.x_m - s.x_m[:, :1] - 0.5 * (s.length_m + s.length_m[:, :1]), np.inf).min(axis=1)
        headway = gap / np.maximum(v, 1.0)
        accel = 0.6 * (self.target - v) - 3.0 * np.clip(self.gap_s - headway, 0.0, None)
        accel = np.clip(accel, -self.params.max_brake_mps2, self.params.max_accel_mps2)
        return Decision(actions=np.stack([accel, np.zeros_like(accel)], axis=1))


def make_cruise(params: SimParams, target_speed_mps: float = 25.0) -> SteadyCruise:
    """The planner factory wmplan calls: ``factory(params, **options) -> Planner``."""
    return SteadyCruise(params, target_speed_mps)


class BrakingPredictor(Predictor):
    """Constant-velocity futures in which every other vehicle brakes at ``decel_mps2`` (a cautious prediction)."""

    name = "braking"

    def __init__(self, params: SimParams, horizon: int, plan_dt_s: float, decel_mps2: float = 1.5):
        self.base = builtin_predictor("constant-velocity", params, horizon=horizon, plan_dt_s=plan_dt_s)
        self.decel = decel_mps2
        self.plan_dt_s = plan_dt_s

    def predict(self, ctx: DecisionContext, actions: torch.Tensor, num_futures: int, *, generator) -> torch.Tensor:
        """Rows (B, C, K, H, N, F) of constant velocity, then each other vehicle slowed (never reversing)."""
        rows = self.base.predict(ctx, actions, num_futures, generator=generator).clone()
        h = rows.shape[3]
        t = torch.arange(1, h + 1, dtype=rows.dtype) * self.plan_dt_s  # (H,)
        others = rows[..., 1:, :]  # the ego is row 0
        v0 = ctx.history[:, -1, 1:, F_VX].to(rows.dtype)[:, None, None, None, :]  # (B, 1, 1, 1, N-1)
        stop_t = (v0 / self.decel).clamp_min(0.0)
        tt = torch.minimum(t[None, None, None, :, None], stop_t)
        shift = 0.5 * self.decel * tt**2  # distance lost against constant velocity
        valid = others[..., F_VALID] > 0.5
        others[..., F_X] -= torch.where(valid, shift, torch.zeros_like(shift))
        others[..., F_VX] = torch.where(valid, (v0 - self.decel * tt).clamp_min(0.0), others[..., F_VX])
        return rows


def make_braking_predictor(
    params: SimParams, horizon: int, plan_dt_s: float, decel_mps2: float = 1.5
) -> BrakingPredictor:
    """The predictor factory wmplan calls: ``factory(params, horizon=H, plan_dt_s=dt, **options) -> Predictor``."""
    return BrakingPredictor(params, horizon, plan_dt_s, decel_mps2)
