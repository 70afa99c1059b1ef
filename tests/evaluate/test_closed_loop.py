"""Contract tests of closed-loop evaluation (``wmplan.evaluate.closed_loop``), its report and the ``evaluate`` verb.

Sources:
- Determinism (same seed, same episode; a different seed, a different one) and independence of the batching:
  common practice, no source (docs/references.md#practice-determinism).
- Calibration labels: "the predicted probability of a collision within the horizon, beside what then happened"
  (the planning issue); the collision time is recomputed here with shapely's polygon intersection, a
  general-purpose reference library, from the vehicles' footprints (docs/references.md#lib-shapely).
- Brier (1950) score and expected calibration error (Naeini et al. 2015; Guo et al. 2017), check values [D] of
  docs/references.md#brier-1950 and docs/references.md#naeini-2015-ece; Wilson (1927) interval
  (docs/references.md#wilson-1927).
- The CLI contract (exit status 2, one line on stderr, no traceback): DEVELOPERS.md, "Errors and files", and the
  CLI module docstring (a contract of this project, no source).

Planners used: ``rules``, ``mpc+constant-velocity`` and ``mpc+oracle`` (no trained model needed), on shortened
scenarios with small budgets. Results on a simplified traffic model certify nothing about a real vehicle.
"""

from __future__ import annotations

import copy
import json
import math

import numpy as np
import pyarrow.parquet as pq
import pytest
import shapely
import torch

from wmplan.cli import main
from wmplan.evaluate import stats
from wmplan.evaluate.closed_loop import (
    evaluate_planner,
    evaluate_seeds,
    evaluate_variants,
    run_batch,
)
from wmplan.evaluate.planners import make_planner
from wmplan.evaluate.tables import calibration
from wmplan.plan.mpc import CostWeights, PlannerConfig
from wmplan.scenario import Scenario, load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.features import F_HEADING, F_LENGTH, F_VALID, F_WIDTH, F_X, F_Y
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO
from wmplan.sim.variants import batch_classes, batchable

SMALL = PlannerConfig(num_candidates=16, num_futures=2)
ORACLE_SMALL = PlannerConfig(num_candidates=8, num_futures=2)


@pytest.fixture(autouse=True)
def one_torch_thread():
    """Run torch on one thread, restored afterwards: on a shared 2-core machine two threads that wait on each
    other made planner calls about 25 times slower (measured)."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def short_scenario(name: str, duration_s: float) -> Scenario:
    d = copy.deepcopy(scenario_to_dict(load_scenario(name)))
    d["duration_s"] = duration_s
    return parse_scenario(d, source=name)


def without_latency(rows: list[dict]) -> list[dict]:
    """Episode rows without the wall-clock field, which differs between runs by nature."""
    return [{k: v for k, v in r.items() if k != "decision_ms"} for r in rows]


def planner_cfg(name: str) -> PlannerConfig:
    return ORACLE_SMALL if name == "mpc+oracle" else SMALL


def opts(name: str) -> dict:
    """The planner options of these tests: small budgets for the sampling planners; none for the rules."""
    return {} if name == "rules" else {"config": planner_cfg(name)}


# --- 3. determinism -------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["mpc+constant-velocity", "mpc+oracle"])
def test_same_seed_gives_the_same_episodes(name):
    """Two evaluations with the same seed give identical episode rows and calibration records
    (docs/references.md#practice-determinism)."""
    scn = short_scenario("onramp-merge", 4.0)
    runs = [evaluate_planner(scn, name, episodes=3, seed=3, options=opts(name), batch_size=3) for _ in range(2)]
    assert without_latency(runs[0].rows) == without_latency(runs[1].rows)
    assert runs[0].predicted == runs[1].predicted
    assert runs[0].happened == runs[1].happened
    assert len(runs[0].rows) == 3 and len(runs[0].predicted) > 0


@pytest.mark.parametrize("name", ["mpc+constant-velocity", "mpc+oracle"])
def test_a_different_seed_gives_different_episodes(name):
    """A different evaluation seed gives different scenes; the same scenes with a different planner seed give
    different episodes too, so the planner's own random draws do reach the result
    (docs/references.md#practice-determinism)."""
    scn = short_scenario("onramp-merge", 4.0)
    base = evaluate_planner(scn, name, episodes=3, seed=3, options=opts(name), batch_size=3)
    other = evaluate_planner(scn, name, episodes=3, seed=4, options=opts(name), batch_size=3)
    assert {r["seed"] for r in base.rows}.isdisjoint({r["seed"] for r in other.rows})
    assert [r["progress_m"] for r in base.rows] != [r["progress_m"] for r in other.rows]
    seeds = np.array([r["seed"] for r in base.rows])
    replanned = evaluate_seeds(scn, name, seeds, seed=99, options=opts(name), batch_size=3)
    assert [r["seed"] for r in replanned.rows] == list(seeds)
    assert [r["progress_m"] for r in replanned.rows] != [r["progress_m"] for r in base.rows]


def test_rule_based_episodes_do_not_depend_on_the_batch_size():
    """Control for the test below: without a sampling planner, an episode is the same whether it runs in a batch
    of 2 or of 4 (the simulator draws per scene from counter-based keys)."""
    scn = short_scenario("onramp-merge", 6.0)
    big = evaluate_planner(scn, "rules", episodes=4, seed=5, batch_size=4)
    small = evaluate_planner(scn, "rules", episodes=4, seed=5, batch_size=2)
    assert without_latency(big.rows) == without_latency(small.rows)


@pytest.mark.parametrize("name", ["mpc+constant-velocity", "mpc+oracle"])
def test_planner_episodes_do_not_depend_on_the_batch_size(name):
    """Same seed, batch size 2 vs 4: identical per-episode rows except the latency
    (docs/references.md#practice-determinism)."""
    scn = short_scenario("onramp-merge", 4.0)
    big = evaluate_planner(scn, name, episodes=4, seed=5, options=opts(name), batch_size=4)
    small = evaluate_planner(scn, name, episodes=4, seed=5, options=opts(name), batch_size=2)
    assert [r["seed"] for r in big.rows] == [r["seed"] for r in small.rows]
    assert without_latency(big.rows) == without_latency(small.rows)


def _variants(duration_s: float) -> list[Scenario]:
    """Four variants of a shortened onramp-merge that differ in traffic, drivers and the ego's start speed."""
    out = []
    for k, (density, speed, rate) in enumerate(
        [(1.0, 22.0, 0.1), (1.6, 18.0, 2.0), (0.6, 26.0, 0.0), (1.2, 22.0, 6.0)]
    ):
        d = copy.deepcopy(scenario_to_dict(short_scenario("onramp-merge", duration_s)))
        d["traffic"]["density_veh_per_km"] = [density * v for v in d["traffic"]["density_veh_per_km"]]
        d["ego"]["speed_mps"] = speed
        d["drivers"]["hard_brake_rate_per_min"] = rate
        d["drivers"]["yield_prob"]["mean"] = 0.2 * k + 0.1
        out.append(parse_scenario(d, source=f"variant-{k}"))
    return out


@pytest.mark.parametrize("name", ["rules", "mpc+constant-velocity"])
def test_variants_sharing_batches_give_the_rows_of_separate_runs(name):
    """Episodes of four scenario variants run in shared batches (batch size 3, so batches straddle variants) give
    exactly the rows each variant gives on its own (results do not depend on the batching:
    docs/references.md#practice-determinism)."""
    scenarios = _variants(4.0)
    seeds = [np.array([11]), np.array([12, 13, 14]), np.array([15, 16]), np.array([17])]
    shared = evaluate_variants(scenarios, seeds, name, seed=5, options=opts(name), batch_size=3)
    alone = [
        evaluate_seeds(scn, name, s, seed=5, options=opts(name), batch_size=4).rows
        for scn, s in zip(scenarios, seeds, strict=True)
    ]
    assert [len(g) for g in shared] == [1, 3, 2, 1]
    assert [without_latency(g) for g in shared] == [without_latency(g) for g in alone]
    # the variants do differ: the start speeds show in the rows
    assert len({round(g[0]["mean_speed_mps"], 3) for g in shared}) == 4


def test_variants_that_differ_in_the_road_run_one_by_one():
    """A variant with another road cannot share the planner's batch; it still gives its own rows."""
    a, b = _variants(3.0)[:2]
    d = copy.deepcopy(scenario_to_dict(b))
    d["road"]["lane_width_m"] = 3.4
    c = parse_scenario(d, source="narrow")
    assert batchable([a, b]) and not batchable([a, c])
    shared = evaluate_variants([a, c], [np.array([1]), np.array([2])], "rules", seed=0)
    assert without_latency(shared[1]) == without_latency(evaluate_seeds(c, "rules", np.array([2])).rows)


@pytest.mark.parametrize("name", ["rules", "mpc+constant-velocity"])
def test_variants_of_two_braking_limits_share_batches_within_each_limit(name):
    """Variants that differ in the ego's braking limit (a stress knob) fall into two classes
    (``batch_classes``); each class shares batches, and every variant still gives exactly its own rows."""
    base = _variants(3.0)
    scenarios = []
    for k, scn in enumerate(base):
        d = copy.deepcopy(scenario_to_dict(scn))
        d["limits"]["max_brake_mps2"] = 3.0 if k % 2 else 8.0
        scenarios.append(parse_scenario(d, source=f"brake-{k}"))
    assert batch_classes(scenarios) == [[0, 2], [1, 3]] and not batchable(scenarios)
    seeds = [np.array([21]), np.array([22, 23]), np.array([24]), np.array([25])]
    shared = evaluate_variants(scenarios, seeds, name, seed=5, options=opts(name), batch_size=3)
    alone = [
        evaluate_seeds(scn, name, s, seed=5, options=opts(name)).rows for scn, s in zip(scenarios, seeds, strict=True)
    ]
    assert [without_latency(g) for g in shared] == [without_latency(g) for g in alone]


# --- 6. calibration records -----------------------------------------------------------------------------------


def stopped_vehicle_one_lane(offset_m: float = 120.0, duration_s: float = 10.0) -> Scenario:
    """open-road narrowed to one lane, no random traffic, one vehicle stopped ``offset_m`` ahead of the ego."""
    d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
    d["road"]["lanes"] = [{"start_m": 0.0}]
    d["ego"]["lane"] = 0
    d["ego"]["goal"]["lanes"] = [0]
    d["traffic"]["density_veh_per_km"] = [0.0]
    d["traffic"]["placed"] = [{"lane": 0, "offset_m": offset_m, "speed_mps": 0.0, "desired_speed_mps": 0.1}]
    d["duration_s"] = duration_s
    return parse_scenario(d, source="stopped-vehicle-one-lane")


def footprint(row: np.ndarray) -> shapely.Polygon:
    """The rectangle of one vehicle row (world frame) as a shapely polygon."""
    hl, hw = 0.5 * row[F_LENGTH], 0.5 * row[F_WIDTH]
    c, s = math.cos(row[F_HEADING]), math.sin(row[F_HEADING])
    corners = [
        (row[F_X] + c * dx - s * dy, row[F_Y] + s * dx + c * dy)
        for dx, dy in ((hl, hw), (-hl, hw), (-hl, -hw), (hl, -hw))
    ]
    return shapely.Polygon(corners)


def first_contact_step(frames: np.ndarray, scene: int) -> int:
    """First simulator step (1-based: frames[k] is the state after k steps) at which the ego's footprint meets
    another valid vehicle's, by shapely; -1 if never."""
    for k in range(1, frames.shape[0]):
        rows = frames[k, scene]
        ego = footprint(rows[EGO])
        if any(ego.intersects(footprint(r)) for r in rows[1:] if r[F_VALID] > 0.5):
            return k
    return -1


def test_calibration_labels_mark_the_horizon_before_a_certain_collision():
    """A planner blind to risk (collision, CVaR, TTC and headway weights 0) with constant-velocity predictions
    drives into a stopped vehicle on a one-lane road. The "happened" label of a decision t is 1 exactly when the
    collision falls in that decision's horizon, c - H <= t <= c - 1, where c is the decision period in which the
    footprints first meet, found here with shapely from the recorded frames."""
    params = SimParams.from_scenario(stopped_vehicle_one_lane())
    cfg = PlannerConfig(
        num_candidates=16, num_futures=2, weights=CostWeights(collision=0.0, cvar=0.0, ttc=0.0, headway=0.0)
    )
    planner = make_planner("mpc+constant-velocity", params, {"config": cfg})
    seeds = np.array([0, 1])
    frames = [initial_state(params, seeds).vehicles()]
    out = run_batch(params, planner, seeds, seed=0, frames=frames, name="mpc+constant-velocity")
    frames = np.stack(frames)  # (T + 1, S, V, F)
    sub = round(cfg.plan_dt_s / params.dt_s)
    h = cfg.horizon
    coll_dec = []
    for s, row in enumerate(out.rows):
        k = first_contact_step(frames, s)
        assert k > 0 and row["collision"]
        c = math.ceil(k / sub)
        assert row["decisions"] == c
        assert c > h  # some decisions happen before the collision enters the horizon: labels 0 and 1 both occur
        coll_dec.append(c)
    # records are in decision order, and within a decision in scene order, for the scenes still running
    expected_labels = [int(c - h <= t <= c - 1) for t in range(max(coll_dec)) for c in coll_dec if t < c]
    assert out.happened == expected_labels
    assert len(out.predicted) == len(expected_labels)
    assert all(0.0 <= p <= 1.0 for p in out.predicted)
    # the constant-velocity predictor sees the stopped vehicle: certain collision just before it happens
    assert out.predicted[-1] == 1.0


def test_calibration_summary_matches_the_statistics_module():
    """``report.calibration`` gives the Brier score, ECE and reliability bins of ``wmplan.evaluate.stats`` (empty
    bins as None for JSON), and the worked examples of docs/references.md#brier-1950 and
    docs/references.md#naeini-2015-ece [D]."""
    p = [0.1, 0.2, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9, 0.9]
    y = [0, 0, 1, 0, 0, 1, 0, 1, 1, 1]
    two = calibration(p, y, num_bins=2)
    assert two["ece"] == pytest.approx(0.03, abs=1e-12)
    assert two["brier"] == pytest.approx(0.165, abs=1e-12)
    assert calibration([0.9, 0.2, 0.7, 0.1], [1, 0, 0, 0])["brier"] == pytest.approx(0.1375, abs=1e-12)
    assert [b["count"] for b in two["bins"]] == [5, 5]
    assert two["bins"][0]["mean_pred"] == pytest.approx(0.24) and two["bins"][0]["freq"] == pytest.approx(0.2)
    rng = np.random.default_rng(0)
    pr = rng.beta(0.5, 3.0, size=400)
    yr = (rng.random(400) < pr).astype(int)
    got = calibration(pr.tolist(), yr.tolist())
    assert got["decisions"] == 400 and got["num_bins"] == 10
    assert got["brier"] == stats.brier_score(pr, yr)
    assert got["ece"] == stats.expected_calibration_error(pr, yr, 10)
    ref_bins = stats.reliability_bins(pr, yr, 10)
    assert len(got["bins"]) == len(ref_bins)
    for g, r in zip(got["bins"], ref_bins, strict=True):
        for key, val in r.items():
            assert g[key] == (None if isinstance(val, float) and math.isnan(val) else val)
    assert any(b["count"] == 0 for b in got["bins"]) or all(b["mean_pred"] is not None for b in got["bins"])
    assert got["mean_predicted"] == pytest.approx(pr.mean()) and got["observed_rate"] == pytest.approx(yr.mean())
    assert calibration([], []) == {"decisions": 0}


# --- 7. the evaluate verb -------------------------------------------------------------------------------------


def test_evaluate_cli_writes_episodes_and_summary(tmp_path, capsys):
    """``wmplan evaluate`` end to end: exit 0, episodes.parquet with 4 rows per planner, summary.json with the
    figures the issue names, Wilson intervals that match the statistics module, calibration for the MPC."""
    out_dir, json_file = tmp_path / "eval", tmp_path / "summary-copy.json"
    code = main(
        [
            "evaluate",
            "open-road",
            "--planners",
            "rules,mpc+constant-velocity",
            "--episodes",
            "4",
            "--batch-size",
            "4",
            "--threads",
            "1",
            "--out",
            str(out_dir),
            "--json",
            str(json_file),
        ]
    )
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "Traceback" not in captured.err
    table = pq.read_table(out_dir / "episodes.parquet").to_pylist()
    assert sorted(r["planner"] for r in table) == ["mpc+constant-velocity"] * 4 + ["rules"] * 4
    for name in ("rules", "mpc+constant-velocity"):
        assert sorted(r["episode"] for r in table if r["planner"] == name) == [0, 1, 2, 3]
    summary = json.loads((out_dir / "summary.json").read_text())
    assert json.loads(json_file.read_text()) == summary
    for name in ("rules", "mpc+constant-velocity"):
        res = summary["results"][name]
        rows = [r for r in table if r["planner"] == name]
        k = sum(r["collision"] for r in rows)
        assert res["collision_rate"] == k / 4
        lo, hi = stats.wilson_interval(k, 4)
        assert res["collision_ci95"] == pytest.approx([lo, hi])
        assert res["success_rate"] == sum(r["success"] for r in rows) / 4
        assert res["mean_speed_mps"] == pytest.approx(np.mean([r["mean_speed_mps"] for r in rows]))
        assert res["decision_ms_median"] == pytest.approx(np.median([r["decision_ms"] for r in rows]))
        assert name in captured.out
    calib = summary["calibration"]["mpc+constant-velocity"]
    assert {"brier", "ece", "bins"} <= set(calib)
    assert 0.0 <= calib["brier"] <= 1.0 and 0.0 <= calib["ece"] <= 1.0 and len(calib["bins"]) == 10
    assert "rules" not in summary["calibration"]
    assert (out_dir / "calibration.parquet").is_file()


@pytest.mark.parametrize(
    ("argv", "named"),
    [
        (["evaluate", "open-road", "--planners", "foo", "--episodes", "1"], "'foo'"),
        (["evaluate", "open-road", "--planners", "mpc+latent", "--episodes", "1"], "--model"),
        (["evaluate", "open-road", "--planners", "rules", "--episodes", "0"], "--episodes"),
    ],
)
def test_evaluate_cli_bad_input_is_one_line(argv, named, capsys, tmp_path):
    """Bad input: exit status 2, exactly one line on stderr naming the problem, no traceback, nothing written."""
    argv = [*argv, "--out", str(tmp_path / "never")]
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse's own errors leave through SystemExit
        code = exc.code
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err and lines[0].startswith("wmplan")
    assert named in lines[0]
    assert not (tmp_path / "never").exists()


def test_tilted_episodes_carry_their_importance_weight():
    """``evaluate_seeds(..., tilt=...)`` (wmplan.sim.tilt): a tilt with factors 1 leaves every outcome as the nominal
    run has it and weighs 1; a real tilt changes episodes and gives each row the log-weight of its draws, whose
    exponential averages to about 1 over the episodes (E_g[W] = 1, Owen 2013 ch. 9; a loose check on 48 episodes,
    the engine-level test in tests/sim/test_tilt.py is the tight one)."""
    from wmplan.scenario import load_scenario
    from wmplan.sim.tilt import EventTilt

    scn = load_scenario("onramp-merge")
    seeds = np.arange(48)
    nominal = evaluate_seeds(scn, "rules", seeds, seed=0, batch_size=48)
    same = evaluate_seeds(scn, "rules", seeds, seed=0, batch_size=48, tilt=EventTilt())
    assert all("log_weight" not in r for r in nominal.rows + same.rows)  # factors 1: not tilted at all
    assert [r["progress_m"] for r in same.rows] == [r["progress_m"] for r in nominal.rows]
    tilted = evaluate_seeds(
        scn, "rules", seeds, seed=0, batch_size=48, tilt=EventTilt(brake_factor=20.0, yield_factor=0.3)
    )
    log_w = np.array([r["log_weight"] for r in tilted.rows])
    assert np.any(log_w != 0.0) and np.all(np.isfinite(log_w) | (log_w == -np.inf))
    assert [r["progress_m"] for r in tilted.rows] != [r["progress_m"] for r in nominal.rows]
    assert 0.5 < np.exp(log_w).mean() < 1.5
