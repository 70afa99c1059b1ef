"""One closed loop for every verb: the rows of a planner on a scenario and seeds are the same whether they come
from ``evaluate``, a sweep cell or a stress task, and planners and predictors of one's own plug in by import path
(the README's examples, ``wmplan.examples.plugins``) through all three.

Contract tests of the project (common practice, no source): the same episode must give the same row wherever it
runs, or the verbs' tables could not be compared. Rows are compared without the wall-clock column and the
episode index (which counts within each run).
"""

from __future__ import annotations

import copy
import json
import re
from pathlib import Path

import numpy as np
import pytest
import torch
import yaml

from wmplan.cli import main
from wmplan.errors import ConfigError
from wmplan.evaluate.closed_loop import evaluate_seeds
from wmplan.evaluate.planners import make_planner, register_planner, resolve_planner, unregister_planner
from wmplan.evaluate.rows import COLUMN_NAMES, TIMING_COLUMNS, columns_markdown
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.params import SimParams
from wmplan.stress.knobs import DEFAULT_KNOBS
from wmplan.stress.search import StressEvaluator
from wmplan.sweep import read_results, run_sweep

CRUISE = "wmplan.examples.plugins:make_cruise"
BRAKING = "mpc+wmplan.examples.plugins:make_braking_predictor"
SMALL = {"num_candidates": 8, "num_futures": 2}
REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(autouse=True)
def one_torch_thread():
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def comparable(row: dict) -> dict:
    return {k: v for k, v in row.items() if k in COLUMN_NAMES and k not in TIMING_COLUMNS and k != "episode"}


def short(name: str, duration_s: float) -> dict:
    d = copy.deepcopy(scenario_to_dict(load_scenario(name)))
    d["name"] = f"short-{name}"
    d["duration_s"] = duration_s
    return d


@pytest.mark.parametrize(
    ("planner", "options"), [("rules", {}), ("mpc+constant-velocity", SMALL), (CRUISE, {}), (BRAKING, SMALL)]
)
def test_rows_agree_between_evaluate_a_sweep_and_a_stress_task(tmp_path: Path, planner: str, options: dict):
    """The same planner, scenario and seeds give the same rows from ``evaluate`` (evaluate_seeds), a sweep cell
    and a stress task; the built-in planners and both plug-ins (a planner and a predictor) alike."""
    base = short("onramp-merge", 3.0)
    (tmp_path / "base.yaml").write_text(yaml.safe_dump(base, sort_keys=False))
    spec = {
        "name": "one-cell",
        "base": "base.yaml",
        "vary": {"drivers.yield_prob.mean": [0.5]},
        "planners": [planner],
        "seed": 3,
        "episodes_per_cell": 3,
    }
    if options:
        spec["planner_options"] = {planner: options}
    (tmp_path / "sweep.yaml").write_text(yaml.safe_dump(spec, sort_keys=False))
    run_sweep(tmp_path / "sweep.yaml", tmp_path / "sweep", progress=False)
    sweep_rows = read_results(tmp_path / "sweep").to_pylist()
    d = copy.deepcopy(base)
    d["drivers"]["yield_prob"]["mean"] = 0.5
    scn = parse_scenario(d)
    seeds = [r["seed"] for r in sweep_rows]
    eval_rows = evaluate_seeds(scn, planner, seeds, options=options).rows
    assert [comparable(r) for r in sweep_rows] == [comparable(r) for r in eval_rows]

    ev = StressEvaluator(
        parse_scenario(base), planner, DEFAULT_KNOBS[:1], 0.25, np.random.default_rng(7), planner_options=options
    )
    (stress_rows,) = ev.simulate(np.zeros((1, 1)), "test")
    variant = parse_scenario(next(iter(ev._variants.values()))[1])
    again = evaluate_seeds(variant, planner, [r["seed"] for r in stress_rows], options=options).rows
    assert [comparable(r) for r in stress_rows] == [comparable(r) for r in again]
    assert all(r["planner"] == planner for r in stress_rows + sweep_rows + eval_rows)


def test_plugins_run_through_the_cli_evaluate_and_stress(tmp_path: Path, capsys) -> None:
    """The README's plug-in strings work on the command line: ``evaluate --planners`` and ``stress --planner``."""
    d = short("open-road", 4.0)
    (tmp_path / "road.yaml").write_text(yaml.safe_dump(d, sort_keys=False))
    assert (
        main(
            [
                "evaluate",
                str(tmp_path / "road.yaml"),
                "--planners",
                f"rules,{CRUISE},{BRAKING}",
                "--episodes",
                "2",
                "--threads",
                "1",
                "--json",
                str(tmp_path / "ev.json"),
            ]
        )
        == 0
    )
    out = json.loads((tmp_path / "ev.json").read_text())
    assert set(out["results"]) == {"rules", CRUISE, BRAKING} and out["caution"]
    assert "certify nothing" in capsys.readouterr().out
    assert (
        main(
            [
                "stress",
                str(tmp_path / "road.yaml"),
                "--planner",
                CRUISE,
                "--budget",
                "120",
                "--knobs",
                "density",
                "--no-animation",
                "--out",
                str(tmp_path / "stress"),
                "--json",
                str(tmp_path / "st.json"),
            ]
        )
        == 0
    )
    assert json.loads((tmp_path / "st.json").read_text())["planner"] == CRUISE


def test_a_broken_plugin_gets_one_line_naming_it(tmp_path: Path, capsys) -> None:
    """A plug-in that does not import, lacks the factory, or breaks the protocol: exit 2, one line naming it."""
    cases = {
        "no_such_module_xyz:make": "cannot import module 'no_such_module_xyz'",
        "wmplan.examples.plugins:nothing_here": "has no attribute 'nothing_here'",
        "wmplan.examples.plugins:SteadyCruise.decide": "the factory does not take these options",
        "mpc+wmplan.examples.plugins:make_cruise": "got an unexpected keyword argument 'horizon'",
    }
    for spec, needle in cases.items():
        code = main(["evaluate", "open-road", "--planners", spec, "--episodes", "1"])
        err = capsys.readouterr().err.strip().splitlines()
        assert code == 2 and len(err) == 1 and needle in err[0] and spec in err[0], (spec, err)
    register_planner("no-decide", lambda params: object())
    try:
        with pytest.raises(ConfigError, match=re.escape("returned object, which lacks decision_dt_s, ")):
            make_planner("no-decide", SimParams.from_scenario(load_scenario("open-road")))
    finally:
        unregister_planner("no-decide")


def test_row_columns_are_documented_once() -> None:
    """``docs/episode-rows.md`` holds the one column table, written from ``wmplan.evaluate.rows.COLUMNS``."""
    text = (REPO / "docs" / "episode-rows.md").read_text(encoding="utf-8")
    assert columns_markdown() in text
    assert resolve_planner("rules").batch_key is not None and resolve_planner("mpc+oracle").batch_key is None


def test_readme_plugin_examples_are_the_tested_ones() -> None:
    """The classes and factories the README shows are, to the character, those of ``wmplan.examples.plugins``
    that the tests above run (so the README cannot drift from working code)."""
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    section = readme.split("## Your own planner and predictor", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, re.S)
    source = (REPO / "wmplan" / "examples" / "plugins.py").read_text(encoding="utf-8")
    assert len(blocks) == 2
    for block in blocks:
        body = block.split("\n\n\n", 1)[1]  # after the imports
        assert body.strip() and body.strip() in source


def test_evaluate_compares_every_planner_with_the_reference(tmp_path: Path, capsys) -> None:
    """``evaluate`` pairs every planner with the reference (rules here: no oracle runs) on the same seeds and
    writes the issue's JSON keys; where neither planner failed it says in words that the comparison has no power
    (the statistics themselves are checked against their references in test_paired.py)."""
    d = short("open-road", 4.0)
    (tmp_path / "road.yaml").write_text(yaml.safe_dump(d, sort_keys=False))
    assert (
        main(
            [
                "evaluate",
                str(tmp_path / "road.yaml"),
                "--planners",
                f"rules,{CRUISE}",
                "--episodes",
                "6",
                "--json",
                str(tmp_path / "ev.json"),
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    summary = json.loads((tmp_path / "ev.json").read_text())
    assert summary["reference"] == "rules" and set(summary["comparisons"]) == {CRUISE}
    cmp = summary["comparisons"][CRUISE]
    for key in (
        "reference",
        "collision_rate_diff",
        "collision_rate_diff_ci95",
        "collision_p_value",
        "success_diff",
        "success_diff_ci95",
        "mean_speed_diff_mps",
        "mean_speed_diff_ci95",
        "near_miss_rate_diff",
        "near_miss_rate_diff_ci95",
    ):
        assert key in cmp, key
    assert cmp["n_pairs"] == 6
    if cmp["collision_power"]["no_power"]:
        assert "cannot tell them apart" in out
    assert main(["evaluate", "open-road", "--planners", "rules", "--reference", "mpc+oracle", "--episodes", "1"]) == 2
    assert "--reference" in capsys.readouterr().err
