"""How closed-loop episodes end (``outcome``, ``final_lane``, ``in_goal_lane``) and the timeout figures of the
evaluation summary and table (``wmplan.evaluate.closed_loop``, ``wmplan.evaluate.tables``).

Sources:
- The four ways an episode ends (goal, collision, off-road, time running out) and telling a stall before the merge
  from slow progress after it by the lane the ego ends in: common practice, no source.
- The lane that holds a lateral position: the scenario file's lane width (3.6 m for onramp-merge, AASHTO metric
  editions, from memory, as that file says: docs/references.md#aashto-green-book), recomputed here from the
  recorded frames, lanes counted from y = 0.
- Wilson (1927) score interval (docs/references.md#wilson-1927):
  ``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")``, a general-purpose reference library
  (docs/references.md#lib-scipy).
- Expected calibration error: ``wmplan.evaluate.stats`` (checked there against worked examples).

Results on a simplified traffic model; they certify nothing about a real vehicle.
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy.stats
import torch

from wmplan.evaluate import stats
from wmplan.evaluate.closed_loop import OUTCOMES, run_batch
from wmplan.evaluate.planners import make_planner
from wmplan.evaluate.tables import calibration, format_table, summarise_planner
from wmplan.plan.mpc import CostWeights, PlannerConfig
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.features import F_Y
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO


@pytest.fixture(autouse=True)
def one_torch_thread():
    """One torch thread on the shared 2-core machine, restored afterwards."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def scenario_with(name: str, **changes):
    d = copy.deepcopy(scenario_to_dict(load_scenario(name)))
    for key, value in changes.items():
        d[key] = value
    return parse_scenario(d, source=name)


def run_with_frames(scn, planner_name, seeds, cfg=None):
    params = SimParams.from_scenario(scn)
    planner = make_planner(planner_name, params, {} if cfg is None else {"config": cfg})
    frames = [initial_state(params, seeds).vehicles()]
    out = run_batch(params, planner, seeds, seed=0, frames=frames, name=planner_name)
    return params, out, np.stack(frames)  # (T + 1, S, V, F)


def test_outcome_and_final_lane_follow_the_recorded_frames():
    """Rule-based ego on onramp-merge cut to 8 s: nobody reaches the goal 280 m ahead, so every episode times out,
    some on the acceleration lane (lane 0, outside the goal's lanes 1 and 2). The final lane is the lane of the
    ego's centre in the frame where the episode ended, with the lane width of the scenario file."""
    scn = scenario_with("onramp-merge", duration_s=8.0)
    seeds = np.arange(8)
    params, out, frames = run_with_frames(scn, "rules", seeds)
    sub = round(PlannerConfig().plan_dt_s / params.dt_s)
    lane_width = scn.road.lane_width_m
    assert lane_width == 3.6
    goal_lanes = set(scn.ego.goal.lanes)
    for s, row in enumerate(out.rows):
        y_end = frames[row["decisions"] * sub, s, EGO, F_Y]
        lane = min(max(math.floor(y_end / lane_width), 0), len(scn.road.lanes) - 1)
        assert row["final_lane"] == lane
        assert row["in_goal_lane"] == (lane in goal_lanes)
        assert row["outcome"] in OUTCOMES
        assert (row["outcome"] == "goal") == row["success"]
        assert (row["outcome"] == "timeout") == (not (row["collision"] or row["offroad"] or row["success"]))
    assert all(r["outcome"] == "timeout" for r in out.rows)
    assert any(not r["in_goal_lane"] for r in out.rows)
    summary = summarise_planner(out.rows)
    assert summary["timeout_rate"] == 1.0
    assert summary["timeouts_outside_goal_lanes"] == sum(not r["in_goal_lane"] for r in out.rows)


def test_a_collision_is_the_outcome_when_the_ego_hits_a_stopped_vehicle():
    """A planner blind to risk with constant-velocity predictions drives into a vehicle stopped 120 m ahead on a
    one-lane road: the outcome is 'collision', in lane 0, which is the goal's lane there."""
    d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
    d["road"]["lanes"] = [{"start_m": 0.0}]
    d["ego"]["lane"] = 0
    d["ego"]["goal"]["lanes"] = [0]
    d["traffic"]["density_veh_per_km"] = [0.0]
    d["traffic"]["placed"] = [{"lane": 0, "offset_m": 120.0, "speed_mps": 0.0, "desired_speed_mps": 0.1}]
    d["duration_s"] = 10.0
    scn = parse_scenario(d, source="stopped-vehicle-one-lane")
    cfg = PlannerConfig(
        num_candidates=16, num_futures=2, weights=CostWeights(collision=0.0, cvar=0.0, ttc=0.0, headway=0.0)
    )
    _, out, _ = run_with_frames(scn, "mpc+constant-velocity", np.array([0]), cfg=cfg)
    row = out.rows[0]
    assert row["collision"] and row["outcome"] == "collision"
    assert row["contact_side"] == "front"  # it ran into the stopped car ahead (wmplan.sim.engine.contact_sides)
    assert row["final_lane"] == 0 and row["in_goal_lane"]
    assert summarise_planner(out.rows)["timeout_rate"] == 0.0
    assert summarise_planner(out.rows)["collisions_by_contact_side"] == {"front": 1}


def _row(outcome: str, in_goal_lane: bool) -> dict:
    return {
        "collision": outcome == "collision",
        "offroad": outcome == "offroad",
        "success": outcome == "goal",
        "outcome": outcome,
        "in_goal_lane": in_goal_lane,
        "mean_speed_mps": 20.0,
        "progress_m": 250.0,
        "rms_jerk_mps3": 1.0,
        "min_ttc_s": 3.0,
        "near_miss": False,
        "decision_ms": 10.0,
    }


def test_timeout_rate_has_a_wilson_interval():
    """7 timeouts (3 of them outside the goal's lanes), 2 collisions, 1 off-road and 30 goals out of 40 episodes:
    rate and interval as scipy's Wilson interval gives them."""
    rows = (
        [_row("timeout", False)] * 3
        + [_row("timeout", True)] * 4
        + [_row("collision", True)] * 2
        + [_row("offroad", False)]
        + [_row("goal", True)] * 30
    )
    s = summarise_planner(rows)
    ci = scipy.stats.binomtest(7, 40).proportion_ci(confidence_level=0.95, method="wilson")
    assert s["timeout_rate"] == pytest.approx(7 / 40)
    assert s["timeout_ci95"] == pytest.approx([ci.low, ci.high], abs=1e-9)
    assert s["timeouts_outside_goal_lanes"] == 3
    assert s["collisions_by_contact_side"] == {}  # these rows carry no contact side
    s2 = summarise_planner(
        [
            {**_row("collision", True), "contact_side": "rear"},
            _row("goal", True),
            {**_row("collision", True), "contact_side": "left"},
            {**_row("collision", True), "contact_side": "rear"},
        ]
    )
    assert s2["collisions_by_contact_side"] == {"rear": 2, "left": 1}
    table = format_table({"a": s2, "b": s})
    assert table.splitlines()[-1] == "collisions by the side of the ego touched: a rear 2, left 1"
    assert s["success_rate"] + s["collision_rate"] + s["offroad_rate"] + s["timeout_rate"] == pytest.approx(1.0)


def test_table_shows_ece_and_the_number_of_positive_decisions():
    """With calibration records the table carries each planner's ECE and how many decisions were followed by a
    collision; a planner without records (the rule-based one) shows a dash."""
    rng = np.random.default_rng(3)
    p = rng.uniform(0.0, 0.3, size=500)
    y = (rng.random(500) < p).astype(int)
    cal = calibration(p.tolist(), y.tolist())
    assert cal["positives"] == int(y.sum())
    assert cal["ece"] == stats.expected_calibration_error(p, y, 10)
    rows = [_row("goal", True)] * 9 + [_row("timeout", False)]
    results = {"rules": summarise_planner(rows), "mpc+latent": summarise_planner(rows)}
    table = format_table(results, {"mpc+latent": cal})
    latent_line = next(line for line in table.splitlines() if line.startswith("mpc+latent"))
    rules_line = next(line for line in table.splitlines() if line.startswith("rules"))
    assert f"{cal['ece']:.4f} ({int(y.sum())})" in latent_line
    assert rules_line.rstrip().endswith("-")
    assert "0.100" in latent_line  # the timeout rate, 1 in 10
    assert "ECE" not in format_table(results)
