"""Closed-loop evaluation: planners drive the ego in the true simulator, many episodes per batch.

Every planner meets the same episodes (the same scene seeds: a paired comparison). A batch of episodes runs as one
simulator state and one planner call per decision; finished episodes drop out of the planner's batch.

Per-episode rows (keys): planner, episode, seed, collision, contact_side (the side of the ego touched in a
collision: front, rear, left or right, empty without one; :func:`wmplan.sim.engine.contact_sides`), offroad,
success (goal reached without collision or leaving the road), outcome (how the episode ended, one of OUTCOMES: 'collision', 'offroad', 'goal', or 'timeout'
when the time ran out first; a collision outranks leaving the road in the same step), final_lane (the lane holding
the ego's centre when the episode ended), in_goal_lane (whether that lane is one of the goal's lanes: a timeout
outside them is a stall before the merge, a timeout inside them is slow progress after it), progress_m,
mean_speed_mps, min_ttc_s (smallest time to collision with the vehicle ahead in the ego's path over the episode),
rms_jerk_mps3, decision_ms (planner wall time per decision, divided among the episodes of the batch), decisions.

Calibration records: at every decision of a risk-predicting planner, the predicted probability that the chosen plan
collides within its horizon, beside whether the ego then collided within that horizon.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import torch

from wmplan.data.collect import episode_seeds
from wmplan.errors import ConfigError
from wmplan.model.baselines import ConstantVelocity
from wmplan.model.checkpoint import load_model
from wmplan.model.ego import EgoKinematics
from wmplan.plan.mpc import PlannerConfig, SamplingPlanner
from wmplan.plan.predictors import ModelPredictor, OraclePredictor, make_context
from wmplan.plan.risk import ttc_to_leader_s
from wmplan.scenario import Scenario
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.engine import contact_sides, step
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.threat import brake_threat
from wmplan.sim.tilt import EventTilt
from wmplan.sim.variants import VariantBatch, batch_classes, variant_chunks

PLANNER_NAMES = ("rules", "mpc+latent", "mpc+deterministic", "mpc+constant-velocity", "mpc+oracle")
OUTCOMES = ("goal", "collision", "offroad", "timeout")
HISTORY = 5
NUM_OBJECTS = 8


@dataclass
class EvalOutput:
    """Rows of one planner's episodes and its calibration records."""

    rows: list[dict] = field(default_factory=list)
    predicted: list[float] = field(default_factory=list)
    happened: list[int] = field(default_factory=list)
    decision_ms: list[float] = field(default_factory=list)


def build_planner(name: str, params: SimParams, *, model_dir=None, deterministic_dir=None,
                  cfg: PlannerConfig | None = None):
    """A planner by name (see PLANNER_NAMES): None for 'rules', else a SamplingPlanner."""
    if name not in PLANNER_NAMES:
        raise ConfigError(f"unknown planner {name!r}; choose from {', '.join(PLANNER_NAMES)}")
    if name == "rules":
        return None
    cfg = cfg or PlannerConfig()
    ego = EgoKinematics.from_scenario(params.scenario, cfg.plan_dt_s)
    kind = name.split("+", 1)[1]
    if kind == "oracle":
        return SamplingPlanner(cfg, params, OraclePredictor(params, ego, cfg.plan_dt_s), ego)
    if kind == "latent":
        if model_dir is None:
            raise ConfigError("planner mpc+latent needs --model MODEL_DIR (a latent model from `wmplan train`)")
        model, _ = load_model(model_dir)
        return SamplingPlanner(cfg, params, ModelPredictor(model, "latent"), ego)
    if kind == "deterministic":
        if deterministic_dir is None:
            raise ConfigError("planner mpc+deterministic needs --deterministic DIR (from `wmplan train --deterministic`)")
        model, _ = load_model(deterministic_dir)
        return SamplingPlanner(cfg, params, ModelPredictor(model, "deterministic"), ego)
    from wmplan.model.config import ModelConfig

    mcfg = ModelConfig(history=HISTORY, horizon=cfg.horizon, num_objects=NUM_OBJECTS, plan_dt_s=cfg.plan_dt_s)
    if model_dir is not None:
        mcfg = load_model(model_dir)[0].cfg
    return SamplingPlanner(cfg, params, ModelPredictor(ConstantVelocity(mcfg, ego), "constant-velocity"), ego)


def _initial_history(state: TrafficState, history: int, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
    """History buffers (S, W, V, F) and ids at the start: positions extrapolated backwards at constant velocity."""
    rows = state.vehicles()
    back = np.arange(history - 1, -1, -1)[None, :, None] * dt_s  # (1, W, 1)
    hist = np.repeat(rows[:, None], history, axis=1)
    hist[..., 0] -= hist[..., 2] * back
    hist[..., 1] -= hist[..., 3] * back
    ids = np.repeat(state.vehicle_id[:, None], history, axis=1)
    return hist, ids


def run_batch(params: SimParams, planner_name: str, planner, seeds: np.ndarray, *, seed: int,
              progress: Callable[[int], None] | None = None, num_objects: int = NUM_OBJECTS,
              history: int = HISTORY, frames: list | None = None,
              variants: VariantBatch | None = None) -> EvalOutput:
    """Run one batch of episodes (one per seed) with one planner.

    ``frames``: if given, the world rows (S, V, F) of every simulator step are appended to it (for animations).
    ``variants``: scenes of several scenario variants (``wmplan.sim.variants``), seeds in its group order;
    ``params`` is then the first variant's (the road and limits the planner sees are the same in all).
    """
    out = EvalOutput()
    cfg = planner.cfg if planner is not None else PlannerConfig()
    sub = int(round(cfg.plan_dt_s / params.dt_s))
    n_dec = params.num_steps // sub
    state = initial_state(params, seeds) if variants is None else variants.initial_state(seeds)
    e_n = state.num_scenes
    hist, ids = _initial_history(state, history, cfg.plan_dt_s)
    x0 = state.x_m[:, EGO].copy()
    speed_sum = np.zeros(e_n)
    steps = np.zeros(e_n, dtype=np.int64)
    min_ttc = np.full(e_n, np.inf)
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
    contact = [""] * e_n  # side of the ego touched in a collision (wmplan.sim.engine.contact_sides)
    dec_ms = np.zeros(e_n)
    tilted = params.tilt is not None and params.tilt.active
    log_w = np.zeros(e_n)  # log f/g of the tilted draws while the episode runs (wmplan.sim.tilt)
    pred_log: list[tuple[np.ndarray, int, np.ndarray]] = []
    # one generator per episode, from (evaluation seed, scene seed): an episode's result does not depend on the
    # batch it runs in
    gens = [torch.Generator().manual_seed(int(np.random.SeedSequence([seed, 0xE7A1, int(s)]).generate_state(1)[0]))
            for s in seeds]
    if planner is not None:
        planner.reset(e_n)
    for t in range(n_dec):
        active = ~state.done
        if not active.any():
            break
        act_idx = np.nonzero(active)[0]
        t0 = time.perf_counter()
        if planner is None:
            actions = rule_actions(state, params)
        else:
            ctx = make_context(params, state.take(act_idx), hist[act_idx], ids[act_idx], num_objects)
            res = planner.plan(ctx, generator=[gens[i] for i in act_idx], rows=act_idx)
            actions = np.zeros((e_n, 2))
            actions[act_idx] = res.action
            pred_log.append((act_idx, t, res.p_collision))
        elapsed_ms = (time.perf_counter() - t0) * 1e3
        out.decision_ms.append(elapsed_ms / len(act_idx))
        dec_ms[act_idx] += elapsed_ms / len(act_idx)
        for _ in range(sub):
            was_done = state.done
            before = state
            state, info = step(state, actions, params) if variants is None else variants.step(state, actions)
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
        rows_now = state.vehicles()
        ttc = ttc_to_leader_s(torch.from_numpy(rows_now[:, None])).numpy()[:, 0]
        min_ttc = np.where(active, np.minimum(min_ttc, ttc), min_ttc)
        threat = np.where(active, np.maximum(threat, brake_threat(state, params)), threat)
        hist = np.concatenate([hist[:, 1:], rows_now[:, None]], axis=1)
        ids = np.concatenate([ids[:, 1:], state.vehicle_id[:, None]], axis=1)
        if progress is not None:
            progress(1)
    horizon = cfg.horizon
    for act_idx, t, p in pred_log:
        c = coll_dec[act_idx]
        happened = (c > t) & (c <= t + horizon)
        out.predicted.extend(p.tolist())
        out.happened.extend(happened.astype(int).tolist())
    fin_x = np.where(np.isnan(fin_x), state.x_m[:, EGO], fin_x)
    fin_y = np.where(np.isnan(fin_y), state.y_m[:, EGO], fin_y)
    final_lane = params.lane_of(fin_y)
    in_goal = params.goal_lane_mask[final_lane]
    outcome = np.where(fin_coll, "collision", np.where(fin_off, "offroad", np.where(fin_goal, "goal", "timeout")))
    for i in range(e_n):
        out.rows.append({
            "planner": planner_name,
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
            "min_ttc_s": float(min_ttc[i]),
            "max_brake_threat": float(threat[i]),
            "rms_jerk_mps3": float(np.sqrt(jerk_sq[i] / max(1, steps[i]))),
            "decision_ms": float(dec_ms[i] / max(1, end_dec[i])),
            "decisions": int(end_dec[i]),
        })
        if tilted:  # importance weight of the episode: E_tilted[failure * weight] = P_nominal(failure)
            out.rows[-1]["log_weight"] = float(log_w[i])
    return out


def record_episode(scenario: Scenario, planner_name: str, seed: int, *, model_dir=None, deterministic_dir=None,
                   planner_cfg: PlannerConfig | None = None, eval_seed: int = 0) -> tuple[np.ndarray, dict]:
    """World rows (T, V, F) of one closed-loop episode (scene seed ``seed``) and its outcome row.

    ``eval_seed`` seeds the planner's sampling as the ``seed`` of :func:`evaluate_seeds` does (sweeps and stress
    tests run with 0): with the same value the recorded episode is the one those runs saw."""
    params = SimParams.from_scenario(scenario)
    planner = build_planner(planner_name, params, model_dir=model_dir, deterministic_dir=deterministic_dir,
                            cfg=planner_cfg)
    state0 = initial_state(params, [seed])
    frames: list[np.ndarray] = [state0.vehicles()]
    out = run_batch(params, planner_name, planner, np.array([seed]), seed=eval_seed, frames=frames)
    row = out.rows[0]
    steps = int(round(row["decisions"] * (planner.cfg.plan_dt_s if planner is not None else 0.2) / params.dt_s))
    return np.stack(frames)[: steps + 1, 0], row


def evaluate_seeds(scenario: Scenario, planner_name: str, seeds: np.ndarray, *, seed: int = 0, model_dir=None,
                   deterministic_dir=None, planner_cfg: PlannerConfig | None = None, batch_size: int = 50,
                   progress: Callable[[int], None] | None = None, tilt: EventTilt | None = None) -> EvalOutput:
    """Episodes of one planner for the given scene seeds, in batches of ``batch_size``.

    ``tilt`` runs the episodes with the random events near the ego made more likely (importance sampling,
    :mod:`wmplan.sim.tilt`); each row then carries its ``log_weight``. Planners and the oracle see the nominal
    scenario."""
    params = SimParams.from_scenario(scenario).with_tilt(tilt)
    planner = build_planner(planner_name, params, model_dir=model_dir, deterministic_dir=deterministic_dir,
                            cfg=planner_cfg)
    seeds = np.asarray(seeds, dtype=np.int64)
    total = EvalOutput()
    for start in range(0, len(seeds), batch_size):
        part = run_batch(params, planner_name, planner, seeds[start:start + batch_size], seed=seed,
                         progress=progress)
        for r, e in zip(part.rows, range(start, start + len(part.rows)), strict=True):
            r["episode"] = e
            r["time_s"] = r["decisions"] * (planner.cfg.plan_dt_s if planner is not None else PlannerConfig().plan_dt_s)
        total.rows += part.rows
        total.predicted += part.predicted
        total.happened += part.happened
        total.decision_ms += part.decision_ms
    return total


def evaluate_variants(scenarios: Sequence[Scenario], seeds: Sequence[np.ndarray], planner_name: str, *,
                      seed: int = 0, model_dir=None, deterministic_dir=None,
                      planner_cfg: PlannerConfig | None = None, batch_size: int = 50,
                      progress: Callable[[int], None] | None = None) -> list[list[dict]]:
    """Episodes of one planner in several variants of a scenario: ``seeds[g]`` in ``scenarios[g]``; rows per
    variant, in seed order, the same as :func:`evaluate_seeds` gives variant by variant.

    Episodes of different variants share planner batches (``wmplan.sim.variants``) when the variants differ only in
    traffic, drivers and the ego's start: a stress test's hundreds of variants with a few episodes each then cost
    about what as many episodes of one scenario cost. Otherwise (and for ``mpc+oracle``, whose futures are drawn
    from its own scenario's distributions) each variant runs on its own.
    """
    if len(scenarios) != len(seeds):
        raise ConfigError(f"evaluate_variants: {len(scenarios)} scenarios but {len(seeds)} seed lists")
    seeds = [np.asarray(s, dtype=np.int64).reshape(-1) for s in seeds]
    kw = dict(seed=seed, model_dir=model_dir, deterministic_dir=deterministic_dir, planner_cfg=planner_cfg,
              batch_size=batch_size, progress=progress)
    if planner_name == "mpc+oracle":
        return [evaluate_seeds(scn, planner_name, s, **kw).rows for scn, s in zip(scenarios, seeds, strict=True)]
    classes = batch_classes(list(scenarios))
    if len(classes) > 1 and len(classes) == len(scenarios):  # no two variants can share a batch
        return [evaluate_seeds(scn, planner_name, s, **kw).rows for scn, s in zip(scenarios, seeds, strict=True)]
    if len(classes) > 1:  # e.g. variants of the ego's braking limit: each class shares batches on its own
        out: list[list[dict]] = [[] for _ in scenarios]
        for members in classes:
            rows_c = evaluate_variants([scenarios[g] for g in members], [seeds[g] for g in members], planner_name,
                                       **kw)
            for g, r in zip(members, rows_c, strict=True):
                out[g] = r
        return out
    all_params = [SimParams.from_scenario(scn) for scn in scenarios]
    planner = build_planner(planner_name, all_params[0], model_dir=model_dir, deterministic_dir=deterministic_dir,
                            cfg=planner_cfg)
    plan_dt = planner.cfg.plan_dt_s if planner is not None else PlannerConfig().plan_dt_s
    rows: list[list[dict | None]] = [[None] * len(s) for s in seeds]
    for batch, part_seeds, owner, index in variant_chunks(all_params, seeds, batch_size):
        out = run_batch(batch.params[0], planner_name, planner, part_seeds, seed=seed, progress=progress,
                        variants=batch)
        for r, g, e in zip(out.rows, owner, index, strict=True):
            r["episode"] = int(e)
            r["time_s"] = r["decisions"] * plan_dt
            rows[int(g)][int(e)] = r
    return rows  # type: ignore[return-value]


def evaluate_planner(scenario: Scenario, planner_name: str, *, episodes: int, seed: int = 0, model_dir=None,
                     deterministic_dir=None, planner_cfg: PlannerConfig | None = None, batch_size: int = 50,
                     progress: Callable[[int], None] | None = None) -> EvalOutput:
    """All episodes of one planner, in batches; episode e uses scene seed ``episode_seeds(seed, episodes)[e]``
    (the same for every planner: a paired comparison)."""
    return evaluate_seeds(scenario, planner_name, episode_seeds(seed, episodes), seed=seed, model_dir=model_dir,
                          deterministic_dir=deterministic_dir, planner_cfg=planner_cfg, batch_size=batch_size,
                          progress=progress)
