"""The vectorised ego rollout against the step-by-step simulator loop it replaces, and against the bicycle's steady
turn.

``EgoKinematics.rollout`` computes all simulator steps of a plan at once (steering angles first, then running sums
for speed, heading and position). The reference here is the step-by-step loop it replaced, kept as
``reference_paths.stepwise_rollout``: ``EgoKinematics.substep`` once per simulator step, the simulator's own step
(``tests/model/test_ego.py`` checks the rollout against ``wmplan.sim.bicycle.bicycle_step`` and the engine).

External references: the steady-turn check values of docs/references.md#rajamani-2012-vehicle-dynamics (derived
there from the equations of Rajamani, *Vehicle Dynamics and Control*, 2nd ed., 2012, section 2.2 [M]); a
worked stop-and-restart example computed by hand below (derived, no source needed).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from tests.model.model_helpers import TOY_EGO
from tests.model.reference_paths import stepwise_rollout
from wmplan.model.ego import EgoKinematics
from wmplan.scenario import load_scenario

PLAN_DT_S = 0.2
HORIZON = 15


def stepwise_applied_steer(ego: EgoKinematics, want, steer0) -> torch.Tensor:
    """The rate limiter step by step: (..., H, substeps) angles."""
    d = ego.max_steer_rate_radps * ego.sim_dt_s
    s = steer0.expand(want.shape[:-1])
    out = []
    for h in range(want.shape[-1]):
        sub = []
        for _ in range(ego.substeps):
            s = torch.minimum(torch.maximum(want[..., h], s - d), s + d)
            sub.append(s)
        out.append(torch.stack(sub, -1))
    return torch.stack(out, -2)


@pytest.fixture(scope="module")
def ego() -> EgoKinematics:
    return EgoKinematics.from_scenario(load_scenario("onramp-merge"), PLAN_DT_S)


def plans(seed: int, num: int, dtype=torch.float64):
    """Initial speeds 0..30 m/s (0, 0.5, 2 and 30 among them), steering +-0.3 rad, headings +-0.3 rad, plans past
    every limit (acceleration -12..6 m/s^2 against 8 / 3, steering +-0.8 rad against 0.5), so clipping, the rate
    limit and stopping at zero speed all occur; leading shape (num // 4, 4) to exercise broadcasting."""
    rng = np.random.default_rng(seed)
    speed = rng.uniform(0.0, 30.0, num)
    speed[:4] = [0.0, 0.5, 2.0, 30.0]
    steer = rng.uniform(-0.3, 0.3, num)
    heading = rng.uniform(-0.3, 0.3, num)
    actions = np.stack([rng.uniform(-12.0, 6.0, (num, HORIZON)), rng.uniform(-0.8, 0.8, (num, HORIZON))], -1)
    t = lambda a: torch.from_numpy(a).to(dtype).reshape(num // 4, 4, *a.shape[1:])  # noqa: E731
    return t(speed), t(steer), t(actions), t(heading)


def test_rollout_equals_the_stepwise_loop_in_float64(ego):
    """In float64 the vectorised rollout is the loop up to rounding (1e-10 m, m/s, rad): the closed forms are
    exact, only the order of the additions differs. The plans do stop and do hit the rate limit."""
    speed, steer, actions, heading = plans(0, 256)
    ref = stepwise_rollout(ego, speed, steer, actions, heading)
    out = ego.rollout(speed, steer, actions, heading0_rad=heading)
    assert out.shape == ref.shape == (64, 4, HORIZON, 5)
    torch.testing.assert_close(out, ref, rtol=0, atol=1e-10)
    assert ((ref[..., 2] ** 2 + ref[..., 3] ** 2) == 0).any()  # some stop
    # without an initial heading: the anchor frame
    torch.testing.assert_close(
        ego.rollout(speed, steer, actions), stepwise_rollout(ego, speed, steer, actions), rtol=0, atol=1e-10
    )


def test_rollout_in_float32_is_within_float32_rounding(ego):
    """In float32 (what the model runs in) both the loop and the vectorised rollout are within float32 rounding of
    the float64 result: 1e-4 m and m/s after 30 steps of up to 90 m (float32 spacing at 64 m is 3.8e-6 m; the
    largest errors seen when this test was written: loop 5.4e-5, vectorised 3.7e-5, which accumulates its running
    sums in double precision), headings 1e-5 rad; and they differ from each other by no more than that."""
    s64 = plans(1, 1024)
    ref = stepwise_rollout(ego, *s64[:3], s64[3])
    s32 = [a.float() for a in s64]
    out = ego.rollout(*s32[:3], heading0_rad=s32[3])
    loop = stepwise_rollout(ego, *s32[:3], s32[3])
    assert out.dtype == torch.float32
    for got in (out, loop):
        err = (got.double() - ref).abs().amax(dim=(0, 1, 2))
        assert (err[:4] < 1e-4).all() and err[4] < 1e-5, err
    gap = (out - loop).abs().amax(dim=(0, 1, 2))
    assert (gap[:4] < 1e-4).all() and gap[4] < 1e-5, gap


def test_applied_steer_equals_the_stepwise_rate_limit(ego):
    """Per plan step the angle after i limited steps toward a held command is clamp(command, s - i d, s + i d):
    equal to the step-by-step limiter to 1e-12 rad (float64), with commands far beyond the rate limit; and
    ``clip_actions`` returns the last substep's angle."""
    _, steer, actions, _ = plans(2, 256)
    want = actions[..., 1].clamp(-ego.max_steer_rad, ego.max_steer_rad)
    got = ego.applied_steer(want, steer)
    ref = stepwise_applied_steer(ego, want, steer)
    assert got.shape == (64, 4, HORIZON, ego.substeps)
    torch.testing.assert_close(got, ref, rtol=0, atol=1e-12)
    assert ((ref[..., -1] - want).abs() > 1e-3).any()  # the limit binds somewhere
    torch.testing.assert_close(ego.clip_actions(actions, steer)[..., 1], ref[..., -1], rtol=0, atol=1e-12)


@pytest.mark.parametrize(("steer_deg", "r_cg_m", "yaw_rate_radps"), [(5.0, 30.8907, 0.32372), (10.0, 15.3719, 0.65054)])
def test_steady_turn_matches_the_tabled_radius_and_yaw_rate(steer_deg, r_cg_m, yaw_rate_radps):
    """L = 2.7 m, l_r = 1.35 m, 10 m/s, a held steering angle already applied (no rate limit): the heading grows at
    the tabled yaw rate and the speed stays 10 m/s. Check values [D] of
    docs/references.md#rajamani-2012-vehicle-dynamics from the equations of Rajamani 2012 section 2.2 [M];
    tolerance half a unit of the last tabled decimal. The positions are the vertices of a regular polygon (one
    explicit step per 0.1 s) whose circumradius is R_cg times the chord factor (theta / 2) / sin(theta / 2),
    theta the heading change per step (elementary geometry): within 3e-4 of R_cg."""
    ego = TOY_EGO
    assert (ego.wheelbase_m, ego.l_r_m, ego.sim_dt_s) == (2.7, 1.35, 0.1)
    delta, v = math.radians(steer_deg), 10.0
    f64 = lambda *a: torch.tensor(a, dtype=torch.float64)  # noqa: E731
    actions = f64(0.0, delta).expand(HORIZON, 2)[None]
    out = ego.rollout(f64(v), f64(delta), actions)[0]
    t = torch.arange(1, HORIZON + 1, dtype=torch.float64) * PLAN_DT_S
    rate = out[:, 4] / t
    assert torch.all((rate - yaw_rate_radps).abs() < 5e-6), rate
    torch.testing.assert_close(torch.hypot(out[:, 2], out[:, 3]), torch.full((HORIZON,), v, dtype=torch.float64))
    # circumradius of the start point and two later vertices
    a, b, c = np.zeros(2), out[6, :2].numpy(), out[14, :2].numpy()
    ab, bc, ca = np.linalg.norm(b - a), np.linalg.norm(c - b), np.linalg.norm(a - c)
    radius = ab * bc * ca / (2.0 * abs((b - a)[0] * (c - a)[1] - (b - a)[1] * (c - a)[0]))
    theta = yaw_rate_radps * ego.sim_dt_s
    assert radius == pytest.approx(r_cg_m * (theta / 2) / math.sin(theta / 2), abs=5e-4)
    assert abs(radius / r_cg_m - 1.0) < 3e-4


def test_stop_and_restart_worked_example(ego):
    """Straight, from 1 m/s: one plan step at -8 m/s^2 (0.1 s steps: 1 -> 0.2 m/s over 0.06 m, then a stop after
    0.2^2 / 16 = 0.0025 m), then one at +3 m/s^2 (0 -> 0.3 -> 0.6 m/s over 0.015 + 0.045 m): x = 0.0625 and
    0.1225 m, speeds 0 and 0.6 m/s (constant-acceleration distances worked by hand; the vehicle never reverses)."""
    actions = torch.tensor([[[-8.0, 0.0], [3.0, 0.0]]], dtype=torch.float64)
    out = ego.rollout(torch.tensor([1.0], dtype=torch.float64), torch.zeros(1, dtype=torch.float64), actions)[0]
    torch.testing.assert_close(out[:, 0], torch.tensor([0.0625, 0.1225], dtype=torch.float64), rtol=0, atol=1e-12)
    torch.testing.assert_close(out[:, 2], torch.tensor([0.0, 0.6], dtype=torch.float64), rtol=0, atol=1e-12)
    assert (out[:, [1, 3, 4]] == 0).all()


@pytest.mark.parametrize("binds", [False, True])
def test_applied_steer_with_commands_within_reach(ego, binds):
    """Smooth commands, each within one plan step's reach of the one before it (the planner's usual plans): the
    commands shifted by one are the angles each begins at (the shortcut of ``applied_steer``), equal to the
    step-by-step limiter to 1e-12 rad. With one plan's first command out of reach (``binds``) the loop runs for the
    whole batch and agrees as well."""
    reach = ego.max_steer_rate_radps * PLAN_DT_S
    g = torch.Generator().manual_seed(5)
    steer0 = (torch.rand(32, 3, generator=g, dtype=torch.float64) - 0.5) * 0.2
    steps = (torch.rand(32, 3, HORIZON, generator=g, dtype=torch.float64) - 0.5) * 1.6 * reach  # within +-0.8 reach
    want = (steer0[..., None] + steps.cumsum(-1)).clamp(-ego.max_steer_rad, ego.max_steer_rad)
    if binds:
        want[7, 1] += 3.0 * reach
        want = want.clamp(-ego.max_steer_rad, ego.max_steer_rad)
    got = ego.applied_steer(want, steer0)
    ref = stepwise_applied_steer(ego, want, steer0)
    torch.testing.assert_close(got, ref, rtol=0, atol=1e-12)
    assert ((ref[..., -1] - want).abs() > 1e-9).any() == binds  # the limit binds only where it was made to
