"""The sampling planners as episode runners for sweeps and stress tests: ``mpc+latent``, ``mpc+deterministic``,
``mpc+constant-velocity`` and ``mpc+oracle`` (see :mod:`wmplan.evaluate.closed_loop`).

Options a sweep file can pass in ``planner_options`` (all optional except the model folders the learned
predictors need): ``model`` (latent model folder), ``deterministic`` (least-squares model folder), ``sampler``
('cem' or 'mppi'), ``risk`` ('penalty' or 'chance'), ``epsilon``, ``num_candidates``, ``num_futures``,
``batch_size``, ``threads`` (torch threads in the worker; default 1, so parallel workers do not oversubscribe the
cores).
"""

from __future__ import annotations

import functools
from typing import Any

import numpy as np

from wmplan.errors import ConfigError
from wmplan.scenario import Scenario

OPTIONS = ("model", "deterministic", "sampler", "risk", "epsilon", "num_candidates", "num_futures", "batch_size",
           "threads")


def _config(name: str, options: dict[str, Any]):
    import torch

    from wmplan.plan.mpc import PlannerConfig

    unknown = sorted(set(options) - set(OPTIONS))
    if unknown:
        raise ConfigError(f"planner {name!r}: unknown option(s) {unknown}; known: {', '.join(OPTIONS)}")
    torch.set_num_threads(int(options.get("threads", 1)))
    cfg_kw = {k: options[k] for k in ("sampler", "epsilon", "num_candidates", "num_futures") if k in options}
    if "risk" in options:
        cfg_kw["risk_mode"] = options["risk"]
    return PlannerConfig(**cfg_kw)


def _run(name: str, scenario: Scenario, seeds, options: dict[str, Any]) -> list[dict]:
    from wmplan.evaluate.closed_loop import evaluate_seeds

    cfg = _config(name, options)
    out = evaluate_seeds(scenario, name, np.asarray(seeds, dtype=np.int64), model_dir=options.get("model"),
                         deterministic_dir=options.get("deterministic"), planner_cfg=cfg,
                         batch_size=int(options.get("batch_size", 64)))
    for r in out.rows:
        r.pop("episode", None)
    return out.rows


def _run_variants(name: str, scenarios: list[Scenario], seeds: list, **options: Any) -> list[list[dict]]:
    """Several scenario variants in shared planner batches (``wmplan.evaluate.closed_loop.evaluate_variants``)."""
    from wmplan.evaluate.closed_loop import evaluate_variants

    cfg = _config(name, options)
    groups = evaluate_variants(scenarios, seeds, name, model_dir=options.get("model"),
                               deterministic_dir=options.get("deterministic"), planner_cfg=cfg,
                               batch_size=int(options.get("batch_size", 64)))
    for rows in groups:
        for r in rows:
            r.pop("episode", None)
    return groups


def mpc_latent(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+latent", scenario, seeds, options)


def mpc_deterministic(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+deterministic", scenario, seeds, options)


def mpc_constant_velocity(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+constant-velocity", scenario, seeds, options)


def mpc_oracle(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+oracle", scenario, seeds, options)


for _fn, _name in ((mpc_latent, "mpc+latent"), (mpc_deterministic, "mpc+deterministic"),
                   (mpc_constant_velocity, "mpc+constant-velocity"), (mpc_oracle, "mpc+oracle")):
    # episodes of many scenario variants in shared batches (wmplan.sweep.episodes.call_planner_variants)
    _fn.run_variants = functools.partial(_run_variants, _name)  # type: ignore[attr-defined]

RUNNERS = {"mpc+latent": mpc_latent, "mpc+deterministic": mpc_deterministic,
           "mpc+constant-velocity": mpc_constant_velocity, "mpc+oracle": mpc_oracle}


def register_mpc_planners() -> None:
    """Register the four sampling planners (idempotent)."""
    from wmplan.sweep.episodes import planner_names, register_planner

    for name, fn in RUNNERS.items():
        if name not in planner_names():
            register_planner(name, fn)
