"""``run_stress`` and the failure search on the true simulator: report keys, saved failures that replay, knob
values, determinism, and errors.

The statistics of the estimators are tested on known answers in test_rare_event.py; here the scenario is made
harsh on purpose (dense traffic that never yields, frequent hard braking, an ego with 1.5 m/s^2 of braking: about
one episode in eight fails) so that a
small budget meets failures whatever the seed. That is a test set-up, not a claim about any planner. Knob values
are checked against the formulas of wmplan.stress.knobs written out by hand (common practice, no source). The
harsh set-up is a sandbox choice (docs/references.md#sandbox-choices); the run end to end is a smoke test
(docs/references.md#practice-smoke-test).
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
import yaml

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError
from wmplan.scenario import Scenario, load_scenario, parse_scenario, scenario_to_dict, scenario_to_yaml
from wmplan.stress import DEFAULT_KNOBS, nominal_reference, replay, run_stress, search_failures
from wmplan.stress.knobs import knob_values, quantise, select_knobs, variant
from wmplan.stress.search import sample_score

KNOBS = tuple(k for k in DEFAULT_KNOBS if k.name in ("density", "ego_speed"))


@pytest.fixture(scope="module")
def harsh() -> Scenario:
    d = scenario_to_dict(load_scenario("onramp-merge"))
    d["name"] = "harsh-merge"
    d["traffic"]["density_veh_per_km"] = [10.0, 100.0, 60.0]
    d["drivers"]["yield_prob"].update(mean=0.0, std=0.0)
    d["drivers"]["hard_brake_rate_per_min"] = 30.0
    d["limits"]["max_brake_mps2"] = 1.5  # and an ego whose brakes barely work (ice)
    return parse_scenario(d)


@pytest.fixture(scope="module")
def stress_run(harsh: Scenario, tmp_path_factory: pytest.TempPathFactory) -> tuple[dict, Path]:
    out = tmp_path_factory.mktemp("stress")
    return run_stress(harsh, "rules", 120, out, 0, knobs=KNOBS, z_step=1.0, progress=False), out


def test_report_has_the_promised_keys_and_is_written(stress_run: tuple[dict, Path]) -> None:
    """Keys failures_found, failure_prob {estimate, ci95, ess}, plain_mc {estimate, ci95}, budget, simulations;
    every episode counted (120 for importance sampling incl. its levels, 120 for plain Monte Carlo); the same
    report in out/stress.json."""
    report, out = stress_run
    assert report["budget"] == 120 and report["simulations"] == 240
    fp, mc = report["failure_prob"], report["plain_mc"]
    assert fp["simulations"] == 120 and mc["n"] == 120 and fp["seeds_per_sample"] == 4
    assert 0.0 <= fp["estimate"] and fp["ci95"][0] <= fp["estimate"] <= (fp["ci95"][1] or math.inf)
    assert fp["ess"] >= 0.0 and fp["levels"]
    assert 0.0 <= mc["ci95"][0] <= mc["estimate"] <= mc["ci95"][1] <= 1.0
    assert report["failures_found"] >= 1
    assert json.loads((out / "stress.json").read_text()) == json.loads(json.dumps(report))
    assert report["caution"] == CAUTION


def test_saved_failures_replay(stress_run: tuple[dict, Path]) -> None:
    """Every saved failure is a valid scenario file plus a JSON record; replaying either file fails again."""
    report, out = stress_run
    assert 1 <= len(report["failures_saved"]) <= 10
    for name in report["failures_saved"]:
        record = json.loads((out / "failures" / name).read_text())
        scn_file = out / "failures" / record["scenario_file"]
        scn = load_scenario(scn_file)
        assert scn.name == "harsh-merge" and record["planner"] == "rules"
        assert record["outcome"]["collision"] or record["outcome"]["offroad"]
        assert replay(out / "failures" / name) is True
        assert replay(scn_file) is True


def test_replay_of_a_calm_episode_is_false(tmp_path: Path) -> None:
    """A record pointing at an episode that does not fail replays as False (replay really re-runs it)."""
    scn = load_scenario("open-road")
    (tmp_path / "calm.yaml").write_text(scenario_to_yaml(scn))
    (tmp_path / "calm.json").write_text(json.dumps({"scenario_file": "calm.yaml", "planner": "rules", "seed": 1}))
    assert replay(tmp_path / "calm.json") is False
    with pytest.raises(ConfigError, match=re.escape(f"{tmp_path / 'nope.json'}: no such failure record")):
        replay(tmp_path / "nope.yaml")


def test_same_seed_same_report(harsh: Scenario, stress_run: tuple[dict, Path], tmp_path: Path) -> None:
    """The run is a function of its seed (knob samples and scene seeds both come from it)."""
    again = run_stress(harsh, "rules", 120, tmp_path, 0, knobs=KNOBS, z_step=1.0, progress=False)
    assert again == stress_run[0]


def test_failure_search_finds_failures_that_replay(harsh: Scenario, tmp_path: Path) -> None:
    """The CEM search alone spends about its budget and saves failures that replay."""
    res = search_failures(harsh, "rules", 120, tmp_path, 4, knobs=KNOBS, z_step=1.0, max_saved=2)
    assert res["failures_found"] >= 1 and 1 <= len(res["failures_saved"]) <= 2
    assert res["simulations"] == 120
    assert all(replay(tmp_path / "failures" / name) for name in res["failures_saved"])


def test_nominal_reference_is_the_failed_fraction(harsh: Scenario) -> None:
    """With equal clusters the reference estimate is the failed fraction of all its episodes, and its standard
    error is the spread of the per-sample fractions over sqrt(n)."""
    ref = nominal_reference(harsh, "rules", 30, 4, 2, knobs=KNOBS, z_step=1.0, progress=False)
    assert ref["simulations"] == 120
    assert ref["estimate"] == pytest.approx(ref["failed_episodes"] / 120)
    assert ref["failed_episodes"] >= 1 and ref["ci95"][0] <= ref["estimate"] <= ref["ci95"][1]


def test_knob_values_follow_their_formulas() -> None:
    """density x exp(0.3 z) per lane; yield mean + 0.15 z clipped to the distribution's [low, high]; hard-brake
    rate x exp(0.8 z); desired speed mean + 1.5 z; ego speed + 2 z; ego braking x exp(0.5 z) clipped to
    [0.5, 12] m/s^2."""
    base = load_scenario("onramp-merge")
    z = np.array([1.0, 4.0, -0.5, 2.0, -1.5, -2.0])
    vals = knob_values(base, DEFAULT_KNOBS, z)
    assert vals["density"] == pytest.approx([d * math.exp(0.3) for d in base.traffic.density_veh_per_km])
    dr = base.drivers
    assert vals["yield_prob"] == pytest.approx(min(dr.yield_prob.mean + 0.6, dr.yield_prob.hi, 1.0))
    assert vals["hard_brake_rate"] == pytest.approx(dr.hard_brake_rate_per_min * math.exp(-0.4))
    assert vals["desired_speed"] == pytest.approx(min(dr.desired_speed_mps.mean + 3.0, dr.desired_speed_mps.hi))
    assert vals["ego_speed"] == pytest.approx(base.ego.speed_mps - 3.0)
    assert vals["ego_brake"] == pytest.approx(base.limits.max_brake_mps2 * math.exp(-1.0))
    assert knob_values(base, DEFAULT_KNOBS, np.array([0, 0, 0, 0, 0, 9.0]))["ego_brake"] == 12.0
    assert knob_values(base, DEFAULT_KNOBS, np.array([0, 0, 0, 0, 0, -9.0]))["ego_brake"] == 0.5
    scn = variant(base, DEFAULT_KNOBS, z)
    assert scn.limits.max_brake_mps2 == pytest.approx(base.limits.max_brake_mps2 * math.exp(-1.0))
    assert scn.traffic.density_veh_per_km == pytest.approx(tuple(vals["density"]))
    assert scn.ego.speed_mps == pytest.approx(base.ego.speed_mps - 3.0)
    assert np.allclose(quantise(np.array([[0.13, -0.37]]), 0.25), [[0.25, -0.25]])


def test_sample_score_by_brake_threat() -> None:
    """With brake threats in the rows (both built-in loops write them): failures score their failed fraction;
    otherwise the largest threat, capped at 1, minus 1."""
    calm = {"collision": False, "offroad": False, "min_ttc_s": 1.0, "max_brake_threat": 0.2}
    closer = {"collision": False, "offroad": False, "min_ttc_s": 4.0, "max_brake_threat": 0.7}
    beyond = {"collision": False, "offroad": False, "min_ttc_s": 4.0, "max_brake_threat": 3.0}
    hit = {"collision": True, "offroad": False, "min_ttc_s": 0.1, "max_brake_threat": 10.0}
    assert sample_score([calm, closer]) == (pytest.approx(-0.3), 0.0)
    assert sample_score([calm, beyond]) == (0.0, 0.0)
    assert sample_score([calm, hit, closer, hit]) == (0.5, 0.5)


def test_select_knobs() -> None:
    assert [k.name for k in select_knobs("ego_brake,density")] == ["ego_brake", "density"]
    with pytest.raises(
        ConfigError,
        match=r"^knobs: unknown knob 'brakes'; allowed: density, yield_prob, "
        r"hard_brake_rate, desired_speed, ego_speed, ego_brake$",
    ):
        select_knobs("brakes")
    with pytest.raises(ConfigError, match="each knob at most once"):
        select_knobs(["density", "density"])


def test_sample_score() -> None:
    """Rows without brake threats (a user's runner): failures score their failed fraction; otherwise minus the
    smallest TTC of the closest call."""
    calm = {"collision": False, "offroad": False, "min_ttc_s": 4.0}
    closer = {"collision": False, "offroad": False, "min_ttc_s": 1.5}
    hit = {"collision": True, "offroad": False, "min_ttc_s": 0.1}
    assert sample_score([calm, closer]) == (-1.5, 0.0)
    assert sample_score([calm, hit, closer, hit]) == (0.5, 0.5)
    assert sample_score([{**calm, "min_ttc_s": math.inf}]) == (-30.0, 0.0)


def test_bad_arguments_are_one_line(harsh: Scenario, tmp_path: Path) -> None:
    """Budget, seed and knob paths are checked before anything runs."""
    with pytest.raises(
        ConfigError,
        match=re.escape("budget must be an integer >= 120 episodes (30 knob samples x 4 seeds per sample), got 50"),
    ):
        run_stress(harsh, "rules", 50, tmp_path, 0)
    with pytest.raises(ConfigError, match=re.escape("seed must be an integer >= 0, got -1")):
        run_stress(harsh, "rules", 200, tmp_path, -1)
    with pytest.raises(ConfigError, match=re.escape("unknown planner 'no-such-planner'; known:")):
        run_stress(harsh, "no-such-planner", 200, tmp_path, 0)
    from wmplan.stress import Knob

    with pytest.raises(ConfigError, match=re.escape("knob x: path 'drivers.yield' is not a field of the scenario")):
        run_stress(harsh, "rules", 200, tmp_path, 0, knobs=[Knob("x", "drivers.yield", "shift", 1.0)])
    assert yaml.safe_load(scenario_to_yaml(harsh))["name"] == "harsh-merge"


def test_replay_verb_reruns_a_saved_failure(stress_run: tuple[dict, Path], tmp_path: Path, capsys) -> None:
    """``wmplan replay FAILURE.json``: one line saying the episode fails again, exit 0; ``--out`` draws it; a
    record of an episode that does not fail exits 1; a missing record is a one-line error with exit 2."""
    from wmplan.cli import main

    report, out = stress_run
    record = out / "failures" / report["failures_saved"][0]
    assert main(["replay", str(record), "--out", str(tmp_path / "again.gif")]) == 0
    said = capsys.readouterr().out.splitlines()
    assert said[0].startswith(f"{record}: rules on ") and "fails again (" in said[0]
    assert (tmp_path / "again.gif").stat().st_size > 0
    (tmp_path / "calm.yaml").write_text(scenario_to_yaml(load_scenario("open-road")))
    (tmp_path / "calm.json").write_text(json.dumps({"scenario_file": "calm.yaml", "planner": "rules", "seed": 1}))
    assert main(["replay", str(tmp_path / "calm.json")]) == 1
    assert "does NOT fail again" in capsys.readouterr().out
    assert main(["replay", str(tmp_path / "nope.json")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no such failure record" in err[0]


def test_recorded_episode_is_the_episode_stress_runs_saw() -> None:
    """The animation of a saved failure replays it with ``record_episode``; that must be the same episode the
    stress run simulated through the closed loop (same scene seed, same seeding of the planner's sampling), not a
    look-alike. Checked on a sampling planner, whose episodes depend on that seeding (common practice, no source)."""
    from wmplan.evaluate.closed_loop import evaluate_seeds, record_episode

    scn = load_scenario("cut-in")
    seed = 12345
    frames, row = record_episode(scn, "mpc+constant-velocity", seed)
    (ref,) = evaluate_seeds(scn, "mpc+constant-velocity", [seed]).rows
    for key in ("collision", "offroad", "success", "decisions", "progress_m", "mean_speed_mps"):
        assert row[key] == ref[key], key
    assert frames.shape[0] == round(row["time_s"] / scn.dt_s) + 1  # every simulator step of the episode, and the start


def test_stress_is_gain_benchmark_reference_is_an_exact_stratification() -> None:
    """``benchmarks/stress_is_gain.py``'s true value (smoke test, small): the strata of the rounded ego_brake knob
    carry the normal probabilities of their z cells (``scipy.stats.norm.cdf``, reference library) and together all
    but the omitted tail; the estimate is sum P_k h_k. The >= 10x claim is measured by running the benchmark."""
    import importlib

    import scipy.stats

    module = importlib.import_module("benchmarks.stress_is_gain")
    ref = module.reference(reference_episodes=200, min_per_stratum=4)
    strata = ref["strata"]
    total = sum(s["prob"] for s in strata)
    assert total + ref["omitted_tail_prob"] == pytest.approx(1.0, abs=1e-12)
    for s in strata:
        lo, hi = s["z"]
        assert s["prob"] == pytest.approx(scipy.stats.norm.cdf(hi + 0.125) - scipy.stats.norm.cdf(lo - 0.125), rel=1e-9)
    assert [s["brake_mps2"] for s in strata] == sorted({s["brake_mps2"] for s in strata})
    assert strata[0]["brake_mps2"] == 0.5 and strata[-1]["brake_mps2"] == 12.0
    assert ref["estimate"] == pytest.approx(sum(s["prob"] * s["failures"] / s["episodes"] for s in strata))
    assert ref["ci95"][0] <= ref["estimate"] <= ref["ci95"][1]
