"""The one closed loop: any planner drives the ego in the true simulator, many episodes per batch.

``evaluate``, sweep cells and stress tasks all run their episodes through :func:`run_episodes`. A planner is a
:class:`wmplan.plan.base.Planner` built from a spec of the registry (:mod:`wmplan.evaluate.planners`): a built-in
name or an import path. Every episode gives one row of :data:`wmplan.evaluate.rows.COLUMNS`.

Every planner meets the same episodes (the same scene seeds: a paired comparison). A batch of episodes runs as one
simulator state and one planner call per decision; finished episodes drop out of the planner's batch. Episodes of
several scenario variants share batches when the simulator allows it (:mod:`wmplan.sim.variants`) and the
planner's entry says it reads nothing the variants differ in (``PlannerEntry.batch_key``). Each episode's planner
randomness comes from a key made of the run's ``seed`` and the scene seed, so its row does not depend on the batch
it runs in, the batch size, or the other variants in the batch.

Calibration records: at every decision of a planner that predicts risk, the predicted probability that the chosen
plan collides within its horizon, beside whether the ego then collided within that horizon.

Shapes: S scenes (episodes) of a batch, V vehicle slots, F world-row features.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from wmplan.data.collect import episode_seeds
from wmplan.errors import ConfigError
from wmplan.evaluate.planners import make_planner, resolve_planner, split_run_options
from wmplan.evaluate.rows import clearance_and_ttc, is_near_miss
from wmplan.plan.base import HISTORY_STEPS, Decision, Observation, Planner
from wmplan.scenario import Scenario
from wmplan.sim.engine import contact_sides
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.threat import brake_threat
from wmplan.sim.tilt import EventTilt
from wmplan.sim.variants import VariantBatch, batch_classes, variant_chunks

OUTCOMES = ("goal", "collision", "offroad", "timeout")
DEFAULT_BATCH = 50
"""Episodes planned together by default (bounds memory; results do not depend on it)."""
KEY_SALT = 0xE7A1


@dataclass
class EvalOutput:
    """Rows of one planner's episodes and its calibration records (predicted P(collision), collided or not)."""

    rows: list[dict] = field(default_factory=list)
    predicted: list[float] = field(default_factory=list)
    happened: list[int] = field(default_factory=list)
    decision_ms: list[float] = field(default_factory=list)

    def extend(self, other: EvalOutput) -> None:
        """Append another output's rows and records."""
        self.rows += other.rows
        self.predicted += other.predicted
        self.happened += other.happened
        self.decision_ms += other.decision_ms


def episode_keys(seed: int, scene_seeds: np.ndarray) -> np.ndarray:
    """(S,) int64 keys of the planner's randomness, one per episode, from the run's seed and the scene seeds."""
    return np.array(
        [
            np.random.SeedSequence([int(seed), KEY_SALT, int(s)]).generate_state(1)[0]
            for s in np.asarray(scene_seeds).reshape(-1)
        ],
        dtype=np.int64,
    )


def initial_history(state: TrafficState, history: int, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
    """History buffers (S, W, V, F) and ids (S, W, V) at the start: positions extrapolated backwards at constant
    velocity over W decisions of ``dt_s`` seconds."""
    rows = state.vehicles()
    back = np.arange(history - 1, -1, -1)[None, :, None] * dt_s  # (1, W, 1)
    hist = np.repeat(rows[:, None], history, axis=1)
    hist[..., 0] -= hist[..., 2] * back
    hist[..., 1] -= hist[..., 3] * back
    ids = np.repeat(state.vehicle_id[:, None], history, axis=1)
    return hist, ids


def _checked(decision: object, name: str, b: int) -> tuple[np.ndarray, np.ndarray | None]:
    """The actions (B, 2) and P(collision) (B,) or None of a planner's decision, or a one-line ConfigError."""
    if not isinstance(decision, Decision):
        raise ConfigError(
            f"planner {name!r}: decide() returned {type(decision).__name__}; return a wmplan.plan.base.Decision"
        )
    actions = np.asarray(decision.actions, dtype=np.float64)
    if actions.shape != (b, 2) or not np.isfinite(actions).all():
        raise ConfigError(
            f"planner {name!r}: decide() returned actions of shape {actions.shape} (finite: "
            f"{bool(np.isfinite(actions).all())}); expected finite (B, 2) = ({b}, 2)"
        )
    p = decision.p_collision
    if p is not None:
        p = np.asarray(p, dtype=np.float64)
        if p.shape != (b,):
            raise ConfigError(f"planner {name!r}: p_collision has shape {p.shape}; expected ({b},)")
    return actions, p


def run_batch(
    params: SimParams,
    planner: Planner,
    seeds: np.ndarray,
    *,
    seed: int = 0,
    name: str = "",
    progress: Callable[[int], None] | None = None,
    frames: list | None = None,
    variants: VariantBatch | None = None,
) -> EvalOutput:
    """Run one batch of episodes (one per scene seed) with one planner; rows without ``episode``.

    Args:
        params: the scenario's arrays (with variants: the first variant's; the planner sees these).
        planner: a built planner (:func:`wmplan.evaluate.planners.make_planner`).
        seeds: (S,) scene seeds.
        seed: the run's seed (with the scene seed it keys each episode's planner randomness).
        name: the planner's spec, written into the rows.
        progress: called with 1 after every decision.
        frames: if given, the world rows (S, V, F) of every simulator step are appended to it (animations).
        variants: scenes of several scenario variants (``wmplan.sim.variants``), seeds in its group order.
    """
    seeds = np.asarray(seeds, dtype=np.int64).reshape(-1)
    out = EvalOutput()
    sub = int(round(planner.decision_dt_s / params.dt_s))
    n_dec = params.num_steps // sub
    batch = variants if variants is not None else VariantBatch.single(params, len(seeds))
    state = batch.initial_state(seeds)
    e_n = state.num_scenes
    hist, ids = initial_history(state, int(getattr(planner, "history_steps", HISTORY_STEPS)), planner.decision_dt_s)
    x0 = state.x_m[:, EGO].copy()
    speed_sum = np.zeros(e_n)
    steps = np.zeros(e_n, dtype=np.int64)
    clearance, ttc = clearance_and_ttc(state)
    threat = brake_threat(state, params)  # with the first variant's braking limit (shared by a variant batch)
    jerk_sq = np.zeros(e_n)
    prev_acc = np.full(e_n, np.nan)
    end_dec = np.full(e_n, n_dec, dtype=np.int64)
    coll_dec = np.full(e_n, -1, dtype=np.int64)
    # outcome frozen at the step an episode ends (the engine keeps stepping finished scenes with the others)
    fin_coll = np.zeros(e_n, dtype=bool)
    fin_off = np.zeros(e_n, dtype=bool)
    fin_goal = np.zeros(e_n, dtype=bool)
    fin_x = np.full(e_n, np.nan)
    fin_y = np.full(e_n, np.nan)
    contact = [""] * e_n
    dec_ms = np.zeros(e_n)
    tilted = params.tilt is not None and params.tilt.active
    log_w = np.zeros(e_n)  # log f/g of the tilted draws while the episode runs (wmplan.sim.tilt)
    pred_log: list[tuple[np.ndarray, int, np.ndarray]] = []
    planner.reset(episode_keys(seed, seeds))
    for t in range(n_dec):
        active = ~state.done
        if not active.any():
            break
        act_idx = np.nonzero(active)[0]
        t0 = time.perf_counter()
        obs = Observation(
            params=params,
            state=state.take(act_idx),
            rows=act_idx,
            history=hist[act_idx],
            history_ids=ids[act_idx],
            time_s=t * planner.decision_dt_s,
        )
        act, p_coll = _checked(planner.decide(obs), name, len(act_idx))
        actions = np.zeros((e_n, 2))
        actions[act_idx] = act
        if p_coll is not None:
            pred_log.append((act_idx, t, p_coll))
        elapsed_ms = (time.perf_counter() - t0) * 1e3
        out.decision_ms.append(elapsed_ms / len(act_idx))
        dec_ms[act_idx] += elapsed_ms / len(act_idx)
        for _ in range(sub):
            was_done = state.done
            before = state
            state, info = batch.step(state, actions)
            if frames is not None:
                frames.append(state.vehicles())
            live = ~was_done
            if tilted:
                log_w += np.where(live, info.log_weight, 0.0)
            speed_sum += np.where(live, state.ego_speed_mps, 0.0)
            steps += live
            acc = info.accel_mps2[:, EGO]
            jerk = np.where(np.isnan(prev_acc), 0.0, (acc - prev_acc) / params.dt_s)
            jerk_sq += np.where(live, jerk**2, 0.0)
            prev_acc = acc
            c_now, t_now = clearance_and_ttc(state)
            clearance = np.where(live, np.minimum(clearance, c_now), clearance)
            ttc = np.where(live, np.minimum(ttc, t_now), ttc)
            threat = np.where(live, np.maximum(threat, brake_threat(state, params)), threat)
            newly = live & state.done
            end_dec = np.where(newly, t + 1, end_dec)
            fin_coll |= newly & state.collided
            hit_now = np.nonzero(newly & state.collided)[0]
            for i, side in zip(hit_now, contact_sides(state, hit_now, before), strict=True):
                contact[i] = side
            fin_off |= newly & state.offroad
            fin_goal |= newly & state.reached_goal
            fin_x = np.where(newly, state.x_m[:, EGO], fin_x)
            fin_y = np.where(newly, state.y_m[:, EGO], fin_y)
            # calibration compares predicted collision with other vehicles to collisions (not leaving the road)
            coll_dec = np.where(live & state.collided & (coll_dec < 0), t + 1, coll_dec)
        hist = np.concatenate([hist[:, 1:], state.vehicles()[:, None]], axis=1)
        ids = np.concatenate([ids[:, 1:], state.vehicle_id[:, None]], axis=1)
        if progress is not None:
            progress(1)
    horizon = int(planner.horizon_decisions)
    for idx, t, p in pred_log:
        c = coll_dec[idx]
        out.predicted.extend(p.tolist())
        out.happened.extend(((c > t) & (c <= t + horizon)).astype(int).tolist())
    fin_x = np.where(np.isnan(fin_x), state.x_m[:, EGO], fin_x)
    fin_y = np.where(np.isnan(fin_y), state.y_m[:, EGO], fin_y)
    final_lane = params.lane_of(fin_y)
    in_goal = params.goal_lane_mask[final_lane]
    outcome = np.where(fin_coll, "collision", np.where(fin_off, "offroad", np.where(fin_goal, "goal", "timeout")))
    near = is_near_miss(ttc, threat, fin_coll)
    for i in range(e_n):
        row = {
            "planner": name,
            "seed": int(seeds[i]),
            "collision": bool(fin_coll[i]),
            "contact_side": contact[i],
            "offroad": bool(fin_off[i]),
            "success": bool(fin_goal[i] and not fin_coll[i] and not fin_off[i]),
            "outcome": str(outcome[i]),
            "final_lane": int(final_lane[i]),
            "in_goal_lane": bool(in_goal[i]),
            "progress_m": float(fin_x[i] - x0[i]),
            "mean_speed_mps": float(speed_sum[i] / max(1, steps[i])),
            "min_clearance_m": float(clearance[i]),
            "min_ttc_s": float(ttc[i]),
            "max_brake_threat": float(threat[i]),
            "near_miss": bool(near[i]),
            "rms_jerk_mps3": float(np.sqrt(jerk_sq[i] / max(1, steps[i]))),
            "decisions": int(end_dec[i]),
            "time_s": float(steps[i] * params.dt_s),
            "decision_ms": float(dec_ms[i] / max(1, end_dec[i])),
        }
        if tilted:  # importance weight of the episode: E_tilted[failure * weight] = P_nominal(failure)
            row["log_weight"] = float(log_w[i])
        out.rows.append(row)
    return out


def _as_seeds(seeds) -> np.ndarray:
    return np.asarray(seeds, dtype=np.int64).reshape(-1)


def run_episodes(
    scenarios: Sequence[Scenario],
    seeds: Sequence[Sequence[int] | np.ndarray],
    planner: str,
    *,
    options: dict[str, Any] | None = None,
    seed: int = 0,
    batch_size: int = DEFAULT_BATCH,
    progress: Callable[[int], None] | None = None,
    tilt: EventTilt | None = None,
) -> list[EvalOutput]:
    """Closed-loop episodes of one planner in one or more scenario variants: ``seeds[g]`` in ``scenarios[g]``.

    Args:
        scenarios: the variants (one scenario for a plain run).
        seeds: one array of scene seeds per variant.
        planner: a planner spec (:mod:`wmplan.evaluate.planners`).
        options: the planner's options; ``batch_size`` among them overrides the argument.
        seed: the run's seed (keys the planner's randomness with each scene seed).
        batch_size: episodes planned together (results do not depend on it).
        progress: called with 1 after every decision of every batch.
        tilt: run the random events near the ego more often (importance sampling, :mod:`wmplan.sim.tilt`); each
            row then carries its ``log_weight``. Planners and the oracle see the nominal scenario.

    Returns:
        One :class:`EvalOutput` per variant, rows in the order of its seeds with ``episode`` = their index.
        Variants that may share a batch (module docstring) run together, each scene with its own variant's
        numbers; the rows are the same as variant by variant.

    Raises:
        ConfigError: an unknown planner, bad options, mismatched lengths, or a planner breaking its protocol.
    """
    if len(scenarios) != len(seeds):
        raise ConfigError(f"run_episodes: {len(scenarios)} scenarios but {len(seeds)} seed lists")
    opts, run_opts = split_run_options(options)
    batch_size = int(run_opts.get("batch_size", batch_size))
    if batch_size < 1:
        raise ConfigError(f"batch_size must be >= 1, got {batch_size}")
    entry = resolve_planner(planner)
    seeds = [_as_seeds(s) for s in seeds]
    outs = [EvalOutput() for _ in scenarios]
    if entry.batch_key is None:
        classes = [[g] for g in range(len(scenarios))]
    else:
        classes = batch_classes(list(scenarios), also=entry.batch_key)
    for members in classes:
        all_params = [SimParams.from_scenario(scenarios[g]).with_tilt(tilt) for g in members]
        built = make_planner(planner, all_params[0], opts)
        rows: dict[int, list] = {g: [None] * len(seeds[g]) for g in members}
        for batch, part, owner, index in variant_chunks(all_params, [seeds[g] for g in members], batch_size):
            res = run_batch(batch.params[0], built, part, seed=seed, name=planner, progress=progress, variants=batch)
            for r, k, e in zip(res.rows, owner, index, strict=True):
                g = members[int(k)]
                rows[g][int(e)] = {"episode": int(e), **r}
            if len(members) == 1:  # calibration records per variant are kept only for unshared runs
                outs[members[0]].predicted += res.predicted
                outs[members[0]].happened += res.happened
            outs[members[0]].decision_ms += res.decision_ms
        for g in members:
            outs[g].rows = rows[g]
    return outs


def evaluate_seeds(
    scenario: Scenario,
    planner: str,
    seeds: Sequence[int] | np.ndarray,
    *,
    seed: int = 0,
    options: dict[str, Any] | None = None,
    batch_size: int = DEFAULT_BATCH,
    progress: Callable[[int], None] | None = None,
    tilt: EventTilt | None = None,
) -> EvalOutput:
    """Episodes of one planner in one scenario for the given scene seeds (:func:`run_episodes` of one variant)."""
    return run_episodes(
        [scenario], [seeds], planner, options=options, seed=seed, batch_size=batch_size, progress=progress, tilt=tilt
    )[0]


def evaluate_planner(
    scenario: Scenario,
    planner: str,
    *,
    episodes: int,
    seed: int = 0,
    options: dict[str, Any] | None = None,
    batch_size: int = DEFAULT_BATCH,
    progress: Callable[[int], None] | None = None,
) -> EvalOutput:
    """All episodes of one planner; episode e uses scene seed ``episode_seeds(seed, episodes)[e]`` (the same for
    every planner: a paired comparison)."""
    return evaluate_seeds(
        scenario,
        planner,
        episode_seeds(seed, episodes),
        seed=seed,
        options=options,
        batch_size=batch_size,
        progress=progress,
    )


def record_episode(
    scenario: Scenario, planner: str, seed: int, *, options: dict[str, Any] | None = None, eval_seed: int = 0
) -> tuple[np.ndarray, dict]:
    """World rows (T, V, F) of one closed-loop episode (scene seed ``seed``) and its row.

    ``eval_seed`` is the run's ``seed`` (sweeps and stress tests run with 0): with the same value the recorded
    episode is the one those runs saw."""
    params = SimParams.from_scenario(scenario)
    opts, _ = split_run_options(options)
    built = make_planner(planner, params, opts)
    frames: list[np.ndarray] = [initial_state_rows(params, seed)]
    row = run_batch(params, built, np.array([seed]), seed=eval_seed, name=planner, frames=frames).rows[0]
    steps = int(round(row["time_s"] / params.dt_s))
    return np.stack(frames)[: steps + 1, 0], {"episode": 0, **row}


def initial_state_rows(params: SimParams, seed: int) -> np.ndarray:
    """World rows (1, V, F) of the start of the scene ``seed``."""
    return VariantBatch.single(params, 1).initial_state(np.array([seed])).vehicles()


def evaluate_variants(
    scenarios: Sequence[Scenario],
    seeds: Sequence[Sequence[int] | np.ndarray],
    planner: str,
    *,
    seed: int = 0,
    options: dict[str, Any] | None = None,
    batch_size: int = DEFAULT_BATCH,
    progress: Callable[[int], None] | None = None,
) -> list[list[dict]]:
    """The rows of :func:`run_episodes` per variant (what stress tests need)."""
    outs = run_episodes(scenarios, seeds, planner, options=options, seed=seed, batch_size=batch_size, progress=progress)
    return [o.rows for o in outs]
