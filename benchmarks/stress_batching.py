"""Stress-test episodes of many scenario variants: one planner batch per variant against batches shared by variants.

What is measured: a sampling planner (``mpc+constant-velocity`` at the default budget, 64 candidates x 8 futures,
so that no trained model is needed; the learned predictors cost more per call, which batching amortises alike)
drives ``num_variants`` episodes of onramp-merge, each in its own variant drawn as a stress test's plain Monte
Carlo stage draws them (standard-normal knobs, ``wmplan.stress.knobs``), one scene seed each:

* ``seconds["per_variant"]``: ``evaluate_seeds`` once per variant (what the stress runner did before: a planner
  batch of one episode);
* ``seconds["shared"]``: ``evaluate_variants`` over all of them (``wmplan.sim.variants``: the engine steps each
  variant's scenes with its own parameters, the planner decides for up to ``batch_size`` episodes at once);
* ``speedup`` = per_variant / shared, timed side by side in this process, alternately, the median of ``repeats``;
* ``rows_identical``: both give the same rows (apart from the wall-clock latency field); they must.

Usage: ``python benchmarks/stress_batching.py [--quick] [--json FILE]``; ``wmplan bench`` calls :func:`run`.
Importing this module runs nothing. The numbers depend on what else the machine is doing; the load average is
recorded with them.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

FULL = dict(num_variants=48, duration_s=8.0, repeats=3, batch_size=64)
QUICK = dict(num_variants=6, duration_s=2.0, repeats=1, batch_size=64)
PLANNER = "mpc+constant-velocity"


def _strip(groups: list[list[dict]]) -> list[list[dict]]:
    return [[{k: v for k, v in r.items() if k != "decision_ms"} for r in g] for g in groups]


def run(quick: bool = False) -> dict:
    """Measure and return the JSON-ready result (see the module docstring)."""
    import numpy as np
    import torch

    from wmplan.evaluate.closed_loop import evaluate_seeds, evaluate_variants
    from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
    from wmplan.stress.knobs import DEFAULT_KNOBS, DEFAULT_Z_STEP, quantise, variant

    cfg = QUICK if quick else FULL
    torch.set_num_threads(1)
    base_dict = scenario_to_dict(load_scenario("onramp-merge"))
    base_dict["duration_s"] = cfg["duration_s"]
    base = parse_scenario(base_dict, source="onramp-merge (shortened)")
    rng = np.random.default_rng(2026)
    z = quantise(rng.standard_normal((cfg["num_variants"], len(DEFAULT_KNOBS))), DEFAULT_Z_STEP)
    scenarios = [variant(base, DEFAULT_KNOBS, zi) for zi in z]
    seeds = [np.array([s]) for s in rng.integers(0, 2**32, size=cfg["num_variants"], dtype=np.int64)]
    load_before = os.getloadavg()
    times: dict[str, list[float]] = {"per_variant": [], "shared": []}
    identical = True
    for _ in range(cfg["repeats"]):
        t0 = time.perf_counter()
        alone = [evaluate_seeds(scn, PLANNER, s, seed=0).rows for scn, s in zip(scenarios, seeds, strict=True)]
        times["per_variant"].append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        shared = evaluate_variants(scenarios, seeds, PLANNER, seed=0, batch_size=cfg["batch_size"])
        times["shared"].append(time.perf_counter() - t0)
        identical &= _strip(alone) == _strip(shared)
    seconds = {k: statistics.median(v) for k, v in times.items()}
    return {
        "planner": PLANNER,
        "variants": cfg["num_variants"],
        "episode_s": cfg["duration_s"],
        "batch_size": cfg["batch_size"],
        "repeats": cfg["repeats"],
        "seconds": seconds,
        "seconds_all": times,
        "episodes_per_min": {k: 60.0 * cfg["num_variants"] / s for k, s in seconds.items()},
        "speedup": seconds["per_variant"] / seconds["shared"],
        "rows_identical": bool(identical),
        "cpu_count": os.cpu_count(),
        "load_average_before": list(load_before),
        "load_average_after": list(os.getloadavg()),
        "python": platform.python_version(),
        "quick": quick,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a few short episodes, one repeat")
    parser.add_argument("--json", metavar="FILE", help="also write the result to FILE (atomically)")
    args = parser.parse_args(argv)
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    result = run(quick=args.quick)
    text = json.dumps(result, indent=2)
    if args.json:
        from wmplan.io import atomic_write_text

        atomic_write_text(Path(args.json), text + "\n")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
