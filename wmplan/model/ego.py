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
        """The ego of a scenario, stepped ``plan_dt_s / dt_s`` simulator steps per plan step."""
        sub = int(round(plan_dt_s / scn.dt_s))
        return cls(
            scn.ego.wheelbase_m,
            scn.ego.l_r_m,
            scn.limits.max_accel_mps2,
            scn.limits.max_brake_mps2,
            scn.limits.max_steer_rad,
            scn.limits.max_steer_rate_radps,
            scn.dt_s,
            sub,
        )

    def clip_actions(self, actions: torch.Tensor, steer0_rad: torch.Tensor) -> torch.Tensor:
        """Actions (..., H, 2) as the simulator would apply them: clipped to the limits and, for steering, to the
        rate limit from ``steer0_rad`` (...,) held over ``substeps`` simulator steps (the applied value of the last
        substep is returned for each plan step)."""
        acc = actions[..., 0].clamp(-self.max_brake_mps2, self.max_accel_mps2)
        want = actions[..., 1].clamp(-self.max_steer_rad, self.max_steer_rad)
        return torch.stack([acc, self.applied_steer(want, steer0_rad)[..., -1]], dim=-1)

    def applied_steer(self, want_rad: torch.Tensor, steer0_rad: torch.Tensor) -> torch.Tensor:
        """Steering angle of every simulator step, (..., H, substeps), when each command of ``want_rad`` (..., H)
        (already within +-max_steer) is held for ``substeps`` steps and the angle is rate-limited from
        ``steer0_rad`` (...,).

        The rate limiter moves the angle toward the command by at most d = max_steer_rate x sim_dt per step and
        stops on it, so while one command is held the angle after i steps is clamp(command, s - i d, s + i d), s
        the angle when the command began (the same as i limited steps, up to rounding); only the loop over the H
        plan steps remains.
        """
        d = self.max_steer_rate_radps * self.sim_dt_s
        reach = torch.arange(1, self.substeps + 1, dtype=want_rad.dtype) * d  # (substeps,)
        full = reach[-1]  # the most a plan step can move
        s = steer0_rad.to(want_rad.dtype).expand(want_rad.shape[:-1])
        # The angle when each command begins. When every command lies within one plan step's reach of the one
        # before it (the first of the current angle), each command is reached within its step, so each begins
        # where the one before it was reached: the commands shifted by one. Checked with the very comparisons the
        # clamp makes, so the shortcut gives the loop's numbers exactly; otherwise the loop over the plan steps.
        start = torch.cat([s[..., None], want_rad[..., :-1]], dim=-1)  # (..., H)
        early, prev = want_rad[..., :-1], start[..., :-1]
        if not bool(((early >= prev - full) & (early <= prev + full)).all()):
            angles = [s]
            for want in want_rad.unbind(-1)[:-1]:
                s = torch.clamp(want, s - full, s + full)
                angles.append(s)
            start = torch.stack(angles, dim=-1)
        s = start[..., None]  # (..., H, 1)
        return torch.clamp(want_rad[..., None], s - reach, s + reach)

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

    def rollout(
        self,
        speed0_mps: torch.Tensor,
        steer0_rad: torch.Tensor,
        actions: torch.Tensor,
        heading0_rad: torch.Tensor | None = None,
    ) -> torch.Tensor:
        """Ego rows over a plan; the ego starts at the origin with heading ``heading0_rad`` (0: the anchor frame).

        The same simulator steps as :meth:`substep` repeated ``substeps`` times per plan step, computed for all
        steps at once: once the steering angles of every step are known (:meth:`applied_steer`), each step's
        speed, distance and heading change follow from running sums. The speed recursion
        v_j = max(v_{j-1} + a_j dt, 0) is a Lindley recursion with the closed form
        v_j = S_j - min(-v_0, min_{i<=j} S_i), S_j the running sum of a_i dt (Lindley's recursion of queueing
        theory, D. V. Lindley 1952, cited from memory; the closed form follows by induction on j); the heading and
        the position are running sums of the per-step increments. ``tests/model/test_ego_fast.py`` keeps the
        step-by-step loop as the reference.

        Args:
            speed0_mps: (...,) speed at the anchor.
            steer0_rad: (...,) steering angle applied just before the anchor.
            actions: (..., H, 2) (acceleration, steering angle) per plan step, clipped here to the limits.
            heading0_rad: (...,) initial heading; default 0.

        Returns:
            (..., H, 5): x, y, vx, vy, heading after each plan step.
        """
        dtype = actions.dtype
        m, dt = self.substeps, self.sim_dt_s
        lead = actions.shape[:-2]
        acc = actions[..., 0].clamp(-self.max_brake_mps2, self.max_accel_mps2)  # (..., H)
        want = actions[..., 1].clamp(-self.max_steer_rad, self.max_steer_rad)
        steer = self.applied_steer(want, steer0_rad).flatten(-2)  # (..., S), S = H x substeps
        beta = torch.atan(self.l_r_m / self.wheelbase_m * torch.tan(steer))
        accel = acc.repeat_interleave(m, dim=-1)  # (..., S): each action held for m steps
        v0 = speed0_mps.to(dtype).expand(lead)[..., None]  # (..., 1)
        adt = accel * dt
        run = torch.cumsum(adt, dim=-1)
        v_after = run - torch.minimum(torch.cummin(run, dim=-1).values, -v0)  # speed after each step (Lindley)
        v = torch.cat([v0, v_after[..., :-1]], dim=-1)  # speed at the start of each step
        # distance of each step as in substep(): constant acceleration, stopping at zero speed, never reversing
        # (-v^2 / (2 a) written v^2 / (-2 a), the same number)
        v_new = v + adt
        stop_dist = torch.where(accel < 0, v * v / (accel * -2.0), 0.0)
        dist = torch.where(v_new < 0, stop_dist, v * dt + adt * (0.5 * dt))
        psi0 = torch.zeros_like(v0) if heading0_rad is None else heading0_rad.to(dtype).expand(lead)[..., None]
        psi = torch.cumsum(torch.cat([psi0, dist / self.l_r_m * torch.sin(beta)], dim=-1), dim=-1)  # (..., S + 1)
        course = psi[..., :-1] + beta  # direction of travel during each step
        x = torch.cumsum(dist * torch.cos(course), dim=-1)
        y = torch.cumsum(dist * torch.sin(course), dim=-1)
        # rows at the end of each plan step (the last of its substeps)
        end = slice(m - 1, None, m)
        psi_end = psi[..., 1:][..., end]
        v_end = v_new[..., end].clamp_min(0.0)
        course_end = psi_end + beta[..., end]
        return torch.stack(
            [x[..., end], y[..., end], v_end * torch.cos(course_end), v_end * torch.sin(course_end), psi_end], dim=-1
        )
