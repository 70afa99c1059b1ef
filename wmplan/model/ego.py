"""The ego's own motion over a plan, by the kinematic bicycle model, in torch.

The forward model does not learn the ego's motion: the planner knows its own vehicle, so the ego is propagated
by the same kinematic bicycle model the simulator uses (Rajamani 2012, section 2.2), with the same clipping of
the actions to the scenario's limits and the same steering-rate limit, integrated at the simulator's step. This
keeps the model's capacity for what is uncertain (the other drivers) and makes the ego's predicted path exact.
:mod:`wmplan.sim.bicycle` is the numpy original; a test checks that both agree.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch


@dataclass(frozen=True)
class EgoKinematics:
    """Vehicle and limits of the ego, as the scenario states them (SI units)."""

    wheelbase_m: float
    l_r_m: float
    max_accel_mps2: float
    max_brake_mps2: float
    max_steer_rad: float
    max_steer_rate_radps: float
    sim_dt_s: float
    substeps: int
    """Simulator steps per plan step (an action is held for this many steps)."""

    @classmethod
    def from_scenario(cls, scn, plan_dt_s: float) -> EgoKinematics:
        sub = int(round(plan_dt_s / scn.dt_s))
        return cls(scn.ego.wheelbase_m, scn.ego.l_r_m, scn.limits.max_accel_mps2, scn.limits.max_brake_mps2,
                   scn.limits.max_steer_rad, scn.limits.max_steer_rate_radps, scn.dt_s, sub)

    def clip_actions(self, actions: torch.Tensor, steer0_rad: torch.Tensor) -> torch.Tensor:
        """Actions (..., H, 2) as the simulator would apply them: clipped to the limits and, for steering, to the
        rate limit from ``steer0_rad`` (...,) held over ``substeps`` simulator steps (the applied value of the last
        substep is returned for each plan step)."""
        acc = actions[..., 0].clamp(-self.max_brake_mps2, self.max_accel_mps2)
        want = actions[..., 1].clamp(-self.max_steer_rad, self.max_steer_rad)
        max_d = self.max_steer_rate_radps * self.sim_dt_s
        steer = steer0_rad
        out = []
        for h in range(actions.shape[-2]):
            for _ in range(self.substeps):
                steer = torch.minimum(torch.maximum(want[..., h], steer - max_d), steer + max_d)
            out.append(steer)
        return torch.stack([acc, torch.stack(out, dim=-1)], dim=-1)

    def substep(self, x, y, psi, v, steer, accel, steer_cmd):
        """One simulator step: steering rate-limited toward ``steer_cmd``, then the bicycle; tensors broadcast.

        Returns (x, y, psi, v, steer, beta) after the step.
        """
        max_d = self.max_steer_rate_radps * self.sim_dt_s
        dt = self.sim_dt_s
        steer = torch.minimum(torch.maximum(steer_cmd, steer - max_d), steer + max_d)
        beta = torch.atan(self.l_r_m / self.wheelbase_m * torch.tan(steer))
        v_new = v + accel * dt
        stops = v_new < 0
        safe_a = torch.where(accel < 0, accel, -torch.ones_like(accel))
        stop_dist = torch.where(accel < 0, -v * v / (2.0 * safe_a), torch.zeros_like(accel))
        dist = torch.where(stops, stop_dist, v * dt + 0.5 * accel * dt * dt)
        x = x + dist * torch.cos(psi + beta)
        y = y + dist * torch.sin(psi + beta)
        psi = psi + dist / self.l_r_m * torch.sin(beta)
        return x, y, psi, v_new.clamp_min(0.0), steer, beta

    def rollout(self, speed0_mps: torch.Tensor, steer0_rad: torch.Tensor, actions: torch.Tensor,
                heading0_rad: torch.Tensor | None = None) -> torch.Tensor:
        """Ego rows over a plan; the ego starts at the origin with heading ``heading0_rad`` (0: the anchor frame).

        Args:
            speed0_mps: (...,) speed at the anchor.
            steer0_rad: (...,) steering angle applied just before the anchor.
            actions: (..., H, 2) (acceleration, steering angle) per plan step, clipped here to the limits.
            heading0_rad: (...,) initial heading; default 0.

        Returns:
            (..., H, 5): x, y, vx, vy, heading after each plan step.
        """
        acc_all = actions[..., 0].clamp(-self.max_brake_mps2, self.max_accel_mps2)
        want = actions[..., 1].clamp(-self.max_steer_rad, self.max_steer_rad)
        shape = actions.shape[:-2]
        x = torch.zeros(shape, dtype=actions.dtype)
        y = torch.zeros_like(x)
        psi = torch.zeros_like(x) if heading0_rad is None else heading0_rad.to(actions.dtype).expand(shape)
        v = speed0_mps.to(actions.dtype).expand(shape)
        steer = steer0_rad.to(actions.dtype).expand(shape)
        rows = []
        for h in range(actions.shape[-2]):
            for _ in range(self.substeps):
                x, y, psi, v, steer, beta = self.substep(x, y, psi, v, steer, acc_all[..., h], want[..., h])
            rows.append(torch.stack([x, y, v * torch.cos(psi + beta), v * torch.sin(psi + beta), psi], dim=-1))
        return torch.stack(rows, dim=-2)
