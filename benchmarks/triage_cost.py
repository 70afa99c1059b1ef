"""What triage costs per failure, at the default search budget, on the machine's two cores.

It runs ``wmplan evaluate``'s library call (:func:`wmplan.evaluate.compare.compare_planners`) for
``mpc+constant-velocity`` on a scenario where that planner fails (``short-gap-cut-in`` by default, a neighbour
who may swerve in at a short gap), writes the evaluate folder, then triages every failure in it with
:func:`wmplan.triage.run.triage_run` at the default :class:`~wmplan.triage.search.SearchBudget`, as
``wmplan triage RUN_DIR`` does. Reported:

* ``seconds_per_failure``: each failure's own triage time (replays, oracle risk, searches, bisection), from the
  triage report; ``median``, ``max``; ``within_budget``: every failure took at most ``BUDGET_S`` seconds (the
  issue's bound of one minute per failure on two cores);
* ``first_failure_s`` apart: it carries what the process compiles on first use (the compiled simulator is cached
  on disk, the oracle's first call and torch's are not); ``warm`` statistics leave it out;
* ``complete``: every failure got a cause and a point of no return (the issue's "must show");
* the causes counted, the evaluate figures, the machine's state.

Usage: ``python benchmarks/triage_cost.py [--quick] [--episodes N] [--scenario NAME] [--json FILE]``; ``--quick``
triages one failure of a short run (a smoke test, not for numbers). Importing this module runs nothing.
Results on a simplified traffic model certify nothing about a real vehicle.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

from wmplan import benchkit

PLANNER = "mpc+constant-velocity"
BUDGET_S = 60.0
FULL = dict(episodes=200, seed=13, max_failures=None)
QUICK = dict(episodes=40, seed=13, max_failures=1)


def run(quick: bool = False, episodes: int | None = None, scenario: str = "short-gap-cut-in") -> dict:
    """Measure and return the JSON-ready result (see the module docstring)."""
    import torch

    from wmplan.evaluate.compare import compare_planners
    from wmplan.scenario import load_scenario
    from wmplan.triage.run import triage_run
    from wmplan.triage.search import SearchBudget

    cfg = dict(QUICK if quick else FULL)
    if episodes is not None:
        cfg["episodes"] = episodes
    torch.set_num_threads(2)
    machine = benchkit.machine(torch_threads=torch.get_num_threads())
    scn = load_scenario(scenario)
    with tempfile.TemporaryDirectory(prefix="wmplan-triage-bench-") as tmp:
        out = Path(tmp) / "run"
        t0 = time.perf_counter()
        summary, _rows = compare_planners(scn, [PLANNER], episodes=cfg["episodes"], seed=cfg["seed"], out_dir=out)
        evaluate_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        report = triage_run(out, budget=SearchBudget(), max_failures=cfg["max_failures"], figures=True, progress=False)
        triage_s = time.perf_counter() - t0
        figures = sum(1 for f in report["failures"] if f.get("figure") and (out / f["figure"]).is_file())
    per = [float(f["seconds"]) for f in report["failures"]]
    warm = per[1:] or per
    complete = all(
        f["cause"] in ("prediction", "planning", "past saving")
        and isinstance(f.get("point_of_no_return"), dict)
        and f["point_of_no_return"].get("status") in ("found", "before start")
        for f in report["failures"]
    )
    stats = summary["results"][PLANNER]
    return {
        "benchmark": "triage_cost",
        "quick": quick,
        "scenario": scenario,
        "planner": PLANNER,
        "episodes": cfg["episodes"],
        "seed": cfg["seed"],
        "failures_found": report["failures_found"],
        "failures_triaged": report["failures_triaged"],
        "seconds_per_failure": per,
        "median_s": statistics.median(per) if per else None,
        "max_s": max(per) if per else None,
        "first_failure_s": per[0] if per else None,
        "warm_median_s": statistics.median(warm) if warm else None,
        "warm_max_s": max(warm) if warm else None,
        "within_budget": bool(per) and max(per) <= BUDGET_S,
        "warm_within_budget": bool(warm) and max(warm) <= BUDGET_S,
        "complete": bool(per) and complete,
        "figures_written": figures,
        "counts": report["counts"],
        "evaluate_s": evaluate_s,
        "triage_s": triage_s,
        "evaluate_collision_rate": stats.get("collision_rate"),
        "budget": report["budget"],
        "targets": {"max_s_per_failure": BUDGET_S},
        "settings": {**cfg, "torch_threads": machine["torch_threads"]},
        "machine": {**machine, "load_avg_1min_at_end": benchkit.load_avg()},
        "caution": benchkit.CAUTION,
    }


def _arguments(parser) -> None:
    parser.add_argument("--episodes", type=int, default=None, help="evaluate episodes (default 200; 40 with --quick)")
    parser.add_argument("--scenario", default="short-gap-cut-in", help="a built-in scenario where the planner fails")


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(run, __doc__.splitlines()[0], argv, _arguments)


if __name__ == "__main__":
    sys.exit(main())
