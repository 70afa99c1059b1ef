"""The brake threat (``wmplan.sim.threat``): the share of its braking the ego needs to avoid what is ahead.

Checked against constant-deceleration kinematics (stopping distance v^2 / (2 a); common practice, no source:
docs/references.md#practice-kinematics; the same quantity as the DRAC of
docs/references.md#cooper-ferguson-1976-drac), both as hand-worked numbers and on the engine itself: an ego
that brakes at the required deceleration times 1.05 stops short of a stopped car, at 0.9 times it does not.
"""

from __future__ import annotations

import numpy as np
import pytest

from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim import EGO, SimParams, initial_state, step
from wmplan.sim.threat import THREAT_CAP, brake_threat


def _one_lane(offset_m: float | None, lead_speed: float, ego_speed: float, max_brake: float = 8.0):
    d = scenario_to_dict(load_scenario("open-road"))
    d["road"]["lanes"] = [{"start_m": 0.0}]
    d["traffic"]["density_veh_per_km"] = [0.0]
    d["drivers"]["hard_brake_rate_per_min"] = 0.0
    d["traffic"]["placed"] = (
        []
        if offset_m is None
        else [{"lane": 0, "offset_m": offset_m, "speed_mps": lead_speed, "desired_speed_mps": max(lead_speed, 0.1)}]
    )
    d["ego"] = {**d["ego"], "lane": 0, "speed_mps": ego_speed, "goal": {"x_m": 1900.0, "lanes": [0]}}
    d["limits"]["max_brake_mps2"] = max_brake
    params = SimParams.from_scenario(parse_scenario(d, "one lane"))
    return params, initial_state(params, [0])


def test_threat_of_a_leader_is_closing_squared_over_twice_the_gap_over_the_braking_limit():
    params, state = _one_lane(34.7, 0.0, 20.0)  # centres 34.7 m apart, two 4.7 m cars: gap 30 m
    gap = 34.7 - 0.5 * (state.length_m[0, EGO] + state.length_m[0, 1])
    assert brake_threat(state, params)[0] == pytest.approx(20.0**2 / (2 * gap) / 8.0)
    params, state = _one_lane(34.7, 12.0, 20.0, max_brake=4.0)
    assert brake_threat(state, params)[0] == pytest.approx(8.0**2 / (2 * gap) / 4.0)
    params, state = _one_lane(34.7, 25.0, 20.0)  # pulling away: no threat
    assert brake_threat(state, params)[0] == 0.0
    params, state = _one_lane(None, 0.0, 20.0)  # nothing ahead, no lane end
    assert brake_threat(state, params)[0] == 0.0


def test_threat_of_a_lane_end_counts_for_the_lane_the_body_is_in():
    """onramp-merge: the ego on the ramp lane that ends at 320 m, 22 m/s at x = 60 m."""
    d = scenario_to_dict(load_scenario("onramp-merge"))
    d["traffic"]["density_veh_per_km"] = [0.0, 0.0, 0.0]
    params = SimParams.from_scenario(parse_scenario(d, "empty onramp-merge"))
    state = initial_state(params, [0])
    d_end = 320.0 - 60.0 - 0.5 * state.length_m[0, EGO]
    assert brake_threat(state, params)[0] == pytest.approx(22.0**2 / (2 * d_end) / params.max_brake_mps2)


@pytest.mark.parametrize("factor, collides", [(1.05, False), (0.9, True)])
def test_braking_at_the_required_deceleration_just_avoids_a_stopped_car(factor, collides):
    params, state = _one_lane(44.7, 0.0, 25.0)
    need = brake_threat(state, params)[0] * params.max_brake_mps2  # 25^2 / (2 * 40) = 7.8 m/s^2
    assert need == pytest.approx(25.0**2 / 80.0, rel=1e-3)
    hit = False
    for _ in range(80):
        state, info = step(state, np.array([[-factor * need, 0.0]]), params)
        hit |= bool(info.collision[0])
    assert hit is collides


def test_threat_is_capped():
    params, state = _one_lane(5.0, 0.0, 20.0)  # overlapping boxes: gap < 0
    assert brake_threat(state, params)[0] == THREAT_CAP


def test_compiled_threat_equals_the_numpy_form():
    """brake_threat (compiled) equals its numpy form (tests/sim/numpy_reference.py) bit for bit over 150 steps of
    64 scenes of every built-in, with noisy or full-throttle actions so that the ego closes in on leaders and
    lane ends
    (docs/references.md#practice-equivalence-test)."""
    from tests.sim.numpy_reference import numpy_brake_threat
    from wmplan.scenario import builtin_names
    from wmplan.sim import initial_state, step
    from wmplan.sim.ego_rules import rule_actions

    gen = np.random.default_rng(4)
    seen = 0.0
    for name in builtin_names():
        params = SimParams.from_scenario(load_scenario(name))
        st = initial_state(params, np.arange(64) + 77)
        for _ in range(150):
            got = brake_threat(st, params)
            np.testing.assert_array_equal(got, numpy_brake_threat(st, params))
            seen = max(seen, float(got.max()))
            act = rule_actions(st, params)
            act[:, 0] += gen.normal(0.5, 2.0, 64)
            act[32:] = [3.0, 0.0]  # half the scenes at full throttle in their lane: they run up on leaders
            st, _ = step(st, act, params)
    assert seen > 1.0
