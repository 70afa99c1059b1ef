"""Failure triage: one crafted failure of each cause, the point of no return against a case worked by hand, and
the run-folder verb.

Crafted cases (scenario files and plug-ins beside this file, invented for the tests):

* past saving: a standing ego, a car 4.3 m behind at 25 m/s (it needs about 25^2 / (2 x 9) = 35 m to stop);
* prediction: the sampling planner over a predictor that ignores every other vehicle collides with a driver who
  cuts in ahead; the same planner over the oracle's futures does not;
* planning: the sampling planner over the oracle's futures with a cost that ignores risk collides with the same
  cut-in, and a search over the ego's actions finds a way out;
* the point of no return: an ego cruising at 20 m/s toward a vehicle standing 59 m ahead in the only lane. Worked
  by hand with the stopping distance v^2 / (2 a) = 20^2 / (2 x 8) = 25 m (docs/references.md#practice-kinematics;
  the simulator's longitudinal update is exact for constant deceleration,
  docs/references.md#treiber-kanagaraj-2015-ballistic): at decision d (every 0.2 s, 4 m of travel) the gap is
  59 - 4 d m, so decision 8 (27 m) is the last from which braking stops short and decision 9 (23 m) is too late.
  The cruising ego touches at the first step where 20 t >= 59 m, t = 3.0 s: the point of no return is at 1.6 s,
  1.4 s before the contact.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from wmplan.evaluate.compare import compare_planners
from wmplan.scenario import load_scenario
from wmplan.triage import SearchBudget, triage_failure, triage_run
from wmplan.triage.search import bisect_last_true

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
PLUGINS = "tests.triage.plugins"


def _scenario(name: str):
    return load_scenario(HERE / f"{name}.yaml")


def test_point_of_no_return_matches_the_case_worked_by_hand():
    res = triage_failure(_scenario("stopped-ahead"), f"{PLUGINS}:cruise_planner", 0)
    assert res["outcome"] == "collision" and res["contact_side"] == "front"
    assert res["contact_s"] == pytest.approx(3.0)
    pnr = res["point_of_no_return"]
    assert pnr["status"] == "found"
    assert pnr["time_s"] == pytest.approx(1.6)
    assert pnr["before_contact_s"] == pytest.approx(1.4)
    # the bisection probed both sides of the answer: saveable at 1.6 s, not at 1.8 s
    assert pnr["searches"]["1.6"] is True and pnr["searches"]["1.8"] is False
    # the cruising planner predicts nothing; the sampling planner over the oracle's futures stops in time
    assert res["cause"] == "prediction"
    assert res["replays"]["oracle_known"]["avoided"] is True
    assert all(d["believed_p"] is None for d in res["decisions"])
    # the oracle sees the collision coming for the plan the ego kept to (hold speed) at every decision
    assert all(d["oracle_p"] == 1.0 for d in res["decisions"])


def test_a_standing_ego_hit_from_behind_is_past_saving():
    res = triage_failure(_scenario("hit-from-behind"), f"{PLUGINS}:standstill_planner", 0)
    assert res["outcome"] == "collision" and res["contact_side"] == "rear"
    assert res["cause"] == "past saving"
    assert not res["replays"]["oracle_known"]["avoided"] and not res["replays"]["oracle_resampled"]["avoided"]
    assert res["search"]["avoided"] is False
    assert res["search"]["sequences"] == SearchBudget().candidates * SearchBudget().iterations
    assert res["point_of_no_return"]["status"] == "before start"


@pytest.mark.slow
def test_a_predictor_blind_to_the_cut_in_is_the_prediction():
    res = triage_failure(_scenario("lone-cut-in"), f"mpc+{PLUGINS}:blind_predictor", 0)
    assert res["outcome"] == "collision" and res["contact_side"] == "front"
    assert res["cause"] == "prediction"
    assert res["replays"]["oracle_known"]["avoided"] is True
    assert res["replays"]["oracle_known"]["planner"].startswith(f"mpc+{PLUGINS}:blind_predictor with the oracle")
    # what it believed: its futures hold no other vehicle, so it saw no risk while the oracle saw the contact
    believed = [d["believed_p"] for d in res["decisions"]]
    oracle = [d["oracle_p"] for d in res["decisions"]]
    assert max(believed) == 0.0
    assert oracle[-1] > 0.5
    assert res["point_of_no_return"]["status"] == "found"
    assert 0.0 < res["point_of_no_return"]["before_contact_s"] < res["contact_s"]


@pytest.mark.slow
def test_a_cost_that_ignores_risk_is_the_planning():
    res = triage_failure(_scenario("lone-cut-in"), f"{PLUGINS}:reckless_oracle", 0)
    assert res["outcome"] == "collision"
    assert not res["replays"]["oracle_known"]["avoided"] and not res["replays"]["oracle_resampled"]["avoided"]
    assert res["search"]["avoided"] is True
    assert res["cause"] == "planning"
    assert res["point_of_no_return"]["status"] == "found"


def test_bisection_finds_the_last_true_in_few_calls():
    calls = []

    def saveable(d: int) -> bool:
        calls.append(d)
        return d <= 37

    assert bisect_last_true(saveable, 0, 100) == 37
    assert len(calls) <= 7  # ceil(log2(100))
    assert bisect_last_true(lambda d: d == 5, 5, 6) == 5
    with pytest.raises(ValueError):
        bisect_last_true(saveable, 4, 4)


def _evaluate_folder(tmp_path: Path) -> Path:
    out = tmp_path / "run"
    compare_planners(_scenario("hit-from-behind"), [f"{PLUGINS}:standstill_planner"], episodes=2, seed=3, out_dir=out)
    return out


def test_triage_run_on_an_evaluate_folder_writes_json_figures_and_a_report_section(tmp_path):
    from wmplan.report import cli_report

    run = _evaluate_folder(tmp_path)
    summary = json.loads((run / "summary.json").read_text())
    assert summary["scenario_spec"]["name"] == "hit-from-behind"  # evaluate --out records the scenario
    seen = []
    report = triage_run(run, progress=lambda done, total, stage: seen.append((done, total)))
    assert seen[-1] == (seen[-1][1], seen[-1][1])  # every stage reported
    assert report["source"] == "evaluate" and report["failures_found"] == 2
    assert report["counts"] == {
        f"{PLUGINS}:standstill_planner": {"prediction": 0, "planning": 0, "past saving": 2, "not reproduced": 0}
    }
    on_disk = json.loads((run / "triage.json").read_text())
    assert on_disk["caution"].startswith("Caution")
    for f in on_disk["failures"]:
        assert f["cause"] == "past saving" and f["point_of_no_return"]["status"] == "before start"
        png = run / f["figure"]
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    info = cli_report(run)
    assert "triage" in info["sections"]
    md = (run / "report.md").read_text()
    assert "Failure triage" in md and "past saving" in md


def _cli(*args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, "-m", "wmplan.cli", *args], capture_output=True, text=True, cwd=ROOT, env=env, timeout=300
    )


def test_cli_triage_prints_causes_and_the_caution(tmp_path):
    run = _evaluate_folder(tmp_path)
    out = _cli("triage", str(run), "--max-failures", "1")
    assert out.returncode == 0, out.stderr
    assert "past saving 1" in out.stdout and "Caution" in out.stdout
    assert json.loads((run / "triage.json").read_text())["failures_triaged"] == 1


@pytest.mark.parametrize(
    "make, needle",
    [
        (lambda p: p / "missing", "no such run folder"),
        (lambda p: p, "not an evaluate or stress output folder"),
    ],
)
def test_cli_bad_folder_is_one_line_and_exit_2(tmp_path, make, needle):
    out = _cli("triage", str(make(tmp_path)))
    assert out.returncode == 2
    assert needle in out.stderr and len(out.stderr.strip().splitlines()) == 1
    assert "Traceback" not in out.stderr


def test_cli_unreadable_summary_is_one_line_and_exit_2(tmp_path):
    run = _evaluate_folder(tmp_path)
    (run / "summary.json").write_text("{not json")
    out = _cli("triage", str(run))
    assert out.returncode == 2 and "summary.json" in out.stderr and "Traceback" not in out.stderr


@pytest.mark.slow
def test_triage_cost_benchmark_smoke(tmp_path) -> None:
    """Smoke test of ``benchmarks/triage_cost.py --quick --json FILE`` (common practice, no source): a real failure
    of mpc+constant-velocity on short-gap-cut-in is triaged at the default budget, gets a cause and a point of no
    return and a figure, and its time is recorded. The one-minute bound is read from the benchmark's JSON, not
    asserted here."""
    import importlib

    module = importlib.import_module("benchmarks.triage_cost")
    out = tmp_path / "triage.json"
    assert module.main(["--quick", "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    assert result["failures_found"] >= 1 and result["failures_triaged"] == 1
    assert result["complete"] is True and result["figures_written"] == 1
    assert len(result["seconds_per_failure"]) == 1 and result["seconds_per_failure"][0] > 0
    assert set(result["counts"][result["planner"]]) == {"prediction", "planning", "past saving", "not reproduced"}
    assert result["caution"] and result["machine"]["cpu_count"] >= 1
