"""Stress-test episodes of many scenario variants: one run per variant against runs shared by variants.

Variants are drawn as a stress test's plain Monte Carlo stage draws them (standard-normal knobs,
``wmplan.stress.knobs``: traffic density, yield probability, hard-braking rate, desired speeds, the ego's start
speed and braking limit), one scene seed and one episode each. Two planners:

* ``rules`` (the rule-based ego, full-length onramp-merge episodes): ``rules.episodes_per_s["shared"]`` is the
  issue's target (at least ``TARGET_RULES_EPISODES_PER_S`` episodes per second): ``evaluate_variants`` over all
  of them, where the engine steps each variant's scenes with its own parameters in one call
  (``wmplan.sim.variants``; variants whose ego limits differ fall into separate batch classes).
* ``mpc+constant-velocity`` at the default budget (64 candidates x 8 futures; no trained model needed; the learned
  predictors cost more per call, which batching amortises alike), shortened episodes.

For each: ``seconds["per_variant"]`` runs ``evaluate_seeds`` once per variant (a batch of one episode, what the
stress runner did before), ``seconds["shared"]`` runs ``evaluate_variants`` over all; ``speedup`` = per_variant /
shared, timed side by side in this process, alternately, the median of ``repeats`` (``per_variant_sample``
variants of the rules runs are timed alone, their rate scaled to all); ``rows_identical``: both give the same rows
(apart from the wall-clock latency field); they must.

Usage: ``python benchmarks/stress_batching.py [--quick] [--json FILE]``; ``wmplan bench`` calls :func:`run`.
Importing this module runs nothing. The numbers depend on what else the machine is doing; the load average is
recorded with them.
"""

from __future__ import annotations

import statistics
import sys
import time

from wmplan import benchkit

FULL = dict(
    rules_variants=400,
    rules_per_variant_sample=40,
    mpc_variants=48,
    mpc_duration_s=8.0,
    repeats=3,
    batch_size=64,
    rules_batch_size=512,
)
QUICK = dict(
    rules_variants=40,
    rules_per_variant_sample=8,
    mpc_variants=6,
    mpc_duration_s=2.0,
    repeats=1,
    batch_size=64,
    rules_batch_size=512,
)
MPC_PLANNER = "mpc+constant-velocity"
TARGET_RULES_EPISODES_PER_S = 100.0


def _strip(groups: list[list[dict]]) -> list[list[dict]]:
    return [[{k: v for k, v in r.items() if k != "decision_ms"} for r in g] for g in groups]


def _variants(num: int, duration_s: float | None, rng):
    """``num`` knob variants of onramp-merge (shortened to ``duration_s`` if given) and one scene seed each."""
    import numpy as np

    from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
    from wmplan.stress.knobs import DEFAULT_KNOBS, DEFAULT_Z_STEP, quantise, variant

    base = load_scenario("onramp-merge")
    if duration_s is not None:
        d = scenario_to_dict(base)
        d["duration_s"] = duration_s
        base = parse_scenario(d, source="onramp-merge (shortened)")
    z = quantise(rng.standard_normal((num, len(DEFAULT_KNOBS))), DEFAULT_Z_STEP)
    scenarios = [variant(base, DEFAULT_KNOBS, zi) for zi in z]
    seeds = [np.array([s]) for s in rng.integers(0, 2**32, size=num, dtype=np.int64)]
    return scenarios, seeds


def _compare(planner: str, scenarios, seeds, repeats: int, batch_size: int, sample: int) -> dict:
    """Per-variant runs (of the first ``sample`` variants) and one shared run, alternately, ``repeats`` times."""
    from wmplan.evaluate.closed_loop import evaluate_seeds, evaluate_variants

    times: dict[str, list[float]] = {"per_variant": [], "shared": []}
    identical = True
    for _ in range(repeats):
        t0 = time.perf_counter()
        alone = [
            evaluate_seeds(scn, planner, s, seed=0).rows
            for scn, s in zip(scenarios[:sample], seeds[:sample], strict=True)
        ]
        times["per_variant"].append((time.perf_counter() - t0) * len(scenarios) / sample)
        t0 = time.perf_counter()
        shared = evaluate_variants(scenarios, seeds, planner, seed=0, batch_size=batch_size)
        times["shared"].append(time.perf_counter() - t0)
        identical &= _strip(alone) == _strip(shared[:sample])
    seconds = {k: statistics.median(v) for k, v in times.items()}
    n = len(scenarios)
    return {
        "planner": planner,
        "variants": n,
        "per_variant_sample": sample,
        "batch_size": batch_size,
        "episode_s": scenarios[0].duration_s,
        "seconds": seconds,
        "seconds_all": times,
        "episodes_per_s": {k: n / s for k, s in seconds.items()},
        "episodes_per_min": {k: 60.0 * n / s for k, s in seconds.items()},
        "speedup": seconds["per_variant"] / seconds["shared"],
        "rows_identical": bool(identical),
    }


def run(quick: bool = False) -> dict:
    """Measure and return the JSON-ready result (see the module docstring)."""
    import numpy as np
    import torch

    cfg = QUICK if quick else FULL
    torch.set_num_threads(1)
    machine = benchkit.machine()
    rng = np.random.default_rng(2026)
    scenarios, seeds = _variants(cfg["rules_variants"], None, rng)
    _compare("rules", scenarios[:4], seeds[:4], 1, cfg["rules_batch_size"], 4)  # compile / warm up, untimed
    rules = _compare(
        "rules", scenarios, seeds, cfg["repeats"], cfg["rules_batch_size"], cfg["rules_per_variant_sample"]
    )
    scenarios, seeds = _variants(cfg["mpc_variants"], cfg["mpc_duration_s"], rng)
    mpc = _compare(MPC_PLANNER, scenarios, seeds, cfg["repeats"], cfg["batch_size"], len(scenarios))
    rate = rules["episodes_per_s"]["shared"]
    return {
        "benchmark": "stress_batching",
        "quick": quick,
        "rules_episodes_per_s": rate,
        "meets_targets": {"rules_episodes_per_s": rate >= TARGET_RULES_EPISODES_PER_S},
        "targets": {"rules_episodes_per_s": TARGET_RULES_EPISODES_PER_S},
        "rules": rules,
        "mpc": mpc,
        # the keys of earlier versions of this benchmark (the mpc planner's figures)
        "planner": MPC_PLANNER,
        "variants": mpc["variants"],
        "seconds": mpc["seconds"],
        "speedup": mpc["speedup"],
        "rows_identical": bool(rules["rows_identical"] and mpc["rows_identical"]),
        "settings": {**cfg, "statistic": "median over repeats; per-variant and shared runs alternate"},
        "machine": {**machine, "load_avg_1min_at_end": benchkit.load_avg()},
        "caution": benchkit.CAUTION,
    }


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(run, __doc__.splitlines()[0], argv)


if __name__ == "__main__":
    sys.exit(main())
