"""Equivalence tests: the compiled engine (``wmplan.sim.engine.step``) against a plain per-vehicle Python loop.

Source of the check: an equivalence test of the compiled step against a slow, obviously correct loop (common
practice, no source: docs/references.md#practice-equivalence-test). The loop, ``wmplan.sim.loop_reference``, is
written from the published laws (IDM: Treiber, Hennecke, Helbing 2000, docs/references.md#treiber-2000-idm, with the
book form of s* from Treiber & Kesting 2013, docs/references.md#treiber-kesting-2013-book; MOBIL: Kesting, Treiber,
Helbing 2007, docs/references.md#kesting-2007-mobil; kinematic bicycle: Rajamani 2012, section 2.2,
docs/references.md#rajamani-2012-vehicle-dynamics; separating axes: Ericson 2005, ch. 4,
docs/references.md#ericson-2005-collision-detection; splitmix64: Steele, Lea, Flood 2014,
docs/references.md#steele-2014-splitmix) and the engine's documented rules, with Python floats and ``math``.
It is also the baseline of the speed-up figure of ``benchmarks/sim_throughput.py``, which these tests make honest.

Both run the same trajectory independently (each from its own previous state; the ego's actions are computed
once, from the engine's state, and fed to both). Float fields must agree to rtol = atol = 1e-9, integer and
boolean fields exactly. In practice they agree to about 1e-15: the loop's inverse normal CDF (``statistics``) and
the compiled one, and Python's and the compiled ``math`` functions, may differ in the last bit.

Each case also checks that it exercised what it is meant to exercise (lane changes, entries, yielding decisions,
decisions to yield and not to yield, hard-braking events, ego collisions, off-road and goal events), so that a
passing test says something.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

from wmplan import rng
from wmplan.scenario import load_scenario
from wmplan.scenario.loader import builtin_names
from wmplan.sim import SimParams, TrafficState, initial_state, step
from wmplan.sim import loop_reference as ref
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.spawn import empty_state
from wmplan.sim.state import EGO

RTOL = ATOL = 1e-9


def _assert_same(engine_state: TrafficState, loop_state: TrafficState, engine_info, loop_info, where: str) -> None:
    for field in dataclasses.fields(TrafficState):
        a, b = getattr(engine_state, field.name), getattr(loop_state, field.name)
        assert a.dtype == b.dtype and a.shape == b.shape, f"{where}: {field.name} dtype/shape"
        if a.dtype.kind == "f":
            np.testing.assert_allclose(b, a, rtol=RTOL, atol=ATOL, err_msg=f"{where}: {field.name}")
        else:
            np.testing.assert_array_equal(b, a, err_msg=f"{where}: {field.name}")
    for name in ("collision", "offroad", "goal"):
        np.testing.assert_array_equal(getattr(loop_info, name), getattr(engine_info, name), err_msg=f"{where}: {name}")
    np.testing.assert_allclose(loop_info.steer_rad, engine_info.steer_rad, rtol=RTOL, atol=ATOL)


def _run_both(params: SimParams, state: TrafficState, num_steps: int, actions_of) -> dict[str, int]:
    """Step the engine and the loop side by side; compare after every step; count the events seen."""
    seen = dict.fromkeys(
        (
            "lane_change",
            "spawn",
            "leave",
            "yield_decision",
            "no_yield_decision",
            "brake_start",
            "collision",
            "offroad",
            "goal",
        ),
        0,
    )
    eng, loop = state, state
    for k in range(num_steps):
        action = actions_of(k, eng)
        eng_next, eng_info = step(eng, action, params)
        loop_next, loop_info = ref.step_loop(loop, action, params)
        _assert_same(eng_next, loop_next, eng_info, loop_info, where=f"after step {k}")
        # accelerations: compared on the slots that held a vehicle during the step (the loop leaves the rest NaN)
        np.testing.assert_allclose(
            loop_info.accel_mps2[eng.valid],
            eng_info.accel_mps2[eng.valid],
            rtol=RTOL,
            atol=ATOL,
            err_msg=f"after step {k}: accel_mps2",
        )
        traffic = eng.valid.copy()
        traffic[:, EGO] = False
        seen["lane_change"] += int((traffic & (eng_next.lane != eng.lane)).sum())
        seen["spawn"] += int((eng_next.next_id - eng.next_id).sum())
        seen["leave"] += int((traffic & ~eng_next.valid).sum())
        seen["yield_decision"] += int(((eng.yield_state == 0) & (eng_next.yield_state == 1)).sum())
        seen["no_yield_decision"] += int(((eng.yield_state == 0) & (eng_next.yield_state == 2)).sum())
        seen["brake_start"] += int((traffic & (eng_next.brake_timer_s > eng.brake_timer_s)).sum())
        seen["collision"] += int(eng_info.collision.sum())
        seen["offroad"] += int(eng_info.offroad.sum())
        seen["goal"] += int(eng_info.goal.sum())
        eng, loop = eng_next, loop_next
    return seen


# Events each built-in scenario must show in NUM_STEPS steps of NUM_SCENES scenes (seeds 0..NUM_SCENES-1).
NUM_SCENES, NUM_STEPS = 8, 90
EXPECTED = {
    "courtesy-stop": ("lane_change", "yield_decision", "no_yield_decision"),
    "cut-in": ("lane_change", "spawn", "leave"),
    "lane-drop": ("lane_change", "spawn", "leave", "yield_decision", "no_yield_decision", "brake_start"),
    "lane-drop-turns": ("lane_change",),
    "onramp-merge": ("lane_change", "spawn", "leave", "yield_decision", "no_yield_decision", "brake_start"),
    "open-road": ("lane_change", "spawn", "leave"),
    "short-gap-cut-in": ("lane_change",),
    "stop-and-go": ("lane_change", "spawn", "brake_start"),
}


def test_every_builtin_scenario_is_covered():
    """The table of expected events names every built-in scenario (so a new one is not silently skipped)."""
    assert sorted(EXPECTED) == builtin_names()


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_loop_equals_engine_with_rule_based_ego(name):
    """Built-in scenario, seeds 0..7, the rule-based ego, 90 steps: loop == engine at every step."""
    params = SimParams.from_scenario(load_scenario(name))
    state = initial_state(params, list(range(NUM_SCENES)))
    seen = _run_both(params, state, NUM_STEPS, lambda k, s: rule_actions(s, params))
    missing = [e for e in EXPECTED[name] if seen[e] == 0]
    assert not missing, f"{name}: the trajectory never exercised {missing} (seen: {seen})"


def test_loop_equals_engine_with_random_actions():
    """open-road, seeds 10..17, uniform random actions up to 1.2 x the limits (so that clipping, the steering-rate
    limit and leaving the road all happen), 90 steps."""
    params = SimParams.from_scenario(load_scenario("open-road"))
    state = initial_state(params, list(range(10, 10 + NUM_SCENES)))
    gen = np.random.default_rng(1234)
    lo = np.array([-1.2 * params.max_brake_mps2, -1.2 * params.max_steer_rad])
    hi = np.array([1.2 * params.max_accel_mps2, 1.2 * params.max_steer_rad])
    seen = _run_both(params, state, NUM_STEPS, lambda k, s: gen.uniform(lo, hi, size=(s.num_scenes, 2)))
    assert seen["offroad"] > 0 and seen["lane_change"] > 0 and seen["spawn"] > 0, seen


def test_loop_equals_engine_at_collision_and_goal():
    """open-road, seeds 20..23: scenes 0-1 moved (all vehicles together) to 15 m before the goal, so that the goal
    is reached; scenes 2-3 get a slow truck 4 m ahead of the ego in its lane while the ego accelerates at full
    throttle, so that it collides. 40 steps; the outcome flags must be raised and must agree."""
    params = SimParams.from_scenario(load_scenario("open-road"))
    arr = initial_state(params, [20, 21, 22, 23]).to_arrays()
    shift = params.goal_x_m - 15.0 - arr["x_m"][:2, EGO]
    arr["x_m"][:2] += shift[:, None]
    slot = 15  # overwrite the last slot with the truck
    for s in (2, 3):
        arr["valid"][s, slot] = True
        arr["vehicle_id"][s, slot] = arr["next_id"][s]
        arr["next_id"][s] += 1
        arr["lane"][s, slot] = arr["lane"][s, EGO]
        arr["y_m"][s, slot] = arr["y_m"][s, EGO]
        arr["length_m"][s, slot], arr["width_m"][s, slot] = 12.0, 2.5
        arr["x_m"][s, slot] = arr["x_m"][s, EGO] + 0.5 * (arr["length_m"][s, EGO] + 12.0) + 4.0
        arr["vx_mps"][s, slot] = 10.0
    state = TrafficState.from_arrays(arr)
    full = np.array([[params.max_accel_mps2, 0.0]] * 4)
    seen = _run_both(params, state, 40, lambda k, s: full)
    assert seen["goal"] > 0 and seen["collision"] > 0, seen


def test_loop_equals_engine_on_exact_position_ties():
    """lane-drop (lane 2 ends at 400 m, merge zone 250 m), hand-placed vehicles at exactly equal positions, so that
    the tie rule (sort by position, slot order breaks ties) decides leaders, lane-change neighbours and yielding
    partners; seeds 30..33, the rule-based ego, 30 steps.

    (slot, lane, lane moving to, x): a same-lane triple with two at one position; a lane-changer level with a vehicle
    of its target lane, once with the lower slot and once with the higher slot on the changer; a merger level with a
    driver of its target lane, in both slot orders.
    """
    params = SimParams.from_scenario(load_scenario("lane-drop"))
    arr = empty_state(params, rng.scene_keys([30, 31, 32, 33])).to_arrays()
    placed = [
        (4, 0, 0, 100.0),
        (3, 0, 0, 120.0),
        (5, 0, 0, 120.0),
        (2, 1, 1, 140.0),
        (6, 0, 1, 140.0),
        (10, 0, 1, 190.0),
        (8, 1, 1, 190.0),
        (11, 2, 2, 250.0),
        (12, 1, 1, 250.0),
        (13, 1, 1, 300.0),
        (14, 2, 2, 300.0),
    ]
    for slot, lane, intent, x_m in placed:
        arr["valid"][:, slot] = True
        arr["vehicle_id"][:, slot] = slot
        arr["lane"][:, slot] = intent
        arr["y_m"][:, slot] = params.lane_centre_m(lane)
        arr["x_m"][:, slot] = x_m
        arr["vx_mps"][:, slot] = 20.0
    arr["next_id"][:] = 20
    state = TrafficState.from_arrays(arr)
    seen = _run_both(params, state, 30, lambda k, s: rule_actions(s, params))
    assert seen["yield_decision"] > 0, seen


@pytest.mark.parametrize("parts", [(0,), (7, 3, 2), (2**64 - 1, -1, 5), (123456789, 40, 3, 17)])
def test_scalar_hash_matches_package_rng(parts):
    """The loop's pure-integer splitmix64 (Steele, Lea, Flood, OOPSLA 2014) draws the package's uniforms exactly,
    and its truncated normals to 1e-12."""
    arrays = [np.uint64(p) if p > 2**63 - 1 else np.int64(p) for p in parts]
    assert ref.combine(*parts) == int(rng.combine(*arrays))
    assert ref.uniform(*parts) == float(rng.uniform(*arrays))
    # truncated normal by the inverse CDF: the loop uses math.erfc and statistics.NormalDist (Wichura's AS 241), the
    # package scipy.special.ndtr / ndtri; both are accurate to a few ulp, hence the tolerance
    for spec in ((1.2, 0.2, 0.8, 2.0), (30.0, 3.0, 22.0, 38.0), (2.0, 0.0, 2.0, 2.0), (0.0, 1.0, -np.inf, np.inf)):
        np.testing.assert_allclose(
            ref.truncated_normal(*spec, *parts), float(rng.truncated_normal(*spec, *arrays)), rtol=1e-12, atol=1e-12
        )


def test_loop_reference_rejects_a_bad_action_shape():
    """Bad input gets a one-line error naming the argument and the expected shape (common practice, no source)."""
    params = SimParams.from_scenario(load_scenario("open-road"))
    state = initial_state(params, [0, 1])
    with pytest.raises(ValueError, match=r"action must have shape \(2, 2\) \(accel_mps2, steer_rad\), got \(2,\)"):
        ref.step_loop(state, np.zeros(2), params)


def test_throughput_benchmark_quick_run(tmp_path, capsys):
    """Smoke test of ``benchmarks/sim_throughput.py --quick --json FILE`` (common practice, no source): the file is
    written, parses, holds a positive rate for every promised scene count and a speed-up measured on states where
    the loop and the engine agree. The rates themselves depend on the machine and are not checked."""
    from benchmarks import sim_throughput as bench

    out = tmp_path / "sim.json"
    assert bench.main(["--quick", "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    assert json.loads(capsys.readouterr().out) == result
    assert set(result["vehicle_steps_per_s"]) == {"1", "64", "512", "2048"}
    assert all(np.isfinite(v) and v > 0 for v in result["vehicle_steps_per_s"].values())
    assert result["vs_loop"]["states_agree"] is True and result["speedup_vs_loop"] > 1.0
    assert result["env_steps_per_s_single"] > 0 and result["vector_env_steps_per_s_64"] > 0
    assert set(result["targets"]) == {
        "speedup_vs_loop",
        "vehicle_steps_per_s_1",
        "env_steps_per_s_single",
        "vector_env_steps_per_s_64",
        "compile_s",
    }
    threaded = result["threaded"]  # the split over threads gives the one-thread states bit for bit
    assert threaded["same_states_as_one_thread"] is True and threaded["threads"] >= 2 and threaded["speedup"] > 0
    assert {"platform", "numpy", "cpu_count"} <= set(result["machine"])
    assert not list(tmp_path.glob("*.tmp"))  # the atomic write left no temporary file behind
