"""Closed-loop episodes in the true simulator, one row of outcomes per episode, for any registered planner.

A *planner* here is an episode runner registered under a name: a function ``fn(scenario, seeds, **options)`` that
drives the ego through one episode per seed (batched) and returns one row per episode, in the order of ``seeds``.
``"rules"`` (the rule-based ego of :mod:`wmplan.sim.ego_rules`) is built in; other planners join with
:func:`register_planner`. A runner built from a policy (a function ``state -> actions (S, 2)``) can reuse
:func:`closed_loop`, which does the stepping and the bookkeeping.

Sweeps and stress tests run cells in other processes (a process pool started with "spawn", or Dask workers). The
runner function itself is sent there (pickled by reference), so register **module-level functions** of an
importable module; a lambda or a function defined inside another function cannot travel.

Episode outcome definitions (every runner must follow them so that planners compare like for like):

=================  =========================================================================================
key                meaning
=================  =========================================================================================
planner            planner name (filled in by :func:`run_episodes`)
seed               the scene seed (``wmplan.sim.spawn.initial_state(params, [seed])``)
collision          the ego's footprint overlapped another vehicle's before the episode ended
offroad            a corner of the ego left the lanes before the episode ended
success            the ego reached its goal (goal x in a goal lane) without a collision or leaving the road
progress_m         ego x at the end of the episode minus ego x at the start
mean_speed_mps     mean ego speed over the steps of the episode
min_clearance_m    smallest distance between the ego's and another vehicle's footprint, as axis-aligned boxes
                   (negative: overlap depth); ``inf`` if no other vehicle was present
min_ttc_s          smallest time-to-collision to the vehicle ahead in the ego's path (gap over closing speed,
                   constant speeds; Hayward 1972); ``inf`` if the ego never closed in on anyone
max_brake_threat   largest deceleration the ego needed to avoid the vehicle or lane end ahead, over its braking
                   limit (``wmplan.sim.threat``; >= 1: its brakes alone could not), capped at 10
time_s             simulated time until the episode ended
=================  =========================================================================================

An episode ends at the first of: collision, leaving the road, reaching the goal (the engine's ``state.done``), or
after the scenario's duration. Outcomes certify nothing about a real vehicle: the traffic model is simplified.

Letters in shapes: S scenes (episodes), V vehicle slots.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from wmplan.errors import ConfigError
from wmplan.scenario import Scenario, load_scenario
from wmplan.sim.ego_rules import held_rule_policy
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.threat import brake_threat
from wmplan.sim.variants import VariantBatch, batch_classes, variant_chunks

PlannerFn = Callable[..., list[dict]]
"""``fn(scenario: Scenario, seeds: np.ndarray (S,) int64, **options) -> list[dict]`` (one row per seed)."""
Policy = Callable[[TrafficState], np.ndarray]
"""``policy(state) -> actions (S, 2)``: (accel_mps2, steer_rad) per scene."""

REQUIRED_KEYS = ("planner", "seed", "collision", "offroad", "success", "progress_m", "mean_speed_mps")
BOOL_KEYS = ("collision", "offroad", "success")
MAX_BATCH = 256
"""Episodes stepped together in one batch (bounds memory; results do not depend on it)."""

_PLANNERS: dict[str, PlannerFn] = {}


def register_planner(name: str, fn: PlannerFn, *, replace: bool = False) -> None:
    """Make an episode runner available under ``name`` to :func:`run_episodes`, sweeps and stress tests.

    Args:
        name: the planner's name as sweep files and the CLI spell it, e.g. ``"mpc+latent"``.
        fn: ``fn(scenario, seeds, **options) -> list[dict]``, one row per seed in seed order with at least the
            keys of ``REQUIRED_KEYS`` (``planner`` may be left out); a module-level function (see module notes).
        replace: allow replacing an existing registration (otherwise registering a taken name is an error).
    """
    if not isinstance(name, str) or not name.strip() or name != name.strip():
        raise ConfigError(f"planner name must be a non-empty string without surrounding spaces, got {name!r}")
    if not callable(fn):
        raise ConfigError(f"planner {name!r}: fn must be callable (scenario, seeds, **options) -> rows, got {fn!r}")
    if name in _PLANNERS and not replace and _PLANNERS[name] is not fn:
        raise ConfigError(f"planner {name!r} is already registered; pass replace=True to replace it")
    _PLANNERS[name] = fn


def unregister_planner(name: str) -> None:
    """Remove a registration (tests use this to clean up)."""
    _PLANNERS.pop(name, None)


def planner_names() -> list[str]:
    """Registered planner names, sorted."""
    return sorted(_PLANNERS)


def get_planner(name: str) -> PlannerFn:
    """The runner registered under ``name``; a one-line :class:`ConfigError` listing the known names if none."""
    try:
        return _PLANNERS[name]
    except KeyError:
        raise ConfigError(f"unknown planner {name!r}; known planners: {', '.join(planner_names())}") from None


# --- the shared closed loop -------------------------------------------------------------------------------------


def _clearance_and_ttc(state: TrafficState) -> tuple[np.ndarray, np.ndarray]:
    """Per scene: footprint clearance to the nearest other vehicle and time-to-collision to the one ahead, (S,).

    Footprints are taken as axis-aligned boxes (headings on a straight road stay small); the clearance is the
    Euclidean distance between the boxes, or minus the smaller overlap depth if they overlap.
    """
    dx = state.x_m - state.x_m[:, :1]  # (S, V)
    dy = state.y_m - state.y_m[:, :1]
    gap_x = np.abs(dx) - 0.5 * (state.length_m + state.length_m[:, :1])  # (S, V)
    gap_y = np.abs(dy) - 0.5 * (state.width_m + state.width_m[:, :1])
    apart = np.hypot(np.maximum(gap_x, 0.0), np.maximum(gap_y, 0.0))
    clearance = np.where((gap_x < 0) & (gap_y < 0), np.maximum(gap_x, gap_y), apart)
    other = state.valid.copy()
    other[:, EGO] = False
    clearance = np.where(other, clearance, np.inf).min(axis=1)
    ahead = other & (gap_y < 0) & (dx > 0)  # in the ego's path: lateral overlap, in front
    closing = state.vx_mps[:, :1] - state.vx_mps  # (S, V)
    with np.errstate(divide="ignore", invalid="ignore"):
        ttc = np.where(ahead & (closing > 0) & (gap_x > 0), gap_x / closing, np.inf)
    return clearance, ttc.min(axis=1)


def _closed_loop_batch(params: SimParams, seeds: np.ndarray, policy: Policy,
                       variants: VariantBatch) -> dict[str, np.ndarray]:
    """Columns of one batch of episodes; ``params`` is the first variant's (the road and limits all share)."""
    state = variants.initial_state(seeds)
    s_n = state.num_scenes
    x0 = state.x_m[:, EGO].copy()
    x_end = x0.copy()
    flags = {k: np.zeros(s_n, dtype=bool) for k in ("collided", "offroad", "reached_goal")}
    speed_sum = np.zeros(s_n)
    steps = np.zeros(s_n, dtype=np.int64)
    clearance, ttc = _clearance_and_ttc(state)
    threat = brake_threat(state, params)
    running = np.ones(s_n, dtype=bool)
    for _ in range(params.num_steps):
        actions = np.asarray(policy(state), dtype=np.float64)
        state, _info = variants.step(state, actions)
        speed_sum += np.where(running, state.ego_speed_mps, 0.0)
        steps += running
        c_now, t_now = _clearance_and_ttc(state)
        clearance = np.where(running, np.minimum(clearance, c_now), clearance)
        ttc = np.where(running, np.minimum(ttc, t_now), ttc)
        threat = np.where(running, np.maximum(threat, brake_threat(state, params)), threat)
        x_end = np.where(running, state.x_m[:, EGO], x_end)
        for key in flags:
            flags[key] = np.where(running, getattr(state, key), flags[key])
        running &= ~state.done
        if not running.any():
            break
    return {
        "seed": seeds.astype(np.int64),
        "collision": flags["collided"],
        "offroad": flags["offroad"],
        "success": flags["reached_goal"] & ~flags["collided"] & ~flags["offroad"],
        "progress_m": x_end - x0,
        "mean_speed_mps": speed_sum / np.maximum(steps, 1),
        "min_clearance_m": clearance,
        "min_ttc_s": ttc,
        "max_brake_threat": threat,
        "time_s": steps * params.dt_s,
    }


def closed_loop(scenario: Scenario, seeds: Sequence[int] | np.ndarray,
                make_policy: Callable[[SimParams], Policy]) -> list[dict]:
    """Run one episode per seed with a policy in the true simulator and return one row per episode.

    Args:
        scenario: the scenario to drive in.
        seeds: scene seeds, shape (S,).
        make_policy: ``make_policy(params) -> policy``; called once per batch of at most ``MAX_BATCH`` scenes, so
            a stateful policy starts fresh with every batch. ``policy(state) -> actions (S, 2)``.

    Returns:
        Rows with the keys of the module table except ``planner``, in the order of ``seeds``.
    """
    return closed_loop_variants([scenario], [seeds], make_policy)[0]


def closed_loop_variants(scenarios: Sequence[Scenario], seeds: Sequence[Sequence[int] | np.ndarray],
                         make_policy: Callable[[SimParams], Policy]) -> list[list[dict]]:
    """:func:`closed_loop` for several scenario variants, ``seeds[g]`` in ``scenarios[g]``; rows per variant.

    Variants that may share a batch (``wmplan.sim.variants.batch_classes``: they differ only in traffic, drivers
    and the ego's start) run together, up to ``MAX_BATCH`` scenes at a time, each scene with its own variant's
    numbers; the rows are those :func:`closed_loop` gives variant by variant (a policy that reads ``params`` sees
    the first variant's road and limits, which the class shares, and its merge zone, which ``also`` makes the class
    share: the rule-based ego reads it)."""
    seeds = [np.asarray(s, dtype=np.int64).reshape(-1) for s in seeds]
    out: list[list[dict]] = [[] for _ in scenarios]
    for members in batch_classes(list(scenarios), also=lambda scn: scn.drivers.merge_zone_m):
        all_params = [SimParams.from_scenario(scenarios[g]) for g in members]
        for batch, part, owner, _index in variant_chunks(all_params, [seeds[g] for g in members], MAX_BATCH):
            first = batch.params[0]
            cols = _closed_loop_batch(first, part, make_policy(first), batch)
            for i, k in enumerate(owner):
                out[members[int(k)]].append({key: v[i].item() for key, v in cols.items()})
    return out


def _rules_policy(params: SimParams) -> Policy:
    # decides every 0.2 s and holds the action, like the "rules" row of ``wmplan evaluate``
    return held_rule_policy(params)


def rules_episodes(scenario: Scenario, seeds: Sequence[int] | np.ndarray, **options: Any) -> list[dict]:
    """The built-in ``"rules"`` planner: the rule-based ego (IDM + MOBIL + merge rule) of ``wmplan.sim.ego_rules``.

    It takes no options; any given is refused.
    """
    if options:
        raise ConfigError(f"planner 'rules' takes no options, got {sorted(options)}")
    return closed_loop(scenario, seeds, _rules_policy)


def _rules_variants(scenarios: list[Scenario], seeds: list, **options: Any) -> list[list[dict]]:
    """The ``"rules"`` planner in several variants at once (``call_planner_variants``; stress tests)."""
    if options:
        raise ConfigError(f"planner 'rules' takes no options, got {sorted(options)}")
    return closed_loop_variants(scenarios, seeds, _rules_policy)


rules_episodes.run_variants = _rules_variants  # type: ignore[attr-defined]
register_planner("rules", rules_episodes)


# --- the public entry point ---------------------------------------------------------------------------------------


def _check_rows(name: str, rows: object, seeds: np.ndarray) -> list[dict]:
    """Validate a runner's output at the boundary: one row per seed, in order, with the required keys."""
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise ConfigError(f"planner {name!r} must return a list of dicts (one per seed), got {type(rows).__name__}")
    if len(rows) != len(seeds):
        raise ConfigError(f"planner {name!r} returned {len(rows)} rows for {len(seeds)} seeds; return one per seed")
    out = []
    for i, (row, seed) in enumerate(zip(rows, seeds, strict=True)):
        missing = [k for k in REQUIRED_KEYS if k not in row and k != "planner"]
        if missing:
            raise ConfigError(f"planner {name!r}: row {i} lacks key(s) {missing}; every row needs {list(REQUIRED_KEYS)}")
        if int(row["seed"]) != int(seed):
            raise ConfigError(f"planner {name!r}: row {i} has seed {row['seed']} but seeds[{i}] is {int(seed)}; "
                              "return rows in the order of the seeds")
        clean: dict[str, Any] = {"planner": name, "seed": int(seed)}
        for key, value in row.items():
            if key in ("planner", "seed"):
                continue
            if isinstance(value, np.generic):
                value = value.item()
            clean[key] = bool(value) if key in BOOL_KEYS else value
        for key in ("progress_m", "mean_speed_mps"):
            if not isinstance(clean[key], (int, float)) or math.isnan(clean[key]):
                raise ConfigError(f"planner {name!r}: row {i} has {key} = {clean[key]!r}; it must be a number")
        out.append(clean)
    return out


def call_planner(name: str, fn: PlannerFn, scenario: Scenario, seeds: Sequence[int] | np.ndarray,
                 options: dict[str, Any] | None = None) -> list[dict]:
    """Run an already-resolved runner and check its rows (what sweep workers call)."""
    seeds = np.asarray(seeds, dtype=np.int64).reshape(-1)
    return _check_rows(name, fn(scenario, seeds, **(options or {})), seeds)


def call_planner_variants(name: str, fn: PlannerFn, scenarios: Sequence[Scenario],
                          seeds: Sequence[Sequence[int] | np.ndarray],
                          options: dict[str, Any] | None = None) -> list[list[dict]]:
    """Episodes of one runner in several scenario variants, ``seeds[g]`` in ``scenarios[g]``; checked rows per
    variant. A runner that carries a ``run_variants(scenarios, seeds, **options)`` attribute (the sampling
    planners do) runs them all in shared batches; any other runner is called once per variant. Either way the rows
    are those of :func:`call_planner` variant by variant."""
    seeds = [np.asarray(s, dtype=np.int64).reshape(-1) for s in seeds]
    multi = getattr(fn, "run_variants", None)
    if multi is None or len(scenarios) < 2:
        return [call_planner(name, fn, scn, s, options) for scn, s in zip(scenarios, seeds, strict=True)]
    groups = multi(list(scenarios), seeds, **(options or {}))
    if not isinstance(groups, list) or len(groups) != len(seeds):
        raise ConfigError(f"planner {name!r}: run_variants returned {type(groups).__name__} for {len(seeds)} "
                          "variants; expected one list of rows per variant")
    return [_check_rows(name, rows, s) for rows, s in zip(groups, seeds, strict=True)]


def run_episodes(scenario: Scenario | str | Path, planner: str, seeds: Sequence[int] | np.ndarray,
                 **kw: Any) -> list[dict]:
    """Closed-loop episodes of ``planner`` in ``scenario``, one per seed, batched.

    Args:
        scenario: a :class:`~wmplan.scenario.Scenario`, a built-in scenario name or a scenario file.
        planner: a registered planner name (``planner_names()``); ``"rules"`` is built in.
        seeds: scene seeds, shape (S,).
        **kw: options passed on to the planner's runner.

    Returns:
        One dict per episode, in seed order, with at least ``REQUIRED_KEYS`` (see the module table).
    """
    fn = get_planner(planner)
    scn = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    return call_planner(planner, fn, scn, seeds, kw)
