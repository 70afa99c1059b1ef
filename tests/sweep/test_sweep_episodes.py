"""Closed-loop episode rows: the planner registry, the shared loop against a plain per-episode loop, and the
outcome measures against hand-worked numbers.

References: time-to-collision at constant speeds TTC = gap / (v_f - v_l) (Hayward 1972; check values [D] of
docs/references.md#hayward-1972-ttc); constant-acceleration kinematics x = v0 t + a t^2 / 2 (common practice, no
source: docs/references.md#practice-kinematics); the shared loop against a plain loop
(docs/references.md#practice-equivalence-test).
"""

from __future__ import annotations

import copy
import math
import re

import numpy as np
import pytest

from wmplan.errors import ConfigError
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.ego_rules import RULE_DECISION_PERIOD_S, rule_actions
from wmplan.sim.engine import step
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import empty_state, initial_state
from wmplan.sim.state import EGO
from wmplan.sweep import (
    REQUIRED_KEYS,
    closed_loop,
    planner_names,
    register_planner,
    run_episodes,
    unregister_planner,
)
from wmplan.sweep.episodes import _clearance_and_ttc


def _reference_episode(params: SimParams, seed: int) -> dict:
    """One episode alone, stepped in a plain loop that stops at the engine's ``done`` (obviously correct); the
    rule-based driver decides every ``RULE_DECISION_PERIOD_S`` and holds its action in between."""
    state = initial_state(params, [seed])
    x0 = float(state.x_m[0, EGO])
    speeds = []
    hold = round(RULE_DECISION_PERIOD_S / params.dt_s)
    for t in range(params.num_steps):
        if t % hold == 0:
            action = rule_actions(state, params)
        state, _ = step(state, action, params)
        speeds.append(float(state.ego_speed_mps[0]))
        if state.done[0]:
            break
    return {"collision": bool(state.collided[0]), "offroad": bool(state.offroad[0]),
            "success": bool(state.reached_goal[0] and not state.collided[0] and not state.offroad[0]),
            "progress_m": float(state.x_m[0, EGO]) - x0, "mean_speed_mps": sum(speeds) / len(speeds),
            "time_s": len(speeds) * params.dt_s}


@pytest.mark.parametrize("scenario", ["onramp-merge", "cut-in"])
def test_batched_rows_equal_one_episode_at_a_time(scenario: str) -> None:
    """The batched loop (episodes ending at different steps) gives each episode the numbers of a plain loop
    over that episode alone."""
    scn = load_scenario(scenario)
    seeds = [3, 11, 12, 40, 41, 77]
    rows = run_episodes(scn, "rules", seeds)
    params = SimParams.from_scenario(scn)
    assert [r["seed"] for r in rows] == seeds and all(r["planner"] == "rules" for r in rows)
    for row, seed in zip(rows, seeds, strict=True):
        ref = _reference_episode(params, seed)
        for key, value in ref.items():
            assert row[key] == pytest.approx(value, rel=1e-12, abs=1e-12), (seed, key)
        assert set(REQUIRED_KEYS) <= set(row)


def test_ttc_and_clearance_match_hand_worked_values(scenario_variant_open) -> None:
    """Leader 30 m ahead bumper to bumper at 15 m/s, ego at 25 m/s: TTC 3.0 s, clearance 30 m
    (docs/references.md#hayward-1972-ttc).
    A vehicle alongside in the next lane: clearance = lane width - half widths = 3.6 - 1.85 = 1.75 m, no TTC."""
    params = SimParams.from_scenario(scenario_variant_open)
    st = empty_state(params, np.array([1, 2], dtype=np.uint64))
    arr = st.to_arrays()
    ego_len = params.ego_length_m
    for s in (0, 1):
        arr["vx_mps"][s, EGO] = arr["ego_speed_mps"][s] = 25.0
        arr["valid"][s, 1] = True
        arr["length_m"][s, 1], arr["width_m"][s, 1] = 4.0, 1.85
    # scene 0: leader in the same lane
    arr["x_m"][0, 1] = arr["x_m"][0, EGO] + 30.0 + 0.5 * (ego_len + 4.0)
    arr["y_m"][0, 1] = arr["y_m"][0, EGO]
    arr["vx_mps"][0, 1] = 15.0
    # scene 1: alongside in the next lane, slower
    arr["x_m"][1, 1] = arr["x_m"][1, EGO]
    arr["y_m"][1, 1] = arr["y_m"][1, EGO] + 3.6
    arr["vx_mps"][1, 1] = 20.0
    from wmplan.sim.state import TrafficState

    clearance, ttc = _clearance_and_ttc(TrafficState.from_arrays(arr))
    assert ttc[0] == pytest.approx(3.0, rel=1e-12) and clearance[0] == pytest.approx(30.0, rel=1e-12)
    assert math.isinf(ttc[1]) and clearance[1] == pytest.approx(3.6 - 1.85, rel=1e-12)


def test_full_throttle_into_a_stopped_car_collides_when_kinematics_say(scenario_variant_open) -> None:
    """Ego at 20 m/s, full throttle (3 m/s^2), no steering; a (nearly) stopped car 50 m ahead bumper to bumper.
    x(t) = 20 t + 1.5 t^2 = 50 m at t = 2.0817 s: the collision must be flagged within one step of it, the episode
    ends there (progress = ego travel, no success), and the smallest clearance is an overlap (<= 0)."""
    d = scenario_to_dict(scenario_variant_open)
    d["ego"]["speed_mps"] = 20.0
    d["traffic"]["placed"] = [{"lane": d["ego"]["lane"], "offset_m": 50.0 + 0.5 * (4.7 + 4.7), "speed_mps": 0.0,
                               "desired_speed_mps": 0.01, "length_m": 4.7}]
    scn = parse_scenario(d)

    def throttle(params):
        return lambda state: np.tile([params.max_accel_mps2, 0.0], (state.num_scenes, 1))

    (row,) = closed_loop(scn, [5], throttle)
    t_hit = (-20.0 + math.sqrt(20.0**2 + 2 * 3.0 * 50.0)) / 3.0
    assert row["collision"] and not row["success"]
    assert t_hit - 1e-9 <= row["time_s"] <= t_hit + 0.1 + 1e-9
    assert row["progress_m"] == pytest.approx(20.0 * row["time_s"] + 1.5 * row["time_s"] ** 2, abs=0.5)
    assert row["min_clearance_m"] <= 0.0 and row["min_ttc_s"] < 2.5


@pytest.fixture
def scenario_variant_open():
    """open-road with no random traffic and no hard braking: a state holds only what a test places."""
    d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
    d["traffic"]["density_veh_per_km"] = [0.0, 0.0, 0.0]
    d["drivers"]["hard_brake_rate_per_min"] = 0.0
    d["ego"]["length_m"] = 4.7
    return parse_scenario(d)


# --- registry -----------------------------------------------------------------------------------------------------


def _bad_count(scenario, seeds, **options):
    return [{"seed": int(seeds[0])}]


def _bad_order(scenario, seeds, **options):
    rows = run_episodes(scenario, "rules", seeds)
    return list(reversed(rows))


def _missing_key(scenario, seeds, **options):
    return [{k: v for k, v in r.items() if k != "success"} for r in run_episodes(scenario, "rules", seeds)]


def test_registry_errors_are_one_line() -> None:
    """Unknown names list the known ones; a taken name needs replace=True; the rules planner takes no options;
    a runner's rows are checked for count, order and required keys."""
    assert "rules" in planner_names()
    with pytest.raises(ConfigError, match=re.escape(f"unknown planner 'no-such-planner'; known planners: "
                                                    f"{', '.join(planner_names())}")):
        run_episodes("open-road", "no-such-planner", [1])
    with pytest.raises(ConfigError, match=re.escape("planner 'rules' is already registered; pass replace=True to "
                                                    "replace it")):
        register_planner("rules", _bad_count)
    with pytest.raises(ConfigError, match=re.escape("planner 'rules' takes no options, got ['horizon_s']")):
        run_episodes("open-road", "rules", [1], horizon_s=3.0)
    cases = {
        "bad-count": (_bad_count, "planner 'bad-count' returned 1 rows for 2 seeds; return one per seed"),
        "bad-order": (_bad_order, "planner 'bad-order': row 0 has seed 2 but seeds[0] is 1; return rows in the "
                                  "order of the seeds"),
        "no-success": (_missing_key, "planner 'no-success': row 0 lacks key(s) ['success']; every row needs "
                                     f"{list(REQUIRED_KEYS)}"),
    }
    try:
        for name, (fn, msg) in cases.items():
            register_planner(name, fn)
            with pytest.raises(ConfigError, match="^" + re.escape(msg) + "$"):
                run_episodes("open-road", name, [1, 2])
    finally:
        for name in cases:
            unregister_planner(name)


def _onramp_variants() -> list:
    out = []
    for k, (scale, speed) in enumerate([(1.0, 22.0), (1.5, 18.0), (0.7, 25.0)]):
        d = copy.deepcopy(scenario_to_dict(load_scenario("onramp-merge")))
        d["duration_s"] = 3.0
        d["traffic"]["density_veh_per_km"] = [scale * v for v in d["traffic"]["density_veh_per_km"]]
        d["ego"]["speed_mps"] = speed
        out.append(parse_scenario(d, source=f"variant-{k}"))
    return out


def test_variants_in_shared_batches_match_one_variant_at_a_time() -> None:
    """``call_planner_variants``: the runners of a sampling planner and of the rule-based ego (which run the
    variants in shared batches) give the checked rows of ``call_planner`` variant by variant."""
    from wmplan.sweep.episodes import call_planner, call_planner_variants, get_planner
    from wmplan.sweep.mpc_planners import register_mpc_planners

    register_mpc_planners()
    scenarios = _onramp_variants()
    seeds = [[5, 6], [7], [8, 9]]
    options = {"num_candidates": 8, "num_futures": 2, "batch_size": 4}
    for name in ("mpc+constant-velocity", "rules"):
        fn = get_planner(name)
        assert getattr(fn, "run_variants", None) is not None
        opts = options if name.startswith("mpc") else {}
        together = call_planner_variants(name, fn, scenarios, seeds, opts)
        alone = [call_planner(name, fn, scn, s, opts) for scn, s in zip(scenarios, seeds, strict=True)]
        strip = lambda groups: [[{k: v for k, v in r.items() if k != "decision_ms"} for r in g] for g in groups]  # noqa: E731
        assert strip(together) == strip(alone)
        assert [[r["seed"] for r in g] for g in together] == seeds


def test_rules_variants_of_other_limits_or_merge_zone_run_in_their_own_batches() -> None:
    """The rule-based ego reads the ego's limits and the merge zone from the parameters: variants that differ in
    them fall into their own batch classes, and every variant still gives the rows it gives alone."""
    from wmplan.sim.variants import batch_classes
    from wmplan.sweep.episodes import closed_loop_variants, rules_episodes

    scenarios = list(_onramp_variants())
    d = copy.deepcopy(scenario_to_dict(scenarios[0]))
    d["limits"]["max_brake_mps2"] = 1.5
    scenarios.append(parse_scenario(d, source="weak brakes"))
    d = copy.deepcopy(scenario_to_dict(scenarios[1]))
    d["drivers"]["merge_zone_m"] = 120.0
    scenarios.append(parse_scenario(d, source="short merge zone"))
    classes = batch_classes(scenarios, also=lambda scn: scn.drivers.merge_zone_m)
    assert len(classes) == 3 and sorted(len(c) for c in classes) == [1, 1, 3]
    seeds = [[5, 6], [7], [8, 9], [10, 11], [12]]
    together = rules_episodes.run_variants(scenarios, seeds)
    alone = [rules_episodes(scn, s) for scn, s in zip(scenarios, seeds, strict=True)]
    assert together == alone
    with pytest.raises(ConfigError, match="planner 'rules' takes no options"):
        rules_episodes.run_variants(scenarios, seeds, horizon=3)
    assert closed_loop_variants([], [], None) == []


def test_a_runner_whose_variant_rows_do_not_fit_is_refused() -> None:
    from wmplan.sweep.episodes import call_planner_variants

    def runner(scenario, seeds, **options):
        return [{"collision": False, "offroad": False, "success": True, "progress_m": 1.0, "mean_speed_mps": 1.0}
                for _ in seeds]

    runner.run_variants = lambda scenarios, seeds, **options: [[]]
    with pytest.raises(ConfigError, match="run_variants returned list for 3 variants"):
        call_planner_variants("odd", runner, _onramp_variants(), [[1], [2], [3]])


def test_stress_batching_benchmark_smoke(tmp_path) -> None:
    """Smoke test of ``benchmarks/stress_batching.py --quick --json FILE`` (common practice, no source): the JSON
    has the documented keys, the shared batches give the rows of one batch per variant, and the timings are
    positive. The speed-up itself is measured by running the benchmark, not asserted here."""
    import importlib.util
    import json
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / "benchmarks" / "stress_batching.py"
    spec = importlib.util.spec_from_file_location("wmplan_bench_stress_batching_test", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    out = tmp_path / "stress.json"
    assert module.main(["--quick", "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    assert result["rows_identical"] is True
    assert result["seconds"]["per_variant"] > 0 and result["seconds"]["shared"] > 0
    assert result["speedup"] == pytest.approx(result["seconds"]["per_variant"] / result["seconds"]["shared"])
    assert result["variants"] == 6 and result["quick"] is True
