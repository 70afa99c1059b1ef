"""Whether each scenario built to make prediction matter is solvable and discriminating.

For every scenario of ``SCENARIOS`` it runs ``wmplan evaluate``'s library call (:func:`compare_planners`) with
mpc+constant-velocity and mpc+oracle on common scene seeds (seed 13 by default, as in the issue's check) and
reports, per scenario, the oracle's success and collision rates with their intervals, the constant-velocity
planner's, and the paired comparison (collision-rate difference, its interval, the exact McNemar p-value). The
criteria the issue set are checked and written out as booleans:

* ``oracle_success_ok``: mpc+oracle succeeds in at least 90 % of its episodes;
* ``oracle_collision_ok``: mpc+oracle collides in at most 2 %;
* ``discriminating``: mpc+constant-velocity collides more often than mpc+oracle with McNemar p < 0.01.

The oracle costs far more per decision than constant velocity, so ``--oracle-episodes`` may run it on a prefix
of the same seeds (the comparison is over the pairs both ran); the JSON records both counts.

Usage: ``python benchmarks/scenario_discrimination.py [--episodes 400] [--oracle-episodes N] [--seed 13]
[--scenarios a,b] [--json FILE]``. Importing this module runs nothing. Results on a simplified traffic model
certify nothing about a real vehicle.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from wmplan.caution import CAUTION
from wmplan.evaluate.compare import compare_planners
from wmplan.io import atomic_write_json
from wmplan.scenario import load_scenario

SCENARIOS = ("short-gap-cut-in", "lane-drop-turns", "courtesy-stop")
PLANNERS = ("mpc+constant-velocity", "mpc+oracle")
REFERENCE = "mpc+oracle"


def check(name: str, *, episodes: int, oracle_episodes: int, seed: int, threads: int = 1) -> dict:
    """One scenario's figures and the issue's criteria (module docstring)."""
    t0 = time.perf_counter()
    summary, _rows = compare_planners(
        load_scenario(name),
        list(PLANNERS),
        episodes=episodes,
        seed=seed,
        options={"threads": threads},
        episodes_by_planner={REFERENCE: oracle_episodes},
        reference=REFERENCE,
    )
    res, comp = summary["results"], summary["comparisons"]["mpc+constant-velocity"]
    oracle = res[REFERENCE]
    p = comp.get("collision_p_value")
    return {
        "scenario": name,
        "episodes": {k: summary["episodes_by_planner"][k] for k in PLANNERS},
        "results": res,
        "comparison": comp,
        "oracle_success_ok": oracle["success_rate"] >= 0.9,
        "oracle_collision_ok": oracle["collision_rate"] <= 0.02,
        "discriminating": bool(p is not None and p < 0.01 and comp["collision_rate_diff"] > 0),
        "seconds": round(time.perf_counter() - t0, 1),
    }


def run(
    quick: bool = False,
    *,
    episodes: int | None = None,
    oracle_episodes: int | None = None,
    seed: int = 13,
    scenarios: tuple[str, ...] = SCENARIOS,
) -> dict:
    """All scenarios; ``quick`` runs 40 episodes (20 of the oracle) instead of 400."""
    n = episodes or (40 if quick else 400)
    m = min(n, oracle_episodes or (20 if quick else n))
    return {
        "seed": seed,
        "scenarios": {s: check(s, episodes=n, oracle_episodes=m, seed=seed) for s in scenarios},
        "caution": CAUTION,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--episodes", type=int, default=400)
    ap.add_argument("--oracle-episodes", type=int, default=None)
    ap.add_argument("--seed", type=int, default=13)
    ap.add_argument("--scenarios", default=",".join(SCENARIOS))
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", type=Path, default=None)
    args = ap.parse_args(argv)
    out = run(
        args.quick,
        episodes=None if args.quick else args.episodes,
        oracle_episodes=args.oracle_episodes,
        seed=args.seed,
        scenarios=tuple(s.strip() for s in args.scenarios.split(",") if s.strip()),
    )
    text = json.dumps(out, indent=2, default=str)
    if args.json is not None:
        atomic_write_json(args.json, out)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
