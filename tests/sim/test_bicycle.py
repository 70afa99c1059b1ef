"""Reference tests of the ego's kinematic bicycle model (centre-of-gravity reference, front-wheel steering).

Sources: Rajamani, *Vehicle Dynamics and Control*, 2nd ed., Springer 2012, section 2.2 (section number from
memory [M]); Kong, Pfeiffer, Schildbach, Borrelli, IEEE Intelligent Vehicles Symposium 2015 (bibliographic details
[M]). The equations are [S] (docs/references.md#rajamani-2012-vehicle-dynamics,
docs/references.md#kong-2015-kinematic-models); every check number below is derived [D] there for L = 2.7 m,
l_f = l_r = 1.35 m, v = 10 m/s and tabled to the shown decimals.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from wmplan.sim import engine
from wmplan.sim.bicycle import bicycle_step, slip_angle, steady_state_turn
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO

WHEELBASE_M = 2.7
L_R_M = 1.35
SPEED_MPS = 10.0


@pytest.mark.parametrize(
    ("steer_deg", "beta_deg", "r_rear_m", "r_cg_m", "yaw_rate_radps", "a_lat_mps2"),
    [
        (5.0, 2.5048, 30.8611, 30.8907, 0.32372, 3.2372),
        (10.0, 5.0384, 15.3125, 15.3719, 0.65054, 6.5054),
    ],
)
def test_steady_state_turn(steer_deg, beta_deg, r_rear_m, r_cg_m, yaw_rate_radps, a_lat_mps2):
    """Slip angle, radii of the rear-axle and CG paths, yaw rate and lateral acceleration at constant steering.

    Source: the table of docs/references.md#rajamani-2012-vehicle-dynamics, [D] from the [S] equations
    (section 2.2 [M]). Tolerance: half a unit of the last tabled decimal.
    """
    delta = math.radians(steer_deg)
    beta = slip_angle(delta, WHEELBASE_M, L_R_M)
    assert math.degrees(beta) == pytest.approx(beta_deg, abs=5e-5)
    r_rear, r_cg, yaw_rate, a_lat = steady_state_turn(delta, SPEED_MPS, WHEELBASE_M, L_R_M)
    assert r_rear == pytest.approx(r_rear_m, abs=5e-5)
    assert r_cg == pytest.approx(r_cg_m, abs=5e-5)
    assert yaw_rate == pytest.approx(yaw_rate_radps, abs=5e-6)
    assert a_lat == pytest.approx(a_lat_mps2, abs=5e-5)
    # R_cg = sqrt(R_rear^2 + l_r^2) (same section, [D]): two routes to one number.
    assert r_cg == pytest.approx(math.hypot(r_rear, L_R_M), rel=1e-12)


def test_slip_angle_in_radians_at_5_degrees():
    """beta(5 deg) = 0.0437165 rad ([D], docs/references.md#rajamani-2012-vehicle-dynamics)."""
    assert slip_angle(math.radians(5.0), WHEELBASE_M, L_R_M) == pytest.approx(0.0437165, abs=5e-8)


def test_one_euler_step_from_origin():
    """psi = 0, delta = 5 deg, v = 10, dt = 0.1, a = 0: x = 0.999045, y = 0.043703, psi = 0.032372
    (CG reference; the rear-axle variant would give psi = 0.032403).

    Source: docs/references.md#rajamani-2012-vehicle-dynamics, [D] explicit Euler on the [S] equations.
    """
    x, y, psi, v, vx, vy, beta = bicycle_step(
        0.0, 0.0, 0.0, SPEED_MPS, 0.0, math.radians(5.0), wheelbase_m=WHEELBASE_M, l_r_m=L_R_M, dt_s=0.1
    )
    assert x == pytest.approx(0.999045, abs=5e-7)
    assert y == pytest.approx(0.043703, abs=5e-7)
    assert psi == pytest.approx(0.032372, abs=5e-7)
    assert psi != pytest.approx(0.032403, abs=5e-7)
    assert v == SPEED_MPS


def _fit_circle(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares (algebraic) circle fit per row: x, y (N, T) -> centres (N, 2)."""
    a = np.stack([2 * x, 2 * y, np.ones_like(x)], axis=-1)  # (N, T, 3)
    rhs = x**2 + y**2
    sol = np.stack([np.linalg.lstsq(a[i], rhs[i], rcond=None)[0] for i in range(x.shape[0])])
    return sol[:, :2], sol[:, 2]


def test_constant_steering_traces_a_circle_of_radius_r_cg():
    """Property: for any constant delta != 0 the CG path is a circle of radius R_cg = l_r / sin(beta).

    Source: docs/references.md#rajamani-2012-vehicle-dynamics, steady-state turning [D] from the [S]
    equations. 200 seeded random (delta, v, L, l_r, start pose) sets; the step is chosen so that each step
    travels 1/500 of R_cg, which bounds the discretisation error of the radius by (1/500)^2 / 24 ~ 2e-7
    relative; the test allows 1e-5.
    """
    gen = np.random.default_rng(31)
    n, n_steps = 200, 1500  # 1500 steps of 1/500 rad: three radians of arc
    sign = gen.choice([-1.0, 1.0], n)
    delta = sign * gen.uniform(0.01, 0.6, n)
    v = gen.uniform(1.0, 35.0, n)
    wheelbase = gen.uniform(2.0, 4.0, n)
    l_r = wheelbase * gen.uniform(0.3, 0.7, n)
    beta = np.arctan(l_r / wheelbase * np.tan(delta))  # written out here, not taken from the package
    r_cg = l_r / np.abs(np.sin(beta))
    dt = r_cg / v / 500.0
    x, y, psi = gen.uniform(-50, 50, n), gen.uniform(-50, 50, n), gen.uniform(-np.pi, np.pi, n)
    xs, ys = [x], [y]
    for _ in range(n_steps):
        x, y, psi, v, *_ = bicycle_step(x, y, psi, v, 0.0, delta, wheelbase_m=wheelbase, l_r_m=l_r, dt_s=dt)
        xs.append(x)
        ys.append(y)
    xs, ys = np.stack(xs, axis=1), np.stack(ys, axis=1)  # (N, T)
    centre, _ = _fit_circle(xs, ys)
    dist = np.hypot(xs - centre[:, :1], ys - centre[:, 1:])  # (N, T)
    np.testing.assert_allclose(dist, np.broadcast_to(r_cg[:, None], dist.shape), rtol=1e-5)
    # The centre lies to the left of the motion for delta > 0 (counter-clockwise turn), to the right for < 0.
    heading0 = np.arctan2(ys[:, 1] - ys[:, 0], xs[:, 1] - xs[:, 0])
    to_centre = np.arctan2(centre[:, 1] - ys[:, 0], centre[:, 0] - xs[:, 0])
    side = np.sign(np.sin(to_centre - heading0))
    np.testing.assert_array_equal(side, np.sign(delta))


# --- the engine clips ego actions ---


def test_engine_clips_ego_actions(scenario_variant, place):
    """The ego's acceleration is clipped to [-max_brake, max_accel], the steering angle to +-max_steer and then
    to a change of at most max_steer_rate * dt from the previous angle (the scenario's ``limits``; the clipping
    rule is the engine's documented contract, common practice, no source)."""
    scn = scenario_variant(
        num_lanes=3,
        **{
            "limits.max_accel_mps2": 2.5,
            "limits.max_brake_mps2": 7.0,
            "limits.max_steer_rad": 0.4,
            "limits.max_steer_rate_radps": 0.5,
        },
    )
    params = SimParams.from_scenario(scn)
    dt = params.dt_s
    # (previous steering, commanded accel, commanded steering) -> (applied accel, applied steering)
    cases = [
        (0.0, 100.0, 2.0, 2.5, 0.5 * dt),  # both limits exceeded: rate-limited steering
        (0.0, -100.0, -2.0, -7.0, -0.5 * dt),
        (0.38, 1.0, 1.0, 1.0, 0.4),  # steering limit binds before the rate limit
        (-0.38, -3.0, -1.0, -3.0, -0.4),
        (0.1, 0.3, 0.12, 0.3, 0.12),  # inside every limit: unchanged
        (0.2, -7.0, -0.2, -7.0, 0.2 - 0.5 * dt),  # reversing the wheel is rate-limited
    ]
    prev, a_cmd, d_cmd, a_want, d_want = (np.array(c) for c in zip(*cases, strict=True))
    state = place(params, [], seeds=range(len(cases)), ego_steer_rad=prev, ego_speed_mps=20.0)
    new, info = engine.step(state, np.column_stack([a_cmd, d_cmd]), params)
    np.testing.assert_allclose(info.accel_mps2[:, EGO], a_want, rtol=0, atol=1e-12)
    np.testing.assert_allclose(info.steer_rad, d_want, rtol=0, atol=1e-12)
    np.testing.assert_allclose(new.ego_steer_rad, d_want, rtol=0, atol=1e-12)
    np.testing.assert_allclose(new.ego_speed_mps, 20.0 + a_want * dt, rtol=0, atol=1e-12)


def test_engine_moves_the_ego_by_the_bicycle_model(scenario_variant, place):
    """The engine's ego pose after one step equals ``bicycle_step`` with the applied (clipped) action and the
    scenario's wheelbase and l_r (equations [S] of docs/references.md#rajamani-2012-vehicle-dynamics)."""
    scn = scenario_variant(num_lanes=3, **{"ego.wheelbase_m": 2.7, "ego.rear_axle_to_cg_m": 1.35})
    params = SimParams.from_scenario(scn)
    state = place(params, [], seeds=[0], ego_speed_mps=10.0, ego_steer_rad=0.05)
    new, info = engine.step(state, np.array([[0.5, 0.2]]), params)
    x, y, psi, v, vx, vy, _ = bicycle_step(
        state.x_m[0, EGO],
        state.y_m[0, EGO],
        0.0,
        10.0,
        0.5,
        info.steer_rad[0],
        wheelbase_m=2.7,
        l_r_m=1.35,
        dt_s=params.dt_s,
    )
    assert info.steer_rad[0] == pytest.approx(0.05 + params.max_steer_rate_radps * params.dt_s, abs=1e-12)
    np.testing.assert_allclose(
        [
            new.x_m[0, EGO],
            new.y_m[0, EGO],
            new.heading_rad[0, EGO],
            new.ego_speed_mps[0],
            new.vx_mps[0, EGO],
            new.vy_mps[0, EGO],
        ],
        [x, y, psi, v, vx, vy],
        rtol=1e-12,
    )
