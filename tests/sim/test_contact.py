"""The side of the ego touched in a collision (``wmplan.sim.engine.contact_sides``).

Naming a crash by the first point of contact on the vehicle (front, rear, left, right) is common practice, no
source (docs/references.md#practice-contact-side). Overlap itself is checked against shapely 2 (``box``, ``rotate``
with ``use_radians=True``, ``translate``, ``intersects``; docs/references.md#lib-shapely), the reference library of
tests/sim/test_collision.py. The cases are built by hand:
another car placed in the ego's own frame just inside one of its sides (a 0.2 m overlap), then the pair turned and
moved as a whole, which must not change the answer.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from shapely import affinity
from shapely.geometry import box

from wmplan.scenario import load_scenario
from wmplan.sim.engine import CONTACT_SIDES, contact_sides
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import empty_state
from wmplan.sim.state import EGO

EGO_L, EGO_W = 4.7, 1.85
CAR_L, CAR_W = 4.5, 1.8


def _shapely_box(cx, cy, length, width, heading):
    g = box(-length / 2, -width / 2, length / 2, width / 2)
    g = affinity.rotate(g, heading, origin=(0.0, 0.0), use_radians=True)
    return affinity.translate(g, cx, cy)


# other car's centre and heading in the ego's frame (x forward, y left), and the side it touches
CASES = [
    ((0.5 * (EGO_L + CAR_L) - 0.2, 0.3, 0.0), "front"),  # the ego runs into the car ahead
    ((-0.5 * (EGO_L + CAR_L) + 0.2, -0.4, 0.0), "rear"),  # run into from behind
    ((1.0, 0.5 * (EGO_W + CAR_W) - 0.2, 0.0), "left"),  # side by side, the car to the left
    ((-1.5, -0.5 * (EGO_W + CAR_W) + 0.2, 0.05), "right"),  # and to the right, slightly turned
    ((3.0, 2.2, 0.0), ""),  # near, not touching
]


def _scene(placements, ego_xy=(100.0, 5.4), ego_heading=0.0):
    """A state with one scene per placement: the ego at ``ego_xy`` turned by ``ego_heading``, the other car placed
    in the ego's frame (slot 1)."""
    params = SimParams.from_scenario(load_scenario("open-road"))
    st = empty_state(params, np.arange(len(placements), dtype=np.uint64))
    c, s = math.cos(ego_heading), math.sin(ego_heading)
    for i, (fx, fy, fh) in enumerate(placements):
        st.x_m[i, EGO], st.y_m[i, EGO], st.heading_rad[i, EGO] = ego_xy[0], ego_xy[1], ego_heading
        st.length_m[i, EGO], st.width_m[i, EGO] = EGO_L, EGO_W
        st.x_m[i, 1] = ego_xy[0] + c * fx - s * fy
        st.y_m[i, 1] = ego_xy[1] + s * fx + c * fy
        st.heading_rad[i, 1] = ego_heading + fh
        st.length_m[i, 1], st.width_m[i, 1] = CAR_L, CAR_W
        st.valid[i, 1] = True
    return st


@pytest.mark.parametrize("ego_heading", [0.0, 0.12, -0.3])
def test_contact_side_of_hand_built_cases(ego_heading):
    st = _scene([p for p, _ in CASES], ego_heading=ego_heading)
    got = contact_sides(st, np.arange(len(CASES)))
    assert got == [side for _, side in CASES]
    for i in range(len(CASES)):  # touching or not, as shapely sees it
        a = _shapely_box(st.x_m[i, EGO], st.y_m[i, EGO], EGO_L, EGO_W, st.heading_rad[i, EGO])
        b = _shapely_box(st.x_m[i, 1], st.y_m[i, 1], CAR_L, CAR_W, st.heading_rad[i, 1])
        assert a.intersects(b) == (got[i] != "")
    assert set(got) - {""} <= set(CONTACT_SIDES)


def test_a_fast_run_into_the_car_ahead_is_a_front_contact():
    """At 25 m/s closing speed the ego moves 2.5 m in a 0.1 s step: it can end the step 2 m deep into the car ahead
    while overlapping it by less sideways (here 0.65 m, the ego 1.2 m to the side). The overlap alone would say
    "left"; the step before shows that the cars already overlapped sideways and met lengthwise."""
    reach = 0.5 * (EGO_L + CAR_L)
    now = _scene([(reach - 2.0, 1.2, 0.0)])
    assert contact_sides(now, np.array([0])) == ["left"]  # least overlap, no history
    before = _scene([(reach + 0.5, 1.2, 0.0)], ego_xy=(97.5, 5.4))  # the ego 2.5 m back, the other car where it is
    assert before.x_m[0, 1] == pytest.approx(now.x_m[0, 1])
    before.vehicle_id[0, 1] = now.vehicle_id[0, 1] = 5
    assert contact_sides(now, np.array([0]), before) == ["front"]
    side_by_side = _scene([(1.0, 0.5 * (EGO_W + CAR_W) + 0.3, 0.0)])  # beside, 0.3 m apart a step earlier
    side_by_side.vehicle_id[0, 1] = 5
    assert contact_sides(_scene([CASES[2][0]]), np.array([0]), side_by_side) == ["left"]


def test_contact_side_ignores_empty_slots_and_picks_the_nearest_car():
    st = _scene([CASES[0][0], CASES[1][0]])
    st.valid[0, 1] = False  # scene 0: the car ahead is an empty slot now
    st.x_m[1, 2], st.y_m[1, 2] = (
        st.x_m[1, EGO] + 4.55,
        st.y_m[1, EGO],
    )  # scene 1: a second car touching in front, farther
    st.length_m[1, 2], st.width_m[1, 2], st.valid[1, 2] = CAR_L, CAR_W, True
    assert contact_sides(st, np.array([0, 1])) == ["", "rear"]
    assert contact_sides(st, np.array([], dtype=np.int64)) == []
