"""The compiled thinning of initial traffic (``wmplan.sim.spawn._thin``) against a plain Python loop of the same rule
(an equivalence check, docs/references.md#practice-equivalence-test).

The rule: candidates of a scene in order of decreasing position; each survives if its gap to the last survivor ahead
in its lane is at least its equilibrium gap, or it is hand-placed; one that does not fit but is more than 8 m behind
survives at the survivor's speed (if that is lower).
"""

from __future__ import annotations

import numpy as np
import pytest

from wmplan.scenario import builtin_names, load_scenario
from wmplan.sim import SimParams, initial_state
from wmplan.sim.spawn import _thin


def _thin_loop(order, c_lane, c_x, c_len, need, c_placed, c_speed, ok, num_lanes):
    """The rule of the module docstring, one candidate at a time in plain Python floats."""
    ok, c_speed = ok.copy(), c_speed.copy()
    for r in range(order.shape[0]):
        last = {ln: (float("inf"), 0.0, 0.0) for ln in range(num_lanes)}
        for ci in order[r]:
            ln = min(max(int(c_lane[r, ci]), 0), num_lanes - 1)
            lx, llen, lv = last[ln]
            gap = lx - llen / 2 - float(c_x[r, ci]) - float(c_len[r, ci]) / 2
            fits = gap >= need[r, ci] or c_placed[r, ci] >= 0
            alive = bool(ok[r, ci]) and (fits or gap > 8.0)
            if alive and not fits:
                c_speed[r, ci] = min(c_speed[r, ci], lv)
            ok[r, ci] = alive
            if alive:
                last[ln] = (float(c_x[r, ci]), float(c_len[r, ci]), float(c_speed[r, ci]))
    return ok, c_speed


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_compiled_thinning_equals_the_loop(seed):
    """Random candidates (some dropped beforehand, some hand-placed, some in lane -1), 50 scenes of 40."""
    gen = np.random.default_rng(seed)
    s_n, c_n, lanes = 50, 40, 3
    c_x = gen.uniform(-100.0, 100.0, (s_n, c_n))
    c_x[:, :4] = c_x[:, 4:8]  # equal positions: the stable order decides
    c_lane = gen.integers(-1, lanes, (s_n, c_n))
    c_len = gen.uniform(3.0, 12.0, (s_n, c_n))
    need = gen.uniform(2.0, 30.0, (s_n, c_n))
    c_placed = np.where(gen.uniform(size=(s_n, c_n)) < 0.1, 0, -1)
    c_speed = gen.uniform(0.0, 35.0, (s_n, c_n))
    ok = gen.uniform(size=(s_n, c_n)) < 0.9
    order = np.argsort(-c_x, axis=1, kind="stable")
    ref_ok, ref_speed = _thin_loop(order, c_lane, c_x, c_len, need, c_placed, c_speed, ok, lanes)
    out_ok, out_speed = ok.copy(), c_speed.copy()
    _thin(order, c_lane, c_x, c_len, need, c_placed, out_speed, out_ok, np.empty((3, lanes)))
    np.testing.assert_array_equal(out_ok, ref_ok)
    np.testing.assert_array_equal(out_speed, ref_speed)
    assert 0 < ref_ok.sum() < ok.sum() and (ref_speed != c_speed).any()  # the rule dropped and slowed some


@pytest.mark.parametrize("name", builtin_names())
def test_initial_states_keep_their_gaps(name):
    """After thinning, consecutive random vehicles in a lane are at least 2 m apart bumper to bumper (the rule's
    lower bound: the equilibrium gap is at least the minimum gap s0 = 2 m, or the gap exceeds 8 m), in 200 scenes
    of each built-in scenario; a scene alone equals itself in the batch."""
    params = SimParams.from_scenario(load_scenario(name))
    st = initial_state(params, np.arange(200))
    placed = {p.offset_m + params.scenario.ego.x_m for p in params.scenario.traffic.placed}
    for s in range(0, 200, 7):
        for ln in range(params.num_lanes):
            sel = st.valid[s] & (st.lane[s] == ln)
            sel[0] = False
            xs, ls = st.x_m[s, sel], st.length_m[s, sel]
            order = np.argsort(xs)
            xs, ls = xs[order], ls[order]
            gaps = np.diff(xs) - 0.5 * (ls[1:] + ls[:-1])
            hand = np.isin(xs[1:], list(placed)) | np.isin(xs[:-1], list(placed))
            assert (gaps[~hand] >= 2.0).all()
        one = initial_state(params, [s])
        np.testing.assert_array_equal(one.x_m[0], st.x_m[s])
        np.testing.assert_array_equal(one.vx_mps[0], st.vx_mps[s])
