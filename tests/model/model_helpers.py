"""Helpers shared by the forward-model tests (imported by name, like ``tests/sweep/sweep_planners.py``): tiny
configurations and hand-built batches in the ``WindowBatch`` dict format."""

from __future__ import annotations

import torch

from wmplan.model.config import ModelConfig, TrainConfig
from wmplan.model.ego import EgoKinematics
from wmplan.sim.features import (
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_WIDTH,
    F_X,
    F_Y,
    NUM_VEHICLE_FEATURES,
)

SCENARIO = "onramp-merge"


def tiny_model_config(**changes) -> ModelConfig:
    """A small model with the dataset's default window (history 5, horizon 15, 8 objects)."""
    base = dict(d_model=16, num_heads=2, hidden=32, num_layers=1, latent_dim=2)
    base.update(changes)
    return ModelConfig(**base)


def tiny_train_config(**changes) -> TrainConfig:
    """2 epochs of 10 steps of batch 64 on one thread (seed 0)."""
    base = dict(max_epochs=2, steps_per_epoch=10, batch_size=64, threads=1, seed=0, kl_warmup_epochs=2)
    base.update(changes)
    return TrainConfig(**base)


# --- hand-built batches --------------------------------------------------------------------------------------------

TOY_EGO = EgoKinematics(
    wheelbase_m=2.7,
    l_r_m=1.35,
    max_accel_mps2=3.0,
    max_brake_mps2=8.0,
    max_steer_rad=0.5,
    max_steer_rate_radps=0.5,
    sim_dt_s=0.1,
    substeps=2,
)
"""An ego with round-number limits (invented for the toy batches; not a scenario's)."""


def straight_batch(
    num: int,
    history: int,
    horizon: int,
    *,
    dt_s: float = 0.2,
    speed_mps: float = 20.0,
    gap_m: torch.Tensor | float = 20.0,
    future_dy_m: torch.Tensor | float = 0.0,
    future_dx_m: torch.Tensor | float = 0.0,
) -> dict[str, torch.Tensor]:
    """A batch in the ``WindowBatch`` dict format with two objects: the ego (row 0) and one vehicle ahead in the
    same lane, both driving straight at ``speed_mps``; the vehicle's future rows are its constant-velocity path
    plus ``future_dx_m`` / ``future_dy_m`` (scalars or (B,)) times the fraction of the horizon elapsed.

    Shapes: history (B, W, 2, F), future (B, H, 2, F), road (B, 6), actions (B, H, 2) zeros, ego_speed_mps (B,),
    ego_steer_rad (B,) zeros.
    """
    gap = torch.as_tensor(gap_m, dtype=torch.float32).expand(num)
    t_hist = (torch.arange(history, dtype=torch.float32) - (history - 1)) * dt_s  # (W,) ... 0
    t_fut = torch.arange(1, horizon + 1, dtype=torch.float32) * dt_s  # (H,)
    frac = t_fut / t_fut[-1]
    hist = torch.zeros(num, history, 2, NUM_VEHICLE_FEATURES)
    fut = torch.zeros(num, horizon, 2, NUM_VEHICLE_FEATURES)
    for rows, t in ((hist, t_hist), (fut, t_fut)):
        rows[..., 0, F_X] = speed_mps * t
        rows[..., 1, F_X] = gap[:, None] + speed_mps * t
        rows[..., F_VX] = speed_mps
        rows[..., F_VY] = 0.0
        rows[..., F_HEADING] = 0.0
        rows[..., F_LENGTH] = 4.5
        rows[..., F_WIDTH] = 1.8
        rows[..., F_VALID] = 1.0
    fut[..., 1, F_X] += torch.as_tensor(future_dx_m, dtype=torch.float32).reshape(-1, 1) * frac
    fut[..., 1, F_Y] += torch.as_tensor(future_dy_m, dtype=torch.float32).reshape(-1, 1) * frac
    road = torch.tensor([0.0, 500.0, 1.0, 1.0, 500.0, 500.0]).expand(num, 6).clone()
    return {
        "history": hist,
        "future": fut,
        "road": road,
        "actions": torch.zeros(num, horizon, 2),
        "ego_speed_mps": torch.full((num,), float(speed_mps)),
        "ego_steer_rad": torch.zeros(num),
    }
