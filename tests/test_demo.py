"""The end-to-end demo in its quick mode (``wmplan demo --quick``; ``make demo`` runs the full one): every stage
runs on a fresh folder and leaves a self-contained report with the closed-loop table of all five planners on
short-gap-cut-in, their paired comparisons with mpc+oracle and the figure of those differences, the embedded
figures and the cautions (contract of the notebooks issue and of issue "Scenarios where prediction decides the
outcome", item 7; a smoke test, docs/references.md#practice-smoke-test)."""

from __future__ import annotations

import json

from wmplan.caution import CAUTION
from wmplan.demo import EVAL_SCENARIO, REFERENCE, run_demo
from wmplan.evaluate.paired import clear_differences
from wmplan.evaluate.planners import BUILTIN_PLANNERS as PLANNER_NAMES
from wmplan.scenario import builtin_names


def test_quick_demo_writes_the_whole_report(tmp_path):
    html_path = run_demo(tmp_path / "demo", quick=True, seed=0)
    out = tmp_path / "demo"
    assert html_path == out / "report.html"
    html = html_path.read_text()
    md = (out / "report.md").read_text()
    for name in PLANNER_NAMES:  # the closed-loop table has every planner
        assert name in html and name in md
    assert html.count("data:image/png;base64,") >= 5  # figures embedded, not linked
    assert "certify nothing about a real vehicle" in html and "certify nothing about a real vehicle" in md
    summary = json.loads((out / "evaluate" / "summary.json").read_text())
    assert summary["scenario"] == EVAL_SCENARIO == "short-gap-cut-in"
    assert set(summary["results"]) == set(PLANNER_NAMES)
    assert all(r["episodes"] == summary["episodes"] for r in summary["results"].values())  # the oracle too
    assert summary["reference"] == REFERENCE == "mpc+oracle"
    assert set(summary["comparisons"]) == set(PLANNER_NAMES) - {REFERENCE}
    for cmp in summary["comparisons"].values():  # every planner paired with the oracle on every episode
        assert cmp["reference"] == REFERENCE and cmp["n_pairs"] == summary["episodes"]
        for key in ("collision_rate_diff", "collision_rate_diff_ci95", "collision_p_value", "success_diff_ci95"):
            assert key in cmp, key
    assert summary["caution"] == CAUTION
    assert "Paired comparisons with mpc+oracle" in md and "collision diff [95% CI]" in md
    demo = json.loads((out / "demo.json").read_text())
    assert demo["quick"] is True and demo["seconds"] > 0
    assert demo["closed_loop"]["scenario"] == EVAL_SCENARIO and demo["closed_loop"]["reference"] == REFERENCE
    assert demo["closed_loop"]["clear_differences"] == clear_differences(summary["comparisons"])
    assert demo["caution"] == CAUTION
    assert {"simulate", "train_latent", "train_deterministic", "assess", "report"} <= set(demo["stage_seconds"])
    assessed = json.loads((out / "assess.json").read_text())  # one model, assessed on every built-in scenario
    assert [row["scenario"] for row in assessed["table"]] == list(builtin_names())
    assert "Assessment per scenario" in html
    for fig in (
        "scene.png",
        "episode.gif",
        "figures/closed_loop.png",
        "figures/reliability.png",
        "figures/futures.png",
        "figures/candidates.png",
        "figures/training.png",
        "figures/paired_differences.png",
    ):
        assert (out / fig).stat().st_size > 1000, fig
    assert not list(out.rglob("*.tmp*"))  # atomic writes leave no temporary files
