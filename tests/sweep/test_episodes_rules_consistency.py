"""One "rules" driver wherever the name appears (contract, no external source:
docs/references.md#practice-determinism): the sweep's built-in ``rules`` planner and the ``rules`` row of the
closed-loop evaluation drive the same episodes to the same outcomes."""

from __future__ import annotations

import numpy as np

from wmplan.evaluate.closed_loop import evaluate_seeds
from wmplan.scenario import load_scenario
from wmplan.sweep.episodes import run_episodes


def test_sweep_rules_equals_evaluate_rules():
    scn = load_scenario("onramp-merge")
    seeds = np.arange(100, 124)
    sweep_rows = run_episodes(scn, "rules", seeds)
    eval_rows = evaluate_seeds(scn, "rules", seeds, seed=0, batch_size=24).rows
    for a, b in zip(sweep_rows, eval_rows, strict=True):
        assert a["seed"] == b["seed"]
        assert (a["collision"], a["offroad"], a["success"]) == (b["collision"], b["offroad"], b["success"])
        assert abs(a["progress_m"] - b["progress_m"]) < 1e-9
        assert abs(a["mean_speed_mps"] - b["mean_speed_mps"]) < 1e-9
