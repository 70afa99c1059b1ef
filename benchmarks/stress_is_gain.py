"""Importance sampling against plain Monte Carlo on a failure probability whose true value is established apart.

The set-up: ``wmplan stress onramp-merge --planner rules --knobs ego_brake`` (the rule-based ego; one scenario
knob, the ego's braking limit, 8 m/s^2 x exp(0.5 z) with z standard normal, rounded to steps of 0.25, clipped to
[0.5, 12] m/s^2: ``wmplan.stress.knobs``; the traffic's random events come from the scene seeds).

1. **The true value**, by exact stratification. Because the knob is rounded, z takes countably many values k * 0.25
   and the failure probability is exactly ``p = sum_k P_k h_k`` with ``P_k = Phi((k + 1/2) 0.25) - Phi((k - 1/2)
   0.25)`` (normal CDF, ``statistics.NormalDist``) and h_k the failure probability of variant k over the scene
   seeds; variants whose clipped braking value is the same are merged into one stratum. Each h_k is estimated from
   its own episodes (``reference_episodes`` in all, more where P_k is large; at least ``min_per_stratum`` each).
   Strata beyond |z| = 6 (probability 2e-9) are left out and counted as failing with certainty in the upper bound.
   The stratified estimate is unbiased; its standard error is ``sqrt(sum_k P_k^2 h_k (1 - h_k) / n_k)`` (a
   textbook result, e.g. Cochran, *Sampling Techniques*, ch. 5; from memory). Strata with no failure add nothing to
   the estimate; to the upper end of the interval they add 3 max_k (P_k / n_k) over them: zero failures in all
   their episodes bound the expected number sum_k n_k h_k by 3 at 95% (the "rule of three", common practice), and
   sum_k P_k h_k <= max_k (P_k / n_k) sum_k n_k h_k.
2. **The stress runs**: ``run_stress`` with ``budget`` episodes per estimator for ``seeds`` stress seeds; each gives
   an importance-sampling estimate (cross-entropy levels, then a defensive mixture) with its 95% interval, and
   plain Monte Carlo at the same budget.

Reported: the reference ``p`` with its interval; per stress seed the IS estimate, interval, whether it covers the
reference, and the IS variance per episode (m n_final se^2); plain Monte Carlo's variance per episode is
p (1 - p) with the reference p (exact for a Bernoulli count). ``episodes_for_10pct_rel_error`` turns both into the
episodes that a 10% relative standard error needs (the cross-entropy episodes are added to IS once);
``fewer_simulations_x`` = plain MC's / IS's, per seed and the median. ``across_seeds`` repeats the comparison
without trusting the IS standard errors: the relative spread of the IS estimates over the stress seeds against plain
Monte Carlo's sqrt((1 - p) / (p budget)) (the IS runs spend ``budget`` episodes each, levels included). Results
certify nothing about a real vehicle.

Usage: ``python benchmarks/stress_is_gain.py [--quick] [--json FILE]``. Takes about 10 minutes on one core (quick:
about 1).
"""

from __future__ import annotations

import math
import statistics
import sys
import tempfile
import time

from wmplan import benchkit

FULL = dict(reference_episodes=80_000, min_per_stratum=1200, budget=1000, seeds=(1, 2, 3, 4, 5))
QUICK = dict(reference_episodes=4000, min_per_stratum=100, budget=240, seeds=(1,))
SCENARIO = "onramp-merge"
PLANNER = "rules"
KNOB = "ego_brake"
Z_MAX = 6.0


def reference(reference_episodes: int, min_per_stratum: int, seed_offset: int = 1_000_000_000) -> dict:
    """The stratified true value of the failure probability (module docstring, point 1)."""
    import numpy as np

    from wmplan.evaluate.closed_loop import evaluate_seeds
    from wmplan.scenario import load_scenario
    from wmplan.stress.knobs import DEFAULT_Z_STEP, knob_values, select_knobs, variant
    from wmplan.stress.search import is_failure

    base = load_scenario(SCENARIO)
    knobs = select_knobs(KNOB)
    step = DEFAULT_Z_STEP
    nd = statistics.NormalDist()
    k_max = int(round(Z_MAX / step))
    strata: dict[float, dict] = {}
    for k in range(-k_max, k_max + 1):
        z = np.array([k * step])
        value = float(knob_values(base, knobs, z)[KNOB])
        prob = nd.cdf((k + 0.5) * step) - nd.cdf((k - 0.5) * step)
        s = strata.setdefault(value, {"value": value, "z": [], "prob": 0.0})
        s["z"].append(k * step)
        s["prob"] += prob
    tail = 2.0 * nd.cdf(-(k_max + 0.5) * step)
    total_prob = sum(s["prob"] for s in strata.values())
    next_seed = seed_offset
    rows_out = []
    est, var, zero_ratio = 0.0, 0.0, 0.0
    for value in sorted(strata):
        s = strata[value]
        n = max(min_per_stratum, int(round(reference_episodes * s["prob"] / total_prob)))
        scn = variant(base, knobs, np.array([s["z"][0]]))
        rows = evaluate_seeds(scn, PLANNER, np.arange(next_seed, next_seed + n)).rows
        next_seed += n
        k_fail = sum(is_failure(r) for r in rows)
        h = k_fail / n
        est += s["prob"] * h
        var += s["prob"] ** 2 * h * (1 - h) / n
        if k_fail == 0:
            zero_ratio = max(zero_ratio, s["prob"] / n)
        rows_out.append(
            {
                "brake_mps2": value,
                "z": [min(s["z"]), max(s["z"])],
                "prob": s["prob"],
                "episodes": n,
                "failures": k_fail,
                "h": h,
            }
        )
    se = math.sqrt(var)
    upper_extra = tail + 3.0 * zero_ratio
    return {
        "estimate": est,
        "std_error": se,
        "ci95": [max(0.0, est - 1.96 * se), est + 1.96 * se + upper_extra],
        "episodes": sum(r["episodes"] for r in rows_out),
        "strata": rows_out,
        "omitted_tail_prob": tail,
    }


def stress_runs(budget: int, seeds: tuple[int, ...], p_ref: float) -> list[dict]:
    from wmplan.stress.knobs import select_knobs
    from wmplan.stress.runner import run_stress

    out = []
    for seed in seeds:
        with tempfile.TemporaryDirectory() as tmp:
            t0 = time.perf_counter()
            rep = run_stress(SCENARIO, PLANNER, budget, tmp, seed, knobs=select_knobs(KNOB), progress=False)
            seconds = time.perf_counter() - t0
        fp, mc = rep["failure_prob"], rep["plain_mc"]
        m, n_final, se = fp["seeds_per_sample"], fp["n_final"], fp["std_error"]
        ce_episodes = m * (fp["num_evaluations"] - n_final)
        is_var = m * n_final * se**2 if fp["failures"] > 1 else None
        mc_var = p_ref * (1 - p_ref)
        need_mc = mc_var / (0.1 * p_ref) ** 2
        need_is = ce_episodes + is_var / (0.1 * p_ref) ** 2 if is_var is not None else None
        hi = fp["ci95"][1]
        out.append(
            {
                "seed": seed,
                "seconds": seconds,
                "is_estimate": fp["estimate"],
                "is_ci95": fp["ci95"],
                "is_covers_reference": bool(hi is not None and fp["ci95"][0] <= p_ref <= hi),
                "is_ess": fp["ess"],
                "is_failures_final_stage": fp["failures"],
                "ce_reached": fp["reached"],
                "is_variance_per_episode": is_var,
                "plain_mc_variance_per_episode": mc_var,
                "episodes_for_10pct_rel_error": {"importance_sampling": need_is, "plain_mc": need_mc},
                "fewer_simulations_x": need_mc / need_is if need_is else None,
                "plain_mc_same_budget": {"estimate": mc["estimate"], "ci95": mc["ci95"], "failures": mc["failures"]},
                "failures_found": rep["failures_found"],
            }
        )
    return out


def run(quick: bool = False) -> dict:
    cfg = QUICK if quick else FULL
    machine = benchkit.machine()
    (ref_seconds,), _cpu, ref = benchkit.timed(lambda: reference(cfg["reference_episodes"], cfg["min_per_stratum"]), 1)
    runs = stress_runs(cfg["budget"], tuple(cfg["seeds"]), ref["estimate"]) if ref["estimate"] > 0 else []
    gains = [r["fewer_simulations_x"] for r in runs if r["fewer_simulations_x"]]
    p = ref["estimate"]
    spread = None
    if len(runs) >= 3 and p > 0:
        # a check that does not trust the IS standard errors: the spread of the estimates across stress seeds
        rel_var_is = statistics.variance([r["is_estimate"] for r in runs]) / p**2  # per run of `budget` episodes
        rel_var_mc = (1 - p) / (p * cfg["budget"])  # plain MC with the same number of episodes
        spread = {
            "is_relative_sd": math.sqrt(rel_var_is),
            "plain_mc_relative_sd": math.sqrt(rel_var_mc),
            "fewer_simulations_x": rel_var_mc / rel_var_is if rel_var_is > 0 else None,
        }
    return {
        "benchmark": "stress_is_gain",
        "quick": quick,
        "scenario": SCENARIO,
        "planner": PLANNER,
        "knobs": [KNOB],
        "budget_per_estimator": cfg["budget"],
        "reference": {**ref, "seconds": ref_seconds},
        "stress_runs": runs,
        "fewer_simulations_x_median": statistics.median(gains) if gains else None,
        "across_seeds": spread,
        "is_covers_reference": sum(r["is_covers_reference"] for r in runs),
        "machine": {**machine, "load_avg_1min_at_end": benchkit.load_avg()},
        "caution": benchkit.CAUTION,
    }


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(run, __doc__.splitlines()[0], argv)


if __name__ == "__main__":
    sys.exit(main())
