"""``wmplan stress``: find failures of a planner in a scenario and estimate how likely they are.

With a budget of N episodes per estimator and m episodes per knob sample (``seeds_per_sample``, default 4):

1. **Cross-entropy levels** (at most ``ce_fraction`` of the N / m knob samples, an eighth of them per level): the
   CEM search for failures over the scenario knobs and the traffic seeds (:mod:`wmplan.stress.search`).
2. **Importance sampling**: the rest of the knob samples from the last cross-entropy proposal mixed with a share
   ``defensive`` (0.2) of the nominal (a defensive mixture: no weight exceeds 5, so even a proposal that went astray
   costs at most about 5x plain Monte Carlo's variance), m episodes each, weighted toward the nominal knob
   distribution: the failure probability, a 95% interval, effective sample size.
3. **Plain Monte Carlo**: N more episodes, each with its own knob sample from the nominal distribution and its own
   seed (independent episodes, so the Wilson 95% interval holds): the reference at equal budget.

Every distinct failure seen in any stage is kept; the most plausible ones (largest nominal density) are saved as
scenario files that replay them. ``simulations`` counts every episode run (about 2 N).

The report compares the estimators by their variance per episode: plain Monte Carlo's is p(1 - p) (with p the
importance-sampling estimate, since plain Monte Carlo often sees no failure at all), importance sampling's is
m * n_final * se^2. ``episodes_for_10pct_rel_error`` turns each into the episodes that a 10% relative standard error
would need (for importance sampling the cross-entropy episodes are added once). Results certify nothing about a
real vehicle.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError
from wmplan.evaluate.planners import resolve_planner
from wmplan.io import atomic_write_json
from wmplan.scenario import Scenario, load_scenario
from wmplan.stress.knobs import DEFAULT_KNOBS, DEFAULT_Z_STEP, Knob, check_knobs, describe_knobs
from wmplan.stress.rare_event import (
    GaussianFamily,
    ISResult,
    PlainMCResult,
    cross_entropy_levels,
    importance_sample,
    plain_monte_carlo,
)
from wmplan.stress.search import FAILURE_DEFINITION, Animate, StressEvaluator, save_failures
from wmplan.sweep.runner import check_workers_can_resolve, make_executor

MIN_KNOB_SAMPLES = 30


def _progress(progress: bool | Callable[[int, int], None] | None, total: int):
    """(update(n), close()) for a tqdm bar on stderr, a callback, or nothing."""
    if callable(progress) and not isinstance(progress, bool):
        done = [0]

        def update(n: int) -> None:
            done[0] += n
            progress(done[0], total)  # type: ignore[operator]

        return update, lambda: None
    from tqdm import tqdm

    show = sys.stderr.isatty() if progress is None else bool(progress)
    bar = tqdm(total=total, desc="episodes", unit="ep", file=sys.stderr, disable=not show, dynamic_ncols=True)
    return bar.update, bar.close


def run_stress(
    scenario: Scenario | str | Path,
    planner: str,
    budget: int,
    out_dir: str | Path,
    seed: int,
    *,
    workers: int = 1,
    scheduler: str | None = None,
    knobs: Sequence[Knob] | None = None,
    z_step: float = DEFAULT_Z_STEP,
    rho: float = 0.1,
    ce_fraction: float = 0.6,
    max_saved: int = 10,
    seeds_per_sample: int = 4,
    defensive: float = 0.2,
    planner_options: dict[str, Any] | None = None,
    animate: Animate | None = None,
    progress: bool | Callable[[int, int], None] | None = None,
) -> dict:
    """Search for failures and estimate the failure probability under the nominal knob distribution.

    Args:
        scenario: a scenario, built-in name or file.
        planner: registered planner name.
        budget: episodes for each estimator (importance sampling including its cross-entropy levels; plain Monte
            Carlo); at least 30 x ``seeds_per_sample``.
        out_dir: output folder: ``stress.json`` and ``failures/``.
        seed: the only source of randomness (knob samples and scene seeds).
        workers, scheduler: where episodes run, as for sweeps (``wmplan.sweep.runner.make_executor``).
        knobs: the scenario knobs (default :data:`wmplan.stress.knobs.DEFAULT_KNOBS`).
        z_step: knob resolution.
        rho: elite fraction of the cross-entropy levels.
        ce_fraction: most of the budget the cross-entropy levels may use.
        seeds_per_sample: episodes per knob sample in the importance-sampling stages (m).
        defensive: share of the nominal distribution in the final stage's proposal (0: the cross-entropy proposal
            alone).
        max_saved: most failures saved as files.
        planner_options: keyword options for the planner's runner.
        animate: ``animate(scenario_file, seed, planner, out_file) -> Path``, called per saved failure (optional).
        progress: as for sweeps; counts episodes.

    Returns:
        The report (also written atomically to ``out/stress.json``), with keys ``failures_found``,
        ``failure_prob`` {``estimate``, ``ci95``, ``ess``, ...}, ``plain_mc`` {``estimate``, ``ci95``, ...},
        ``budget``, ``simulations`` and more.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ConfigError(f"seed must be an integer >= 0, got {seed!r}")
    if isinstance(seeds_per_sample, bool) or not isinstance(seeds_per_sample, int) or not 1 <= seeds_per_sample <= 64:
        raise ConfigError(f"seeds_per_sample must be an integer in [1, 64], got {seeds_per_sample!r}")
    least = MIN_KNOB_SAMPLES * seeds_per_sample
    if isinstance(budget, bool) or not isinstance(budget, (int, np.integer)) or budget < least:
        raise ConfigError(
            f"budget must be an integer >= {least} episodes ({MIN_KNOB_SAMPLES} knob samples x "
            f"{seeds_per_sample} seeds per sample), got {budget!r}"
        )
    if not 0.0 <= defensive < 1.0:
        raise ConfigError(f"defensive must lie in [0, 1), got {defensive!r}")
    if not 0.0 < ce_fraction < 1.0:
        raise ConfigError(f"ce_fraction must lie in (0, 1), got {ce_fraction!r}")
    base = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    resolve_planner(planner)
    if workers != 1 or scheduler:
        check_workers_can_resolve(planner)
    knobs = tuple(DEFAULT_KNOBS if knobs is None else knobs)
    check_knobs(base, knobs)
    budget = int(budget)
    out_dir = Path(out_dir)
    ss_ce, ss_mc, ss_seeds = np.random.SeedSequence(int(seed)).spawn(3)
    nominal = GaussianFamily.standard(len(knobs))
    budget_z = budget // seeds_per_sample
    n_level = max(10, budget_z // 8)
    max_levels = max(1, int(ce_fraction * budget_z) // n_level)
    update, close = _progress(progress, 2 * budget)
    try:
        with make_executor(workers, scheduler) as (executor, _window):
            ev = StressEvaluator(
                base,
                planner,
                knobs,
                z_step,
                np.random.default_rng(ss_seeds),
                executor,
                dict(planner_options or {}),
                seeds_per_sample=seeds_per_sample,
                on_simulated=update,
            )
            stage = ["ce level 0"]
            is_res = _cross_entropy_within_budget(
                ev, stage, nominal, n_level, max_levels, budget_z, rho, ss_ce, defensive
            )
            stage[0] = "plain mc"
            ev.seeds_per_sample = 1
            mc = plain_monte_carlo(ev.scorer(lambda: stage[0]), nominal, 0.0, budget, rng=np.random.default_rng(ss_mc))
    finally:
        close()
    saved = save_failures(ev, out_dir, max_saved=max_saved, stress_seed=int(seed), animate=animate)
    report = _report(base, planner, budget, int(seed), knobs, z_step, seeds_per_sample, ev, is_res, mc, saved)
    atomic_write_json(out_dir / "stress.json", report)
    return report


def _cross_entropy_within_budget(
    ev: StressEvaluator,
    stage: list[str],
    nominal: GaussianFamily,
    n_level: int,
    max_levels: int,
    budget_z: int,
    rho: float,
    ss: np.random.SeedSequence,
    defensive: float = 0.0,
) -> ISResult:
    """Cross-entropy levels, then importance sampling with exactly the knob samples the levels left over."""
    rng = np.random.default_rng(ss)

    def label(_x: np.ndarray, _s: np.ndarray, t: int) -> None:
        stage[0] = f"ce level {t + 1}"

    proposal, levels, reached, used = cross_entropy_levels(
        ev.scorer(lambda: stage[0]),
        nominal,
        0.0,
        n_per_level=n_level,
        rho=rho,
        max_levels=max_levels,
        rng=rng,
        on_samples=label,
    )
    stage[0] = "importance sampling"
    return importance_sample(
        ev.scorer(lambda: stage[0]),
        nominal,
        proposal,
        0.0,
        budget_z - used,
        rng=rng,
        levels=levels,
        reached=reached,
        prior_evaluations=used,
        defensive=defensive,
    )


def _report(
    base: Scenario,
    planner: str,
    budget: int,
    seed: int,
    knobs: Sequence[Knob],
    z_step: float,
    m: int,
    ev: StressEvaluator,
    is_res: ISResult,
    mc: PlainMCResult,
    saved: list[Path],
) -> dict:
    p = is_res.estimate
    is_var_per_episode = m * is_res.n_final * is_res.std_error**2 if is_res.failures > 1 else None
    mc_var_per_episode = p * (1 - p) if p > 0 else None
    ce_episodes = m * (is_res.num_evaluations - is_res.n_final)
    need_is = (ce_episodes + is_var_per_episode / (0.1 * p) ** 2) if is_var_per_episode else None
    need_mc = mc_var_per_episode / (0.1 * p) ** 2 if mc_var_per_episode else None
    ratio = mc_var_per_episode / is_var_per_episode if mc_var_per_episode and is_var_per_episode else None
    return {
        "scenario": base.name,
        "planner": planner,
        "seed": seed,
        "budget": budget,
        "simulations": len(ev.samples),
        "failure_definition": FAILURE_DEFINITION,
        "failures_found": len(ev.failures()),
        "failures_saved": [path.name for path in saved],
        "failure_prob": {**is_res.as_dict(), "seeds_per_sample": m, "simulations": m * is_res.num_evaluations},
        "plain_mc": {**mc.as_dict(), "simulations": mc.n},
        "comparison": {
            "variance_per_episode": {"importance_sampling": is_var_per_episode, "plain_mc": mc_var_per_episode},
            "variance_ratio_plain_mc_over_is": ratio,
            "episodes_for_10pct_rel_error": {"importance_sampling": need_is, "plain_mc": need_mc},
        },
        "knobs": describe_knobs(knobs),
        "z_step": z_step,
        "nominal": "independent standard normal knobs",
        "caution": CAUTION,
    }


def nominal_reference(
    scenario: Scenario | str | Path,
    planner: str,
    num_knob_samples: int,
    seeds_per_sample: int,
    seed: int,
    *,
    workers: int = 1,
    scheduler: str | None = None,
    knobs: Sequence[Knob] | None = None,
    z_step: float = DEFAULT_Z_STEP,
    planner_options: dict[str, Any] | None = None,
    progress: bool | Callable[[int, int], None] | None = None,
) -> dict:
    """A reference value of the nominal failure probability, to check the estimators against.

    Plain Monte Carlo over the knobs with many scene seeds per knob sample (conditional Monte Carlo): knob samples
    z_i from the nominal distribution, m episodes each in one simulator batch (cheap in time), value H_i = the
    failed fraction. The estimate mean(H) is unbiased, and as the z_i are independent its standard error is
    sd(H) / sqrt(n) (normal 95% interval). It spends many episodes per unit of information when failures depend
    mostly on the knobs, so it is a slow, assumption-light yardstick, not a competitor.
    """
    base = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    resolve_planner(planner)
    if workers != 1 or scheduler:
        check_workers_can_resolve(planner)
    knobs = tuple(DEFAULT_KNOBS if knobs is None else knobs)
    check_knobs(base, knobs)
    if num_knob_samples < 2 or seeds_per_sample < 1:
        raise ConfigError("need num_knob_samples >= 2 and seeds_per_sample >= 1")
    ss_z, ss_seeds = np.random.SeedSequence(int(seed)).spawn(2)
    nominal = GaussianFamily.standard(len(knobs))
    update, close = _progress(progress, num_knob_samples * seeds_per_sample)
    try:
        with make_executor(workers, scheduler) as (executor, _window):
            ev = StressEvaluator(
                base,
                planner,
                knobs,
                z_step,
                np.random.default_rng(ss_seeds),
                executor,
                dict(planner_options or {}),
                seeds_per_sample=seeds_per_sample,
                on_simulated=update,
            )
            res = importance_sample(
                ev.scorer(lambda: "reference"), nominal, nominal, 0.0, num_knob_samples, rng=np.random.default_rng(ss_z)
            )
    finally:
        close()
    failures = sum(bool(s.row["collision"]) or bool(s.row["offroad"]) for s in ev.samples)
    return {
        "estimate": res.estimate,
        "ci95": [res.ci95[0], res.ci95[1] if res.failures else None],
        "std_error": res.std_error,
        "knob_samples": num_knob_samples,
        "seeds_per_sample": seeds_per_sample,
        "simulations": len(ev.samples),
        "failed_episodes": failures,
        "scenario": base.name,
        "planner": planner,
        "seed": int(seed),
        "knobs": describe_knobs(knobs),
        "z_step": z_step,
    }


def cli_stress(
    scenario: str | Path,
    planner: str,
    budget: int,
    out: str | Path,
    *,
    seed: int = 0,
    json_file: str | Path | None = None,
    workers: int = 1,
    scheduler: str | None = None,
    planner_options: dict[str, Any] | None = None,
    animate: Animate | None = None,
) -> dict:
    """What ``wmplan stress SCENARIO --planner P --budget N --out DIR [--json FILE]`` calls; returns the report.

    ``json_file``: also write the report there (atomically). ``animate``: the CLI passes a function built on
    ``wmplan.viz.anim`` to draw each saved failure.
    """
    report = run_stress(
        scenario,
        planner,
        budget,
        out,
        seed,
        workers=workers,
        scheduler=scheduler,
        planner_options=planner_options,
        animate=animate,
        progress=None,
    )
    if json_file is not None:
        atomic_write_json(Path(json_file), report)
    return report
