"""What ``wmplan evaluate`` (and the demo) does: several planners on the same episodes, one summary.

:func:`compare_planners` runs each planner through the one closed loop on common scene seeds, summarises each
with intervals (:mod:`wmplan.evaluate.tables`), compares each with a reference planner pair by pair
(:mod:`wmplan.evaluate.paired`: paired differences, exact McNemar p-values, pairs needed for 80 % power), keeps the
calibration records of the planners that predict risk, and writes ``episodes.parquet``, ``calibration.parquet``
and ``summary.json`` when given a folder.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError
from wmplan.evaluate.closed_loop import evaluate_planner
from wmplan.evaluate.paired import paired_comparison
from wmplan.evaluate.planners import make_planner, split_run_options
from wmplan.evaluate.tables import calibration, summarise_planner, write_outputs
from wmplan.scenario import Scenario, scenario_hash, scenario_to_dict
from wmplan.sim.params import SimParams

ProgressFactory = Callable[[str, int], tuple[Callable[[int], None], Callable[[], None]]]
"""``factory(label, total_decisions) -> (advance(n), close())`` for one planner's run."""


def check_planners(scenario: Scenario, planners: Sequence[str], options: dict[str, Any] | None) -> None:
    """Build each planner once, so that an unknown name, a missing model folder or a broken plug-in is reported
    before any episode runs (one-line ConfigError)."""
    if not planners:
        raise ConfigError("--planners: name at least one planner")
    params = SimParams.from_scenario(scenario)
    opts, _ = split_run_options(options)
    for name in planners:
        make_planner(name, params, _options_for(name, opts))


def default_reference(planners: Sequence[str]) -> str | None:
    """mpc+oracle when it runs, else rules when it runs, else None (no comparisons)."""
    return next((p for p in ("mpc+oracle", "rules") if p in planners), None)


def _options_for(name: str, options: dict[str, Any]) -> dict[str, Any]:
    """The shared options a planner takes: the sampling planners take all; 'rules' none; a plug-in planner only
    those given under its own name (``options[name]``, a dict)."""
    if name == "rules":
        return {}
    if name.startswith("mpc+"):
        return {k: v for k, v in options.items() if not isinstance(v, dict)}
    own = options.get(name, {})
    return dict(own) if isinstance(own, dict) else {}


def compare_planners(
    scenario: Scenario,
    planners: Sequence[str],
    *,
    episodes: int,
    seed: int = 0,
    options: dict[str, Any] | None = None,
    episodes_by_planner: dict[str, int] | None = None,
    batch_size: int = 50,
    out_dir: Path | str | None = None,
    progress: ProgressFactory | None = None,
    reference: str | None = None,
    detect: dict[str, float] | None = None,
    log: Callable[[str], None] | None = None,
) -> tuple[dict, list[dict]]:
    """Run ``planners`` on the same ``episodes`` scene seeds and summarise them.

    Args:
        scenario: the scenario.
        planners: planner specs (:mod:`wmplan.evaluate.planners`).
        episodes: episodes per planner (episode e has scene seed ``episode_seeds(seed, episodes)[e]``).
        seed: the run's seed.
        options: planner options (``model``, ``deterministic``, the sampling planner's keys); a plug-in planner's
            own options under its spec as a dict.
        episodes_by_planner: fewer episodes for some planners (a prefix of the same seeds).
        batch_size: episodes planned together.
        out_dir: if given, write the outputs there (:func:`wmplan.evaluate.tables.write_outputs`).
        progress: a progress-bar factory.
        reference: the planner every other one is compared with, pair by pair (default: mpc+oracle when it runs,
            else rules when it runs, else none). Pairs are the seeds both ran.
        detect: differences to size the power for (:func:`wmplan.evaluate.paired.paired_comparison`).
        log: called with one line per finished planner.

    Returns:
        (summary dict as written to ``summary.json``, all episode rows).
    """
    check_planners(scenario, planners, options)
    reference = default_reference(planners) if reference is None else reference
    if reference is not None and reference not in planners:
        raise ConfigError(f"--reference: {reference!r} is not among the planners evaluated ({', '.join(planners)})")
    opts, _ = split_run_options(options)
    results, calib, rows, calib_rows = {}, {}, [], []
    n_dec = int(round(scenario.duration_s / 0.2))
    for name in planners:
        n = int((episodes_by_planner or {}).get(name, episodes))
        advance, close = progress(f"evaluate {name}", n_dec * -(-n // batch_size)) if progress else (None, None)
        t0 = time.perf_counter()
        try:
            out = evaluate_planner(
                scenario,
                name,
                episodes=n,
                seed=seed,
                options=_options_for(name, opts),
                batch_size=batch_size,
                progress=advance,
            )
        finally:
            if close is not None:
                close()
        results[name] = summarise_planner(out.rows)
        results[name]["seconds"] = round(time.perf_counter() - t0, 1)
        rows += out.rows
        if out.predicted:
            calib[name] = calibration(out.predicted, out.happened)
            calib_rows += [
                {"planner": name, "predicted": p, "happened": int(h)}
                for p, h in zip(out.predicted, out.happened, strict=True)
            ]
        if log is not None:
            log(f"{name}: {results[name]['seconds']} s")
    comparisons = {}
    if reference is not None:
        ref_rows = [r for r in rows if r["planner"] == reference]
        for name in planners:
            if name == reference:
                continue
            mine = [r for r in rows if r["planner"] == name]
            common = {r["seed"] for r in mine} & {r["seed"] for r in ref_rows}
            comparisons[name] = paired_comparison(
                [r for r in ref_rows if r["seed"] in common],
                [r for r in mine if r["seed"] in common],
                reference=reference,
                planner=name,
                detect=detect,
            )
    summary = {
        "scenario": scenario.name,
        "scenario_hash": scenario_hash(scenario),
        "scenario_spec": scenario_to_dict(scenario),  # what `wmplan triage` rebuilds the scenario from
        "episodes": episodes,
        "episodes_by_planner": {p: int((episodes_by_planner or {}).get(p, episodes)) for p in planners},
        "seed": seed,
        "planners": list(planners),
        "options": {
            k: (str(v) if isinstance(v, Path) else v)
            for k, v in opts.items()
            if isinstance(v, (str, int, float, bool, Path, type(None)))
        },
        "results": results,
        "reference": reference,
        "comparisons": comparisons,
        "calibration": calib,
        "caution": CAUTION,
    }
    if out_dir is not None:
        write_outputs(Path(out_dir), summary, rows, calib_rows)
    return summary, rows
