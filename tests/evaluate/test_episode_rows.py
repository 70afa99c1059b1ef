"""Closed-loop episode rows (``wmplan.evaluate.rows``, ``wmplan.evaluate.closed_loop``): the planner registry,
the one loop against a plain per-episode loop, and the outcome measures against hand-worked numbers.

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
from wmplan.evaluate.closed_loop import evaluate_seeds, evaluate_variants
from wmplan.evaluate.planners import PlannerEntry, planner_names, register_planner, unregister_planner
from wmplan.evaluate.rows import COLUMN_NAMES, clearance_and_ttc
from wmplan.plan.base import Decision, RulePlanner
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.ego_rules import RULE_DECISION_PERIOD_S, rule_actions
from wmplan.sim.engine import step
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import empty_state, initial_state
from wmplan.sim.state import EGO


def run_episodes(scenario, planner: str, seeds, **options) -> list[dict]:
    """Rows of one planner's episodes in one scenario (a built-in name or a Scenario), run seed 0."""
    scn = load_scenario(scenario) if isinstance(scenario, str) else scenario
    return evaluate_seeds(scn, planner, np.asarray(seeds), options=options).rows


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
    return {
        "collision": bool(state.collided[0]),
        "offroad": bool(state.offroad[0]),
        "success": bool(state.reached_goal[0] and not state.collided[0] and not state.offroad[0]),
        "progress_m": float(state.x_m[0, EGO]) - x0,
        "mean_speed_mps": sum(speeds) / len(speeds),
        "time_s": len(speeds) * params.dt_s,
    }


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
        assert set(row) == set(COLUMN_NAMES) - {"log_weight"}


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

    clearance, ttc = clearance_and_ttc(TrafficState.from_arrays(arr))
    assert ttc[0] == pytest.approx(3.0, rel=1e-12) and clearance[0] == pytest.approx(30.0, rel=1e-12)
    assert math.isinf(ttc[1]) and clearance[1] == pytest.approx(3.6 - 1.85, rel=1e-12)


def test_full_throttle_into_a_stopped_car_collides_when_kinematics_say(scenario_variant_open) -> None:
    """Ego at 20 m/s, full throttle (3 m/s^2), no steering; a (nearly) stopped car 50 m ahead bumper to bumper.
    x(t) = 20 t + 1.5 t^2 = 50 m at t = 2.0817 s: the collision must be flagged within one step of it, the episode
    ends there (progress = ego travel, no success), and the smallest clearance is an overlap (<= 0)."""
    d = scenario_to_dict(scenario_variant_open)
    d["ego"]["speed_mps"] = 20.0
    d["traffic"]["placed"] = [
        {
            "lane": d["ego"]["lane"],
            "offset_m": 50.0 + 0.5 * (4.7 + 4.7),
            "speed_mps": 0.0,
            "desired_speed_mps": 0.01,
            "length_m": 4.7,
        }
    ]
    scn = parse_scenario(d)

    class Throttle(RulePlanner):
        def decide(self, obs):
            return Decision(actions=np.tile([self.params.max_accel_mps2, 0.0], (obs.state.num_scenes, 1)))

    register_planner("full-throttle", PlannerEntry(lambda params: Throttle(params)), replace=True)
    try:
        (row,) = run_episodes(scn, "full-throttle", [5])
    finally:
        unregister_planner("full-throttle")
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


class _WrongShape(RulePlanner):
    def decide(self, obs):
        return Decision(actions=np.zeros((obs.state.num_scenes, 3)))


class _NoDecide:
    decision_dt_s = 0.2
    horizon_decisions = 1

    def reset(self, episode_keys):
        pass


def test_registry_errors_are_one_line() -> None:
    """Unknown names list the known ones; a taken name needs replace=True; the rules planner takes no options;
    a planner that breaks the protocol is named with what it lacks or returned wrong."""
    assert "rules" in planner_names()
    with pytest.raises(
        ConfigError, match=re.escape(f"unknown planner 'no-such-planner'; known: {', '.join(planner_names())}")
    ):
        run_episodes("open-road", "no-such-planner", [1])
    with pytest.raises(
        ConfigError, match=re.escape("planner 'rules' is already registered; pass replace=True to replace it")
    ):
        register_planner("rules", RulePlanner)
    with pytest.raises(ConfigError, match=re.escape("planner 'rules' takes no options, got ['horizon_s']")):
        run_episodes("open-road", "rules", [1], horizon_s=3.0)
    cases = {
        "wrong-shape": (_WrongShape, "planner 'wrong-shape': decide() returned actions of shape (2, 3)"),
        "no-decide": (
            lambda params: _NoDecide(),
            "planner 'no-decide': the factory returned _NoDecide, which lacks decide",
        ),
    }
    try:
        for name, (fn, msg) in cases.items():
            register_planner(name, fn)
            with pytest.raises(ConfigError, match="^" + re.escape(msg)):
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
    """``evaluate_variants``: a sampling planner and the rule-based ego, which run the variants in shared batches,
    give the rows of one variant at a time."""
    scenarios = _onramp_variants()
    seeds = [[5, 6], [7], [8, 9]]
    options = {"num_candidates": 8, "num_futures": 2, "batch_size": 4}
    for name in ("mpc+constant-velocity", "rules"):
        opts = options if name.startswith("mpc") else {"batch_size": 4}
        together = evaluate_variants(scenarios, seeds, name, options=opts)
        alone = [evaluate_seeds(scn, name, s, options=opts).rows for scn, s in zip(scenarios, seeds, strict=True)]
        strip = lambda groups: [[{k: v for k, v in r.items() if k != "decision_ms"} for r in g] for g in groups]  # noqa: E731
        assert strip(together) == strip(alone)
        assert [[r["seed"] for r in g] for g in together] == seeds


def test_rules_variants_of_other_limits_or_merge_zone_run_in_their_own_batches() -> None:
    """The rule-based ego reads the ego's limits and the merge zone from the parameters: variants that differ in
    them fall into their own batch classes, and every variant still gives the rows it gives alone."""
    from wmplan.sim.variants import batch_classes

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
    strip = lambda groups: [[{k: v for k, v in r.items() if k != "decision_ms"} for r in g] for g in groups]  # noqa: E731
    together = evaluate_variants(scenarios, seeds, "rules")
    alone = [evaluate_seeds(scn, "rules", s).rows for scn, s in zip(scenarios, seeds, strict=True)]
    assert strip(together) == strip(alone)
    with pytest.raises(ConfigError, match="planner 'rules' takes no options"):
        evaluate_variants(scenarios, seeds, "rules", options={"horizon": 3})
    assert evaluate_variants([], [], "rules") == []


def test_stress_batching_benchmark_smoke(tmp_path) -> None:
    """Smoke test of ``benchmarks/stress_batching.py --quick --json FILE`` (common practice, no source): the JSON
    has the documented keys, the shared batches give the rows of one batch per variant, and the timings are
    positive. The speed-up itself is measured by running the benchmark, not asserted here."""
    import importlib
    import json

    module = importlib.import_module("benchmarks.stress_batching")
    out = tmp_path / "stress.json"
    assert module.main(["--quick", "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    assert result["rows_identical"] is True
    assert result["seconds"]["per_variant"] > 0 and result["seconds"]["shared"] > 0
    assert result["speedup"] == pytest.approx(result["seconds"]["per_variant"] / result["seconds"]["shared"])
    assert result["variants"] == 6 and result["quick"] is True


def test_near_miss_column_from_its_inputs() -> None:
    """A near miss: smallest TTC under 1.5 s (docs/references.md#van-der-horst-1990-ttc-threshold) or a brake
    threat above 1 (wmplan.sim.threat), in an episode without a collision; hand-made cases, then the rows of a
    real run agree with the definition applied to their own columns."""
    from wmplan.evaluate.rows import NEAR_MISS_TTC_S, is_near_miss

    assert NEAR_MISS_TTC_S == 1.5
    ttc = np.array([1.49, 1.5, 3.0, 3.0, 0.5])
    threat = np.array([0.2, 0.2, 1.01, 1.0, 2.0])
    hit = np.array([False, False, False, False, True])
    assert is_near_miss(ttc, threat, hit).tolist() == [True, False, True, False, False]
    rows = run_episodes("cut-in", "rules", np.arange(12))
    for r in rows:
        assert r["near_miss"] == bool(is_near_miss(r["min_ttc_s"], r["max_brake_threat"], r["collision"]))
