"""Slow reference paths of the forward model, kept for the tests (imported by name, like ``model_helpers``).

``reference_sample`` is ``WorldModel.sample`` as it was written before its speed-up, built from the model's own
modules: the plan encoder, the prior and the decoder run on their full inputs (the plan encoder on the relative
positions per object and step; the prior and decoder on ``cat([h, p])`` and ``cat([h, p, z])`` expanded to every
plan and sample), the ego path comes from the step-by-step simulator loop, and the rows are assembled by
concatenation. The tests compare the fast path against it; it is deliberately plain, not fast.
"""

from __future__ import annotations

import math

import torch

from wmplan.model.ego import EgoKinematics
from wmplan.model.nets import (
    POS_SCALE_X_M,
    POS_SCALE_Y_M,
    RESIDUAL_SCALE_M,
    VEL_SCALE_X_MPS,
    VEL_SCALE_Y_MPS,
    gaussian_params,
    randn_rows,
)
from wmplan.sim.features import F_LENGTH, NUM_VEHICLE_FEATURES


def stepwise_rollout(ego: EgoKinematics, speed0, steer0, actions, heading0=None) -> torch.Tensor:
    """The ego rollout as a Python loop over plan steps and substeps, one ``substep`` (the simulator's step) each.
    Returns (..., H, 5) rows x, y, vx, vy, heading."""
    acc_all = actions[..., 0].clamp(-ego.max_brake_mps2, ego.max_accel_mps2)
    want = actions[..., 1].clamp(-ego.max_steer_rad, ego.max_steer_rad)
    shape = actions.shape[:-2]
    x = torch.zeros(shape, dtype=actions.dtype)
    y = torch.zeros_like(x)
    psi = torch.zeros_like(x) if heading0 is None else heading0.to(actions.dtype).expand(shape)
    v = speed0.to(actions.dtype).expand(shape)
    steer = steer0.to(actions.dtype).expand(shape)
    rows = []
    for h in range(actions.shape[-2]):
        for _ in range(ego.substeps):
            x, y, psi, v, steer, beta = ego.substep(x, y, psi, v, steer, acc_all[..., h], want[..., h])
        rows.append(torch.stack([x, y, v * torch.cos(psi + beta), v * torch.sin(psi + beta), psi], dim=-1))
    return torch.stack(rows, dim=-2)


def reference_plan(plan, obj_xy: torch.Tensor, ego_future: torch.Tensor, actions: torch.Tensor) -> torch.Tensor:
    """The plan encoder on its full input (B, C, N, 6 H): relative positions, ego velocities and actions per object
    and step, each divided by its scale."""
    rel = (ego_future[:, :, None, :, :2] - obj_xy[:, None, :, None, :]) / torch.tensor([POS_SCALE_X_M, POS_SCALE_Y_M])
    vel = (ego_future[..., 2:4] / torch.tensor([VEL_SCALE_X_MPS, VEL_SCALE_Y_MPS]))[:, :, None]
    act = (actions / plan.action_scale)[:, :, None]
    n = obj_xy.shape[1]
    feats = torch.cat([rel, vel.expand(-1, -1, n, -1, -1), act.expand(-1, -1, n, -1, -1)], dim=-1)
    return plan.net(feats.flatten(-2))


def reference_rows(model, hist: torch.Tensor, xy: torch.Tensor, ego_f: torch.Tensor) -> torch.Tensor:
    """Rows (B, C, K, H, N, F) by concatenation: velocities by differences from the last history row, headings
    atan2(vy, max(vx, 0.1)), the ego's row from its path, sizes and validity from the last history row, every
    feature of an empty slot multiplied by its validity 0."""
    dt = model.cfg.plan_dt_s
    last = hist[:, -1]
    b, c, k, n, hz, _ = xy.shape
    pos = xy.transpose(-2, -3)
    prev = torch.cat([last[:, None, None, None, :, :2].expand(b, c, k, 1, n, 2), pos[..., :-1, :, :]], dim=-3)
    vel = (pos - prev) / dt
    ego = ego_f[:, :, None, :, None, :].expand(b, c, k, hz, 1, 5)
    pos = torch.cat([ego[..., :2], pos[..., 1:, :]], dim=-2)
    vel = torch.cat([ego[..., 2:4], vel[..., 1:, :]], dim=-2)
    heading = torch.atan2(vel[..., 1], vel[..., 0].clamp_min(0.1))
    heading = torch.cat([ego[..., 4], heading[..., 1:]], dim=-1)
    static = last[:, None, None, None, :, F_LENGTH:].expand(b, c, k, hz, n, NUM_VEHICLE_FEATURES - F_LENGTH)
    rows = torch.cat([pos, vel, heading[..., None], static], dim=-1)
    return rows * (static[..., -1:] > 0.5)


def reference_sample(model, batch: dict, actions: torch.Tensor, k: int, *, generator, noise: bool = False) -> dict:
    """What ``model.sample`` returns, the slow way (same random draws, in the same order)."""
    cfg = model.cfg
    hist = batch["history"]
    b, c = actions.shape[:2]
    n = hist.shape[2]
    hz = cfg.horizon
    with torch.inference_mode():
        h = model.encoder(hist, batch["road"])
        ego_f = stepwise_rollout(model.ego, batch["ego_speed_mps"][:, None], batch["ego_steer_rad"][:, None], actions)
        p = reference_plan(model.plan, hist[:, -1, :, :2], ego_f, actions)
        hb = h[:, None].expand(b, c, n, -1)
        if model.zdim:
            p_mu, p_lv = gaussian_params(model.prior(torch.cat([hb, p], -1)))
            eps = randn_rows((b, 1, k, n, model.zdim), generator)
            z = p_mu[:, :, None] + (0.5 * p_lv[:, :, None]).exp() * eps
            x = torch.cat([hb[:, :, None].expand(b, c, k, n, -1), p[:, :, None].expand(b, c, k, n, -1), z], -1)
            mean, logvar = gaussian_params(model.decoder(x))
            mean = mean.reshape(*mean.shape[:-1], hz, 2) * RESIDUAL_SCALE_M
            logvar = logvar.reshape(*logvar.shape[:-1], hz, 2) + 2.0 * math.log(RESIDUAL_SCALE_M)
        else:
            mean, _ = gaussian_params(model.decoder(torch.cat([hb, p], -1)))
            mean = (mean.reshape(*mean.shape[:-1], hz, 2) * RESIDUAL_SCALE_M)[:, :, None].expand(b, c, k, n, hz, 2)
            logvar = model.fitted_logvar.expand(b, c, k, n, hz, 2)
        logvar = logvar + 2.0 * torch.log(model.noise_scale)
        xy = model.cv_positions(hist)[:, None, None] + mean
        if noise:
            xy = xy + (0.5 * logvar).exp() * randn_rows(tuple(xy.shape), generator)
        return {"rows": reference_rows(model, hist, xy, ego_f), "mean": mean, "logvar": logvar}
