"""The sampling planners as episode runners for sweeps and stress tests: ``mpc+latent``, ``mpc+deterministic``,
``mpc+constant-velocity`` and ``mpc+oracle`` (see :mod:`wmplan.evaluate.closed_loop`).

Options a sweep file can pass in ``planner_options`` (all optional except the model folders the learned
predictors need): ``model`` (latent model folder), ``deterministic`` (least-squares model folder), ``sampler``
('cem' or 'mppi'), ``risk`` ('penalty' or 'chance'), ``epsilon``, ``num_candidates``, ``num_futures``,
``batch_size``, ``threads`` (torch threads in the worker; default 1, so parallel workers do not oversubscribe the
cores).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from wmplan.errors import ConfigError
from wmplan.scenario import Scenario

OPTIONS = ("model", "deterministic", "sampler", "risk", "epsilon", "num_candidates", "num_futures", "batch_size",
           "threads")


def _run(name: str, scenario: Scenario, seeds, options: dict[str, Any]) -> list[dict]:
    import torch

    from wmplan.evaluate.closed_loop import evaluate_seeds
    from wmplan.plan.mpc import PlannerConfig

    unknown = sorted(set(options) - set(OPTIONS))
    if unknown:
        raise ConfigError(f"planner {name!r}: unknown option(s) {unknown}; known: {', '.join(OPTIONS)}")
    torch.set_num_threads(int(options.get("threads", 1)))
    cfg_kw = {k: options[k] for k in ("sampler", "epsilon", "num_candidates", "num_futures") if k in options}
    if "risk" in options:
        cfg_kw["risk_mode"] = options["risk"]
    out = evaluate_seeds(scenario, name, np.asarray(seeds, dtype=np.int64), model_dir=options.get("model"),
                         deterministic_dir=options.get("deterministic"), planner_cfg=PlannerConfig(**cfg_kw),
                         batch_size=int(options.get("batch_size", 64)))
    for r in out.rows:
        r.pop("episode", None)
    return out.rows


def mpc_latent(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+latent", scenario, seeds, options)


def mpc_deterministic(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+deterministic", scenario, seeds, options)


def mpc_constant_velocity(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+constant-velocity", scenario, seeds, options)


def mpc_oracle(scenario: Scenario, seeds, **options: Any) -> list[dict]:
    return _run("mpc+oracle", scenario, seeds, options)


RUNNERS = {"mpc+latent": mpc_latent, "mpc+deterministic": mpc_deterministic,
           "mpc+constant-velocity": mpc_constant_velocity, "mpc+oracle": mpc_oracle}


def register_mpc_planners() -> None:
    """Register the four sampling planners (idempotent)."""
    from wmplan.sweep.episodes import planner_names, register_planner

    for name, fn in RUNNERS.items():
        if name not in planner_names():
            register_planner(name, fn)
