"""The one registry of planners: built-in names, planners and predictors of your own by import path.

A planner spec (what ``--planners``, sweep files and ``stress --planner`` take) is one of:

=========================  ===================================================================================
spec                       planner
=========================  ===================================================================================
``rules``                  the rule-based ego (:class:`wmplan.plan.base.RulePlanner`)
``mpc+latent``             the sampling planner (:mod:`wmplan.plan.mpc`) over the learned latent model
                           (option ``model``: its folder)
``mpc+deterministic``      ... over the least-squares model (option ``deterministic``: its folder)
``mpc+constant-velocity``  ... over constant-velocity futures
``mpc+oracle``             ... over the true simulator's futures, drivers' traits known
``pkg.module:factory``     your own planner: ``factory(params: SimParams, **options) -> Planner``
                           (:class:`wmplan.plan.base.Planner`), or a :class:`PlannerEntry`
``mpc+pkg.module:factory`` the sampling planner over your own predictor:
                           ``factory(params: SimParams, horizon=H, plan_dt_s=dt, **options) -> Predictor``
                           (:class:`wmplan.plan.predictors.Predictor`)
=========================  ===================================================================================

Options of the sampling planners (sweep files: ``planner_options``; CLI: flags): ``model``, ``deterministic``,
``sampler`` ('cem' or 'mppi'), ``risk`` ('penalty' or 'chance'), ``epsilon``, ``num_candidates``,
``num_futures``, ``threads`` (torch threads; default: leave torch's setting), and in Python ``config`` (a
:class:`~wmplan.plan.mpc.PlannerConfig`, which the named keys then override). Options a plug-in predictor's
factory does not list are refused by Python's own call check. ``batch_size`` is an option of the run, not of the
planner (:func:`split_run_options`).

Worker processes of sweeps and stress tests resolve the spec again by importing it, so a plug-in must live in an
importable module (not in ``__main__`` or a notebook cell) when it runs with more than one worker.
"""

from __future__ import annotations

import importlib
import inspect
from collections.abc import Callable, Hashable
from dataclasses import dataclass, replace
from typing import Any

from wmplan.errors import ConfigError
from wmplan.plan.base import Planner, RulePlanner, missing_members
from wmplan.plan.predictors import HISTORY, NUM_OBJECTS, PREDICTOR_NAMES, builtin_predictor
from wmplan.scenario import Scenario
from wmplan.sim.params import SimParams

PlannerFactory = Callable[..., Planner]
"""``factory(params: SimParams, **options) -> Planner``."""

MPC_OPTIONS = (
    "model",
    "deterministic",
    "sampler",
    "risk",
    "epsilon",
    "num_candidates",
    "num_futures",
    "threads",
    "config",
)
RUN_OPTIONS = ("batch_size",)
BUILTIN_PREDICTORS = PREDICTOR_NAMES
__all__ = [
    "HISTORY",
    "NUM_OBJECTS",
    "PlannerEntry",
    "make_planner",
    "planner_names",
    "register_planner",
    "resolve_planner",
    "unregister_planner",
]


@dataclass(frozen=True)
class PlannerEntry:
    """A planner factory and what the closed loop needs to know before building it.

    Attributes:
        make: ``make(params: SimParams, **options) -> Planner``.
        batch_key: scenario variants with equal ``batch_key(scenario)`` may share one planner batch (besides the
            simulator's own rule, :func:`wmplan.sim.variants.batch_classes`: they may differ only in traffic,
            drivers and the ego's start); None: every variant runs on its own (a planner that reads the variant's
            own drivers or traffic, like the oracle's futures).
        description: one line for listings.
    """

    make: PlannerFactory
    batch_key: Callable[[Scenario], Hashable] | None = None
    description: str = ""


def _make_rules(params: SimParams, **options: Any) -> Planner:
    if options:
        raise ConfigError(f"planner 'rules' takes no options, got {sorted(options)}")
    return RulePlanner(params)


def _planner_config(name: str, options: dict[str, Any]):
    from wmplan.plan.mpc import PlannerConfig

    cfg = options.get("config") or PlannerConfig()
    if not isinstance(cfg, PlannerConfig):
        raise ConfigError(f"planner {name!r}: option config must be a PlannerConfig, got {type(cfg).__name__}")
    named = {k: options[k] for k in ("sampler", "epsilon", "num_candidates", "num_futures") if k in options}
    if "risk" in options:
        named["risk_mode"] = options["risk"]
    try:
        return replace(cfg, **named) if named else cfg
    except (TypeError, ValueError) as err:
        raise ConfigError(f"planner {name!r}: {err}") from None


def make_mpc(predictor: str, params: SimParams, **options: Any) -> Planner:
    """The sampling planner over a built-in predictor (one of BUILTIN_PREDICTORS) or a plug-in predictor's import
    path; ``options`` as in the module docstring."""
    from wmplan.model.ego import EgoKinematics
    from wmplan.plan.mpc import SamplingPlanner

    name = f"mpc+{predictor}"
    builtin = predictor in BUILTIN_PREDICTORS
    if builtin:
        unknown = sorted(set(options) - set(MPC_OPTIONS))
        if unknown:
            raise ConfigError(f"planner {name!r}: unknown option(s) {unknown}; known: {', '.join(MPC_OPTIONS)}")
    if "threads" in options:
        import torch

        torch.set_num_threads(int(options["threads"]))
    cfg = _planner_config(name, options)
    ego = EgoKinematics.from_scenario(params.scenario, cfg.plan_dt_s)
    if builtin:
        pred = builtin_predictor(
            predictor,
            params,
            horizon=cfg.horizon,
            plan_dt_s=cfg.plan_dt_s,
            model_dir=options.get("model"),
            deterministic_dir=options.get("deterministic"),
        )
    else:
        factory = _import_object(name, predictor)
        extra = {k: v for k, v in options.items() if k not in MPC_OPTIONS}
        pred = _call_factory(name, factory, params, horizon=cfg.horizon, plan_dt_s=cfg.plan_dt_s, **extra)
        if not callable(getattr(pred, "predict", None)):
            raise ConfigError(
                f"planner {name!r}: the factory returned {type(pred).__name__}, which has no "
                "predict(ctx, actions, num_futures, *, generator) method (wmplan.plan.predictors)"
            )
    return SamplingPlanner(cfg, params, pred, ego)


def _mpc_entry(kind: str, batch_key) -> PlannerEntry:
    def make(params: SimParams, **options: Any) -> Planner:
        return make_mpc(kind, params, **options)

    make.__qualname__ = make.__name__ = f"make_mpc_{kind.replace('-', '_')}"
    return PlannerEntry(make, batch_key, f"sampling planner over {kind} futures")


def _shares_all(_scenario: Scenario) -> Hashable:
    return ()


def _merge_zone(scenario: Scenario) -> Hashable:
    return scenario.drivers.merge_zone_m  # the rule-based ego reads it


_REGISTRY: dict[str, PlannerEntry] = {
    "rules": PlannerEntry(_make_rules, _merge_zone, "the rule-based ego (IDM, MOBIL, merge rule)"),
    "mpc+latent": _mpc_entry("latent", _shares_all),
    "mpc+deterministic": _mpc_entry("deterministic", _shares_all),
    "mpc+constant-velocity": _mpc_entry("constant-velocity", _shares_all),
    "mpc+oracle": _mpc_entry("oracle", None),  # its futures come from each variant's own distributions
}
BUILTIN_PLANNERS = tuple(_REGISTRY)


def planner_names() -> list[str]:
    """The registered planner names (built-ins first, then those added by :func:`register_planner`)."""
    return list(_REGISTRY)


def register_planner(name: str, entry: PlannerEntry | PlannerFactory, *, replace: bool = False) -> None:
    """Make a planner available under ``name`` in this process (worker processes of sweeps and stress tests do not
    see it: give them an import path instead).

    Raises:
        ConfigError: a bad name, a taken name without ``replace``, or an entry that is not callable.
    """
    if not isinstance(name, str) or not name.strip() or name != name.strip() or "," in name:
        raise ConfigError(f"planner name must be a non-empty string without commas or surrounding spaces, got {name!r}")
    entry = entry if isinstance(entry, PlannerEntry) else PlannerEntry(entry)
    if not callable(entry.make):
        raise ConfigError(f"planner {name!r}: the factory must be callable (params, **options) -> Planner")
    if name in _REGISTRY and not replace:
        raise ConfigError(f"planner {name!r} is already registered; pass replace=True to replace it")
    _REGISTRY[name] = entry


def unregister_planner(name: str) -> None:
    """Remove a planner added by :func:`register_planner` (the built-ins stay)."""
    if name not in BUILTIN_PLANNERS:
        _REGISTRY.pop(name, None)


def _import_object(spec: str, path: str) -> Any:
    """The object at ``module:attribute`` (``module.attribute`` also accepted), or a one-line ConfigError."""
    module_name, sep, attr = path.partition(":")
    if not sep:
        module_name, _, attr = path.rpartition(".")
    if not module_name or not attr:
        raise ConfigError(
            f"planner {spec!r}: not a known name ({', '.join(planner_names())}) nor an import path module:factory"
        )
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise ConfigError(f"planner {spec!r}: cannot import module {module_name!r} ({err})") from None
    except Exception as err:  # the plug-in's own module failed while importing
        raise ConfigError(f"planner {spec!r}: importing {module_name!r} failed: {type(err).__name__}: {err}") from None
    obj = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise ConfigError(f"planner {spec!r}: module {module_name!r} has no attribute {attr!r}")
        obj = getattr(obj, part)
    return obj


def _call_factory(spec: str, factory: Any, params: SimParams, **options: Any) -> Any:
    if not callable(factory):
        raise ConfigError(f"planner {spec!r}: {factory!r} is not callable; it must be a factory (params, **options)")
    try:
        inspect.signature(factory).bind(params, **options)
    except TypeError as err:
        raise ConfigError(f"planner {spec!r}: the factory does not take these options: {err}") from None
    except ValueError:  # no signature to inspect (a builtin): let the call itself tell
        pass
    return factory(params, **options)


def resolve_planner(spec: str) -> PlannerEntry:
    """The entry for a planner spec (module docstring), or a one-line ConfigError naming what is wrong."""
    if not isinstance(spec, str) or not spec.strip():
        raise ConfigError(f"planner must be a non-empty name or import path, got {spec!r}")
    spec = spec.strip()
    if spec in _REGISTRY:
        return _REGISTRY[spec]
    if spec.startswith("mpc+"):
        path = spec[4:]
        _import_object(spec, path)  # fail now, with the name, if it cannot be imported

        def make(params: SimParams, **options: Any) -> Planner:
            return make_mpc(path, params, **options)

        return PlannerEntry(make, None, f"sampling planner over the predictor {path}")
    if ":" not in spec and "." not in spec:
        raise ConfigError(
            f"unknown planner {spec!r}; known: {', '.join(planner_names())}, or an import path "
            "module:factory (a plug-in)"
        )
    obj = _import_object(spec, spec)
    if isinstance(obj, PlannerEntry):
        return obj
    if not callable(obj):
        raise ConfigError(f"planner {spec!r}: {type(obj).__name__} object is neither a factory nor a PlannerEntry")
    return PlannerEntry(obj, None, f"plug-in {spec}")


def make_planner(spec: str, params: SimParams, options: dict[str, Any] | None = None) -> Planner:
    """Build the planner of ``spec`` for a scenario; checks that it has the :class:`Planner` members."""
    entry = resolve_planner(spec)
    planner = _call_factory(spec, entry.make, params, **dict(options or {}))
    missing = missing_members(planner)
    if missing:
        raise ConfigError(
            f"planner {spec!r}: the factory returned {type(planner).__name__}, which lacks "
            f"{', '.join(missing)} (see wmplan.plan.base.Planner)"
        )
    dt = float(planner.decision_dt_s)
    ratio = dt / params.dt_s
    if not dt > 0 or abs(ratio - round(ratio)) > 1e-9:
        raise ConfigError(
            f"planner {spec!r}: decision_dt_s = {dt!r} must be a positive multiple of the scenario's "
            f"time step {params.dt_s} s"
        )
    return planner


def split_run_options(options: dict[str, Any] | None) -> tuple[dict[str, Any], dict[str, Any]]:
    """(planner options, run options) of an options dict (the run options: ``batch_size``)."""
    options = dict(options or {})
    run = {k: options.pop(k) for k in RUN_OPTIONS if k in options}
    return options, run
