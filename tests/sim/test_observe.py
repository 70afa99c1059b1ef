"""Ego-centred object lists and road features (``observe.object_list``, ``to_frame``, ``road_features``, ``observe``).

References: the planar change of frame p_ego = R(-theta) (p_world - o), v_ego = R(-theta) v_world with
R(a) = [[cos a, -sin a], [sin a, cos a]] (textbook rigid-body kinematics, common practice, no source:
docs/references.md#practice-rigid-frame), written out here as a hand-made matrix; nearest-first sorting
against a plain Python loop kept in this file (docs/references.md#practice-equivalence-test); road features
worked out by hand from the numbers in ``scenarios/onramp-merge.yaml``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from wmplan.scenario import load_scenario
from wmplan.sim import EGO, ROAD_FEATURES, VEHICLE_FEATURES, SimParams, initial_state, step
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.features import (
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_WIDTH,
    F_X,
    F_Y,
    LANE_END_CAP_M,
)
from wmplan.sim.observe import object_list, observe, road_features, to_frame


def _row(x=0.0, y=0.0, vx=0.0, vy=0.0, heading=0.0, length=4.7, width=1.85, valid=1.0) -> np.ndarray:
    return np.array([x, y, vx, vy, heading, length, width, valid], dtype=np.float64)


def _rot(angle_rad: float) -> np.ndarray:
    """The 2x2 rotation matrix R(angle), counter-clockwise positive."""
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return np.array([[c, -s], [s, c]])


def test_feature_layout_is_the_documented_one():
    assert VEHICLE_FEATURES == ("x_m", "y_m", "vx_mps", "vy_mps", "heading_rad", "length_m", "width_m", "valid")
    assert ROAD_FEATURES == (
        "lane_offset_m",
        "lane_end_m",
        "lanes_left",
        "lanes_right",
        "right_lane_end_m",
        "left_lane_end_m",
    )


def test_vehicle_ten_metres_ahead_in_the_same_lane():
    """Ego at (100, 5.4) heading 0 doing 25 m/s; a vehicle at (110, 5.4) doing 20 m/s -> row (10, 0, 20, 0)."""
    rows = np.stack([_row(100.0, 5.4, 25.0), _row(110.0, 5.4, 20.0, length=5.0)])[None]  # (1, 2, F)
    objects, slots = object_list(rows, num_objects=3)
    assert objects.shape == (1, 4, 8) and slots.shape == (1, 4)
    np.testing.assert_allclose(objects[0, 0], _row(0.0, 0.0, 25.0), rtol=0, atol=1e-12)
    np.testing.assert_allclose(objects[0, 1], _row(10.0, 0.0, 20.0, length=5.0), rtol=0, atol=1e-12)
    assert (objects[0, 2:] == 0.0).all()
    assert slots[0].tolist() == [0, 1, -1, -1]


def test_ego_turned_by_90_degrees():
    """Ego heading +90 deg (facing +y) with world velocity (0, 12): in its frame (12, 0). A vehicle 5 m further along
    +y is straight ahead at (5, 0); its world velocity (0, 3) becomes (3, 0) and its heading +90 deg becomes 0. A
    vehicle at (-2, 0) relative to the ego in the world is on the ego's left: (0, 2), its velocity (1, 0) becomes
    (0, -1), its heading 0 becomes -90 deg."""
    ego = _row(50.0, 10.0, 0.0, 12.0, math.pi / 2)
    ahead = _row(50.0, 15.0, 0.0, 3.0, math.pi / 2)
    right = _row(48.0, 10.0, 1.0, 0.0, 0.0)
    objects, slots = object_list(np.stack([ego, ahead, right])[None], num_objects=2)
    np.testing.assert_allclose(objects[0, 0, :5], [0.0, 0.0, 12.0, 0.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(objects[0, 1, :5], [0.0, 2.0, 0.0, -1.0, -math.pi / 2], atol=1e-12)
    np.testing.assert_allclose(objects[0, 2, :5], [5.0, 0.0, 3.0, 0.0, 0.0], atol=1e-12)
    assert slots[0].tolist() == [0, 2, 1]  # the vehicle 2 m away comes before the one 5 m away


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_to_frame_matches_a_hand_written_rotation(seed):
    """Random frames and rows: positions and velocities against R(-theta) applied by hand, headings wrapped into
    (-pi, pi], sizes and validity carried over, invalid rows zeroed."""
    gen = np.random.default_rng(seed)
    n_frames, v_n = 20, 6
    rows = np.zeros((n_frames, v_n, 8))
    rows[..., F_X] = gen.uniform(-100, 100, (n_frames, v_n))
    rows[..., F_Y] = gen.uniform(-10, 10, (n_frames, v_n))
    rows[..., F_VX] = gen.uniform(0, 40, (n_frames, v_n))
    rows[..., F_VY] = gen.uniform(-3, 3, (n_frames, v_n))
    rows[..., F_HEADING] = gen.uniform(-np.pi, np.pi, (n_frames, v_n))
    rows[..., F_LENGTH] = gen.uniform(3.5, 12, (n_frames, v_n))
    rows[..., F_WIDTH] = gen.uniform(1.5, 2.6, (n_frames, v_n))
    rows[..., F_VALID] = gen.uniform(size=(n_frames, v_n)) < 0.7
    origin = gen.uniform(-50, 50, (n_frames, 2))
    theta = gen.uniform(-4, 4, n_frames)
    out = to_frame(rows, origin, theta)
    for f in range(n_frames):
        r_inv = _rot(-theta[f])
        for v in range(v_n):
            if rows[f, v, F_VALID] < 0.5:
                assert (out[f, v] == 0.0).all()
                continue
            p = r_inv @ (rows[f, v, [F_X, F_Y]] - origin[f])
            vel = r_inv @ rows[f, v, [F_VX, F_VY]]
            np.testing.assert_allclose(out[f, v, [F_X, F_Y]], p, rtol=0, atol=1e-9)
            np.testing.assert_allclose(out[f, v, [F_VX, F_VY]], vel, rtol=0, atol=1e-9)
            rel = rows[f, v, F_HEADING] - theta[f]
            h = out[f, v, F_HEADING]
            assert -np.pi < h <= np.pi
            assert math.isclose(math.cos(h), math.cos(rel), abs_tol=1e-12)
            assert math.isclose(math.sin(h), math.sin(rel), abs_tol=1e-12)
            assert out[f, v, F_LENGTH] == rows[f, v, F_LENGTH] and out[f, v, F_WIDTH] == rows[f, v, F_WIDTH]
            assert out[f, v, F_VALID] == 1.0
            # distances and speeds do not change with the frame
            assert math.isclose(np.hypot(*p), np.hypot(*(rows[f, v, [F_X, F_Y]] - origin[f])), rel_tol=1e-12)


def _nearest_by_loop(rows: np.ndarray, m: int) -> list[int]:
    """The slow, obvious reference: distances from the ego, valid others only, nearest first, ties by slot."""
    others = []
    for v in range(1, rows.shape[0]):
        if rows[v, F_VALID] > 0.5:
            d = math.hypot(rows[v, F_X] - rows[0, F_X], rows[v, F_Y] - rows[0, F_Y])
            others.append((d, v))
    others.sort()
    picked = [v for _d, v in others[:m]]
    return [0] + picked + [-1] * (m - len(picked))


@pytest.mark.parametrize("seed", [3, 4])
def test_rows_are_sorted_by_distance_and_padded(seed):
    """Random scenes of 12 slots with about half valid, M = 8: slots as a plain loop picks them, distances
    non-decreasing, padded rows all zero (valid = 0)."""
    gen = np.random.default_rng(seed)
    n_scenes, v_n, m = 50, 12, 8
    rows = np.zeros((n_scenes, v_n, 8))
    rows[..., F_X] = gen.uniform(0, 300, (n_scenes, v_n))
    rows[..., F_Y] = gen.uniform(0, 10.8, (n_scenes, v_n))
    rows[..., F_VX] = gen.uniform(10, 35, (n_scenes, v_n))
    rows[..., F_HEADING] = gen.uniform(-0.1, 0.1, (n_scenes, v_n))
    rows[..., F_LENGTH] = 4.7
    rows[..., F_WIDTH] = 1.85
    rows[..., F_VALID] = gen.uniform(size=(n_scenes, v_n)) < 0.5
    rows[:, 0, F_VALID] = 1.0
    objects, slots = object_list(rows, num_objects=m)
    assert objects.shape == (n_scenes, 1 + m, 8)
    n_padded = 0
    for s in range(n_scenes):
        assert slots[s].tolist() == _nearest_by_loop(rows[s], m)
        real = slots[s] >= 0
        dist = np.hypot(objects[s, real, F_X], objects[s, real, F_Y])
        assert (np.diff(dist) >= 0).all()
        assert (objects[s, real, F_VALID] == 1.0).all()
        assert (objects[s, ~real] == 0.0).all()
        n_padded += int((~real).sum())
    assert n_padded > 0  # the random scenes include ones with fewer than 8 valid neighbours


def test_fewer_slots_than_objects_pads_and_more_slots_truncates():
    rows = np.stack([_row(0.0, 1.8), _row(30.0, 1.8), _row(-12.0, 5.4), _row(7.0, 5.4, valid=0.0)])[None]
    objects, slots = object_list(rows, num_objects=6)
    assert slots[0].tolist() == [0, 2, 1, -1, -1, -1, -1]
    assert (objects[0, 3:] == 0.0).all()
    objects, slots = object_list(rows, num_objects=1)
    assert slots[0].tolist() == [0, 2] and objects.shape == (1, 2, 8)


@pytest.mark.parametrize("name", ["open-road", "onramp-merge", "cut-in"])
def test_ego_row_is_at_the_origin_in_simulated_states(name):
    """In every simulated state (including ego lane changes, heading != 0): row 0 is the ego at (0, 0) heading 0,
    with its own size, its speed as the length of its velocity, and other rows within the sorted order."""
    params = SimParams.from_scenario(load_scenario(name))
    st = initial_state(params, np.arange(16) + 70)
    turned = 0
    for _ in range(80):
        st, _info = step(st, rule_actions(st, params), params)
        objects, road, slots = observe(st, params)
        ego = objects[:, 0]
        assert (ego[:, [F_X, F_Y, F_HEADING]] == 0.0).all()
        assert (ego[:, F_VALID] == 1.0).all() and (slots[:, 0] == EGO).all()
        np.testing.assert_allclose(ego[:, F_LENGTH], st.length_m[:, EGO])
        np.testing.assert_allclose(np.hypot(ego[:, F_VX], ego[:, F_VY]), st.ego_speed_mps, rtol=1e-12)
        dist = np.hypot(objects[..., F_X], objects[..., F_Y])
        dist = np.where(slots >= 0, dist, np.inf)  # padding sorts last
        assert (dist[:, 1:-1] <= dist[:, 2:]).all()
        assert (objects[slots < 0] == 0.0).all()
        assert road.shape == (16, len(ROAD_FEATURES))
        turned += int((np.abs(st.heading_rad[:, EGO]) > 1e-3).sum())
    if name == "onramp-merge":
        assert turned > 0, "the ego must have changed lanes (heading != 0) somewhere in this run"


def test_road_features_at_the_start_of_onramp_merge():
    """By hand from scenarios/onramp-merge.yaml: lane width 3.6 m; lane 0 spans [0, 320] m, lanes 1 and 2 run to
    the road end (1200 m); the ego starts in lane 0 at x = 60 m, centred (y = 1.8 m). So: lane_offset 0,
    lane_end 320 - 60 = 260 m, lanes_left 2, lanes_right 0, no lane to the right (0), the lane to the left never
    ends on this road (capped at 500 m)."""
    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    st = initial_state(params, [0, 1])
    _objects, road, _slots = observe(st, params)
    expected = [0.0, 260.0, 2.0, 0.0, 0.0, LANE_END_CAP_M]
    assert LANE_END_CAP_M == 500.0
    np.testing.assert_allclose(road, [expected, expected], rtol=0, atol=1e-12)


@pytest.mark.parametrize(
    ("x_m", "y_m", "expected"),
    [
        # lane 1 at x = 100 (1.0 m left of its centre 5.4): lane 0 to the right ends in 220 m, lane 2 to the left
        (100.0, 6.4, [1.0, 500.0, 1.0, 1.0, 220.0, 500.0]),
        # lane 1 at x = 330, past the end of lane 0: nothing to the right any more
        (330.0, 5.4, [0.0, 500.0, 1.0, 0.0, 0.0, 500.0]),
        # lane 2 at x = 900: road end at 1200 is 300 m away but lanes that reach the road's end count as not ending
        # (lane 0 ended at 320 m, so only lane 1 is to the right)
        (900.0, 9.0 - 0.5, [-0.5, 500.0, 0.0, 1.0, 500.0, 0.0]),
        # lane 0 at x = 300, 0.7 m right of centre: 20 m to its end
        (300.0, 1.1, [-0.7, 20.0, 2.0, 0.0, 0.0, 500.0]),
    ],
)
def test_road_features_elsewhere_on_onramp_merge(x_m, y_m, expected):
    """More hand-worked points on the same road (lane centres 1.8, 5.4, 9.0 m)."""
    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    np.testing.assert_allclose(road_features(params, np.array([x_m]), np.array([y_m]))[0], expected, rtol=0, atol=1e-9)


# --- the compiled observe against the numpy functions it runs (docs/references.md#practice-equivalence-test) ---------


def _numpy_observe(state, params, num_objects):
    """What ``observe`` computed before it was compiled: the numpy functions of this module on the state's rows."""
    objects, slots = object_list(state.vehicles(), num_objects)
    return objects, road_features(params, state.x_m[:, EGO], state.y_m[:, EGO]), slots


@pytest.mark.parametrize("name", ["open-road", "onramp-merge", "cut-in", "lane-drop", "stop-and-go"])
@pytest.mark.parametrize("num_objects", [1, 8, 20])
def test_compiled_observe_equals_the_numpy_functions(name, num_objects):
    """Bit for bit (slots exactly, values exactly): 64 scenes driven by the rule-based ego for 120 steps, and the
    float32 form equals the float64 one cast by numpy. num_objects = 20 exceeds the slots (padding rows)."""
    params = SimParams.from_scenario(load_scenario(name))
    st = initial_state(params, np.arange(64) + 1000)
    for k in range(120):
        if k % 10 == 0:
            objects, road, slots = observe(st, params, num_objects)
            ref_objects, ref_road, ref_slots = _numpy_observe(st, params, num_objects)
            np.testing.assert_array_equal(slots, ref_slots)
            np.testing.assert_array_equal(objects, ref_objects)
            np.testing.assert_array_equal(road, ref_road)
            o32, r32, s32 = observe(st, params, num_objects, dtype=np.float32)
            assert o32.dtype == r32.dtype == np.float32
            np.testing.assert_array_equal(o32, ref_objects.astype(np.float32))
            np.testing.assert_array_equal(r32, ref_road.astype(np.float32))
            np.testing.assert_array_equal(s32, ref_slots)
        st, _info = step(st, rule_actions(st, params), params)


def test_compiled_observe_ties_and_empty_scenes():
    """Equal distances go to the lower slot (the stable sort's order), a scene with only the ego pads with -1 and
    zero rows, and a turned ego (heading near pi) wraps the others' relative headings as the numpy code does."""
    params = SimParams.from_scenario(load_scenario("open-road"))
    st = initial_state(params, [1, 2, 3])
    x, y, h, valid = st.x_m.copy(), st.y_m.copy(), st.heading_rad.copy(), st.valid.copy()
    x[0, 1:5] = x[0, EGO] + np.array([10.0, -10.0, 10.0, 0.0])  # three at exactly 10 m (two at the same point)
    y[0, 1:5] = y[0, EGO] + np.array([0.0, 0.0, 0.0, 10.0])
    valid[0, 1:5] = True
    valid[1, 1:] = False  # the ego alone
    h[2, EGO], h[2, 1:] = 3.1, -3.1
    st = st.replace(x_m=x, y_m=y, heading_rad=h, valid=valid)
    for m in (3, 8):
        objects, road, slots = observe(st, params, m)
        ref_objects, ref_road, ref_slots = _numpy_observe(st, params, m)
        np.testing.assert_array_equal(slots, ref_slots)
        np.testing.assert_array_equal(objects, ref_objects)
        np.testing.assert_array_equal(road, ref_road)
    assert list(slots[0, 1:5]) == [1, 2, 3, 4] and (slots[1, 1:] == -1).all()
