"""The forward model's ego motion (torch) against the simulator's kinematic bicycle (numpy).

Source of the model: Rajamani, *Vehicle Dynamics and Control*, 2nd ed., 2012, section 2.2 (kinematic bicycle,
centre-of-gravity reference; docs/references.md#rajamani-2012-vehicle-dynamics, section number [M]). The
reference here is the project's own numpy original ``wmplan.sim.bicycle.bicycle_step``, itself checked against the
derived values of that entry in ``tests/sim/test_bicycle.py``, and the simulator's engine, which clips the
actions and rate-limits the steering (``wmplan.sim.engine.step``): ``EgoKinematics.rollout`` must reproduce
both, since the planner trusts the ego path it predicts.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from wmplan.model.ego import EgoKinematics
from wmplan.scenario import load_scenario
from wmplan.sim import engine
from wmplan.sim.bicycle import bicycle_step
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO

SCENARIO = "onramp-merge"
PLAN_DT_S = 0.2
HORIZON = 15


def _wrap(a: np.ndarray) -> np.ndarray:
    return (a + np.pi) % (2 * np.pi) - np.pi


def numpy_plan(ego: EgoKinematics, x, y, heading, speed, steer, actions):
    """Step ``bicycle_step`` by hand over plans ``actions`` (S, H, 2), each action held ``ego.substeps`` steps,
    clipped as the engine clips: acceleration to [-max_brake, max_accel], steering to +-max_steer and then to the
    rate limit from the previous angle. Returns (S, H, 5) rows x, y, vx, vy, heading and (S, H) applied steer."""
    rows, applied = [], []
    for h in range(actions.shape[1]):
        a = np.clip(actions[:, h, 0], -ego.max_brake_mps2, ego.max_accel_mps2)
        want = np.clip(actions[:, h, 1], -ego.max_steer_rad, ego.max_steer_rad)
        for _ in range(ego.substeps):
            d = ego.max_steer_rate_radps * ego.sim_dt_s
            steer = np.clip(want, steer - d, steer + d)
            x, y, heading, speed, vx, vy, _ = bicycle_step(
                x, y, heading, speed, a, steer, wheelbase_m=ego.wheelbase_m, l_r_m=ego.l_r_m, dt_s=ego.sim_dt_s
            )
        rows.append(np.stack([x, y, vx, vy, heading], -1))
        applied.append(steer)
    return np.stack(rows, 1), np.stack(applied, 1)


def random_plans(rng: np.random.Generator, num: int):
    """Initial speeds 0..30 m/s, steering +-0.3 rad, headings +-0.3 rad, and plans whose actions reach past every
    limit (acceleration -12..6 m/s^2 against 8 / 3; steering +-0.8 rad against 0.5), so clipping, the rate limit
    and stopping at zero speed all occur."""
    speed = rng.uniform(0.0, 30.0, num)
    speed[:4] = [0.0, 0.5, 2.0, 30.0]
    steer = rng.uniform(-0.3, 0.3, num)
    heading = rng.uniform(-0.3, 0.3, num)
    actions = np.stack([rng.uniform(-12.0, 6.0, (num, HORIZON)), rng.uniform(-0.8, 0.8, (num, HORIZON))], -1)
    return speed, steer, heading, actions


@pytest.fixture(scope="module")
def ego() -> EgoKinematics:
    return EgoKinematics.from_scenario(load_scenario(SCENARIO), PLAN_DT_S)


def test_from_scenario_reads_the_limits(ego):
    """The kinematics carry the scenario's vehicle and limits, and two simulator steps per 0.2 s plan step."""
    scn = load_scenario(SCENARIO)
    assert (ego.wheelbase_m, ego.l_r_m) == (scn.ego.wheelbase_m, scn.ego.l_r_m)
    assert (ego.max_accel_mps2, ego.max_brake_mps2) == (3.0, 8.0)
    assert (ego.max_steer_rad, ego.max_steer_rate_radps) == (0.5, 0.6)
    assert ego.substeps == 2 and ego.sim_dt_s == scn.dt_s


def test_rollout_matches_numpy_bicycle_float64(ego):
    """In float64 the torch rollout equals ``bicycle_step`` stepped by hand with the same clipping to 1e-9 (64
    random plans, seeded); headings compared modulo 2 pi (the numpy step wraps them, the rollout does not)."""
    speed, steer, heading, actions = random_plans(np.random.default_rng(42), 64)
    ref, applied = numpy_plan(ego, np.zeros(64), np.zeros(64), heading, speed, steer, actions)
    out = ego.rollout(
        torch.from_numpy(speed),
        torch.from_numpy(steer),
        torch.from_numpy(actions),
        heading0_rad=torch.from_numpy(heading),
    ).numpy()
    assert out.shape == (64, HORIZON, 5)
    np.testing.assert_allclose(out[..., :4], ref[..., :4], rtol=0, atol=1e-9)
    np.testing.assert_allclose(_wrap(out[..., 4] - ref[..., 4]), 0.0, atol=1e-9)
    clipped = ego.clip_actions(torch.from_numpy(actions), torch.from_numpy(steer)).numpy()
    np.testing.assert_allclose(clipped[..., 0], np.clip(actions[..., 0], -8.0, 3.0), atol=0)
    np.testing.assert_allclose(clipped[..., 1], applied, atol=1e-12)
    # The plans do exercise the limits: some vehicles stop, and some steering is rate-limited.
    assert (ref[:, -1, 2] ** 2 + ref[:, -1, 3] ** 2 == 0.0).any()
    assert (np.abs(applied - np.clip(actions[..., 1], -0.5, 0.5)) > 1e-6).any()


def test_rollout_matches_numpy_bicycle_float32(ego):
    """In float32 (what the model runs in) the rollout stays within float32 rounding of the float64 original:
    2e-4 m and 2e-4 m/s after 30 substeps of up to 90 m travelled (float32 spacing at 64 m is 3.8e-6 m; the
    largest gap seen when this test was written was 2.6e-5), headings 2e-5 rad."""
    speed, steer, heading, actions = random_plans(np.random.default_rng(43), 64)
    ref, _ = numpy_plan(ego, np.zeros(64), np.zeros(64), heading, speed, steer, actions)
    f32 = lambda a: torch.from_numpy(a.astype(np.float32))  # noqa: E731
    out = ego.rollout(f32(speed), f32(steer), f32(actions), heading0_rad=f32(heading))
    assert out.dtype == torch.float32
    np.testing.assert_allclose(out.numpy()[..., :4], ref[..., :4], rtol=0, atol=2e-4)
    np.testing.assert_allclose(_wrap(out.numpy()[..., 4] - ref[..., 4]), 0.0, atol=2e-5)


def test_rollout_matches_the_simulator_engine(ego):
    """The ego path the model predicts equals the ego's path in the true engine (``engine.step`` with each plan
    action held for two steps) on onramp-merge, starting from states a few steps in (so speed, heading and
    steering angle are not the scenario's initial ones); float32 inputs, tolerance 2e-4 m, 2e-4 m/s, 2e-5 rad."""
    scn = load_scenario(SCENARIO)
    params = SimParams.from_scenario(scn)
    num = 8
    rng = np.random.default_rng(7)
    state = initial_state(params, list(range(100, 100 + num)))
    for _ in range(6):  # a few steps of random steering and acceleration
        act = np.stack([rng.uniform(-2.0, 2.0, num), rng.uniform(-0.05, 0.05, num)], -1)
        state, _ = engine.step(state, act, params)
    actions = np.stack([rng.uniform(-10.0, 5.0, (num, HORIZON)), rng.uniform(-0.1, 0.1, (num, HORIZON))], -1)
    actions[0, :, 1] = 0.7  # past the steering limit (0.5 rad): clipped and rate-limited
    x0, y0 = state.x_m[:, EGO].copy(), state.y_m[:, EGO].copy()
    start = state
    rows = []
    for h in range(HORIZON):
        for _ in range(ego.substeps):
            state, _ = engine.step(state, actions[:, h], params)
        rows.append(
            np.stack(
                [
                    state.x_m[:, EGO] - x0,
                    state.y_m[:, EGO] - y0,
                    state.vx_mps[:, EGO],
                    state.vy_mps[:, EGO],
                    state.heading_rad[:, EGO],
                ],
                -1,
            )
        )
    truth = np.stack(rows, 1)  # (S, H, 5)
    f32 = lambda a: torch.from_numpy(np.asarray(a, dtype=np.float32))  # noqa: E731
    out = ego.rollout(
        f32(start.ego_speed_mps), f32(start.ego_steer_rad), f32(actions), heading0_rad=f32(start.heading_rad[:, EGO])
    ).numpy()
    assert np.abs(start.ego_steer_rad).max() > 0.0 and np.abs(start.heading_rad[:, EGO]).max() > 0.0
    np.testing.assert_allclose(out[..., :4], truth[..., :4], rtol=0, atol=2e-4)
    np.testing.assert_allclose(_wrap(out[..., 4] - truth[..., 4]), 0.0, atol=2e-5)


def test_world_model_ego_rows_are_the_kinematic_path(ego):
    """``WorldModel.sample`` puts the kinematic path into row 0 of every sampled future (the ego is not
    predicted): equal for every sample, and equal to ``rollout`` from the anchor (heading 0)."""
    from model_helpers import straight_batch

    from wmplan.model.config import ModelConfig
    from wmplan.model.world_model import WorldModel

    cfg = ModelConfig(
        history=2, horizon=HORIZON, num_objects=1, d_model=8, num_heads=2, hidden=16, num_layers=1, latent_dim=2
    )
    model = WorldModel(cfg, ego, generator=torch.Generator().manual_seed(0)).eval()
    batch = straight_batch(3, 2, HORIZON, speed_mps=15.0)
    g = torch.Generator().manual_seed(1)
    actions = torch.stack(
        [torch.rand(3, 4, HORIZON, generator=g) * 6 - 4, torch.rand(3, 4, HORIZON, generator=g) * 0.2 - 0.1], -1
    )  # (B, C, H, 2)
    rows = model.sample(batch, actions, 5, generator=torch.Generator().manual_seed(2))["rows"]  # (B, C, K, H, N, F)
    expect = ego.rollout(batch["ego_speed_mps"][:, None], batch["ego_steer_rad"][:, None], actions)  # (B, C, H, 5)
    torch.testing.assert_close(rows[..., 0, :5], expect[:, :, None].expand(-1, -1, 5, -1, -1))
