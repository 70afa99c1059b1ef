"""How well a predictor foresees the follower's reaction when the ego brakes: the decisions the planner's
``CostWeights.from_behind`` discount is about.

From held-out episodes driven by the rule-based ego (seeds that no dataset uses), it picks decision states with a
vehicle close behind the ego in its lane (a bumper gap in ``FOLLOWER_GAP_M``) at a speed of ``MIN_SPEED_MPS`` or
more, and gives every predictor the planner's three fixed longitudinal candidates in the ego's lane: keep the
speed, brake firmly (``wmplan.plan.mpc.FIRM_BRAKE_MPS2``) and brake as hard as the limits allow (steering from the
planner's own lane tracker). The reference is the oracle (the true simulator from the true state, drivers' traits
known, random events re-drawn: :class:`wmplan.plan.predictors.OraclePredictor`). Per predictor and plan:

=============================  ====================================================================================
key                            meaning
=============================  ====================================================================================
p_near_mean                    mean over states of the planner's P(near contact) (``summarise_risk``'s ``p_near``
                               with the planner's collision margin)
p_from_behind_mean             ... of the share of futures whose first near contact is being run into from behind
                               (``p_near_from_behind``: what ``CostWeights.from_behind`` discounts)
p_from_behind_abs_err          mean over states of |predicted - oracle| of that share
p_from_behind_false_alarm      share of states where the predictor's exceeds the oracle's by 0.5 or more
p_from_behind_missed           share of states where the oracle's exceeds the predictor's by 0.5 or more
follower_min_gap_m             mean over states of the mean over futures of the smallest bumper gap between the
                               follower and the ego over the horizon (signed: negative is overlap)
follower_min_gap_err_m         mean over states of (predicted - oracle) of that mean; ``..._abs_err_m`` its size
follower_end_speed_err_mps     mean over states of (predicted - oracle) follower speed at the horizon's end
=============================  ====================================================================================
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import torch

from wmplan.caution import CAUTION
from wmplan.data import collect, episode_seeds
from wmplan.data.manoeuvres import follower_gap_m
from wmplan.evaluate.planners import make_planner
from wmplan.model.assess import HELDOUT_SEED_BASE
from wmplan.plan.base import HISTORY_STEPS
from wmplan.plan.mpc import FIRM_BRAKE_MPS2, PlannerConfig
from wmplan.plan.predictors import NUM_OBJECTS, DecisionContext, OraclePredictor, Predictor, make_context
from wmplan.plan.risk import summarise_risk
from wmplan.scenario import Scenario, scenario_hash
from wmplan.sim.features import F_LENGTH, F_VALID, F_VX, F_VY, F_X, F_Y
from wmplan.sim.params import SimParams
from wmplan.sim.state import TrafficState

PLANS = ("keep-speed", "brake-firmly", "brake-fully")
FOLLOWER_GAP_M = (2.0, 30.0)
MIN_SPEED_MPS = 8.0
SNAPSHOT_EVERY = 5
"""Decisions between the snapshots of an episode taken as candidate states."""
FALSE_ALARM = 0.5


def reaction_states(
    params: SimParams, *, episodes: int, max_states: int, seed: int = 0
) -> tuple[TrafficState, np.ndarray, np.ndarray]:
    """Decision states with a follower close behind, from held-out rule-driven episodes.

    Returns:
        (state of S scenes, world rows (S, W, V, F) and identities (S, W, V) of the last W = HISTORY_STEPS
        decisions up to each state); S <= ``max_states``, drawn at random (seeded) among the states that qualify.
    """
    seeds = episode_seeds(HELDOUT_SEED_BASE + 500_000 + seed, episodes)
    snaps: dict[int, TrafficState] = {}
    first = HISTORY_STEPS - 1 + SNAPSHOT_EVERY

    def keep(t: int, state: TrafficState) -> None:
        if t >= first and (t - first) % SNAPSHOT_EVERY == 0:
            snaps[t] = state

    with np.errstate(all="ignore"):
        traj = collect(params, seeds, policy_mix=0.0, on_decision=keep)
    cands = []
    for t, st in snaps.items():
        gap = follower_gap_m(st.vehicles(), params)
        ok = (gap >= FOLLOWER_GAP_M[0]) & (gap <= FOLLOWER_GAP_M[1]) & (st.ego_speed_mps >= MIN_SPEED_MPS)
        ok &= traj.alive[:, t]
        cands += [(t, int(e)) for e in np.flatnonzero(ok)]
    if not cands:
        raise ValueError(f"{params.scenario.name}: no state with a follower within {FOLLOWER_GAP_M} m behind")
    rng = np.random.default_rng(seed)
    pick = [cands[i] for i in np.sort(rng.permutation(len(cands))[:max_states])]
    state = TrafficState.concat([snaps[t].take([e]) for t, e in pick])
    w = HISTORY_STEPS
    rows = np.stack([traj.vehicles[e, t - w + 1 : t + 1] for t, e in pick])
    ids = np.stack([traj.vehicle_id[e, t - w + 1 : t + 1] for t, e in pick])
    return state, rows, ids


def braking_plans(params: SimParams, ctx: DecisionContext, cfg: PlannerConfig) -> torch.Tensor:
    """(S, 3, H, 2) plans of ``PLANS`` in the ego's current lane, steered by the planner's lane tracker."""
    planner = make_planner("mpc+constant-velocity", params, {"config": cfg})
    s, h = ctx.history.shape[0], cfg.horizon
    levels = torch.tensor([0.0, -FIRM_BRAKE_MPS2, -params.max_brake_mps2]).clamp(
        -params.max_brake_mps2, params.max_accel_mps2
    )
    accel = levels[None, :, None].expand(s, len(PLANS), h).contiguous().float()
    y = ctx.ego_pose[:, 1]
    y_target = torch.from_numpy(params.lane_centre_m(params.lane_of(y)) - y).float()[:, None].expand(s, len(PLANS))
    steer = planner.track_lane(ctx, accel, y_target.contiguous(), torch.zeros(s, len(PLANS), h))
    return torch.stack([accel, steer], dim=-1)


def follower_index(ctx: DecisionContext, lane_width_m: float) -> np.ndarray:
    """(S,) index in the object list of the nearest vehicle behind the ego in its lane at the anchor (-1 none)."""
    last = ctx.history[:, -1].numpy()  # (S, N, F), anchor frame
    ego_len = last[:, :1, F_LENGTH]
    gap = -last[..., F_X] - 0.5 * (ego_len + last[..., F_LENGTH])
    mine = (last[..., F_VALID] > 0.5) & (last[..., F_X] < 0) & (np.abs(last[..., F_Y]) < 0.5 * lane_width_m)
    mine[:, 0] = False
    gap = np.where(mine, gap, np.inf)
    return np.where(np.isfinite(gap).any(axis=1), gap.argmin(axis=1), -1)


def follower_measures(rows: torch.Tensor, follower: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """From rows (S, C, K, H, N, F): the follower's smallest signed bumper gap to the ego over the horizon and its
    speed at the horizon's end, each averaged over the K futures -> two (S, C) arrays (NaN where no follower)."""
    r = rows.double().numpy()
    idx = np.where(follower >= 0, follower, 0)
    f = np.take_along_axis(r, idx[:, None, None, None, None, None], axis=4)[..., 0, :]  # (S, C, K, H, F)
    ego = r[..., 0, :]
    gap = ego[..., F_X] - f[..., F_X] - 0.5 * (ego[..., F_LENGTH] + f[..., F_LENGTH])
    min_gap = gap.min(axis=-1).mean(axis=-1)
    end_speed = np.hypot(f[..., -1, F_VX], f[..., -1, F_VY]).mean(axis=-1)
    none = (follower < 0)[:, None]
    return np.where(none, np.nan, min_gap), np.where(none, np.nan, end_speed)


def braking_reaction(
    params: SimParams,
    state: TrafficState,
    rows_hist: np.ndarray,
    ids_hist: np.ndarray,
    predictors: Mapping[str, Predictor],
    *,
    samples: int = 32,
    seed: int = 0,
    cfg: PlannerConfig | None = None,
) -> dict:
    """Every predictor against the oracle on the braking plans of the given states (module docstring).

    Args:
        params: the scenario's arrays; state: S scenes; rows_hist, ids_hist: (S, W, V, F), (S, W, V) world rows and
            identities of the W decisions up to the state (the last equal to ``state``).
        predictors: name -> predictor; the oracle is added under ``oracle`` (a name of that kind is refused).
        samples: futures per plan (K); seed: the predictors' generators.
        cfg: the planner configuration whose horizon, margin and shortfall threshold are used (default: defaults).

    Returns:
        JSON-ready: per-plan summaries per predictor (``predictors``), ``states``, the follower's gap at the anchor
        (``follower_gap_m``, mean), and per-state arrays under ``per_state`` (lists, plan-major).

    Raises:
        ValueError: a predictor named ``oracle``.
    """
    if "oracle" in predictors:
        raise ValueError("predictors: the name 'oracle' is taken by the reference")
    cfg = cfg or PlannerConfig()
    ctx = make_context(params, state, rows_hist, ids_hist, NUM_OBJECTS)
    plans = braking_plans(params, ctx, cfg)
    follower = follower_index(ctx, params.lane_width_m)
    planner = make_planner("mpc+constant-velocity", params, {"config": cfg})
    threshold = planner.shortfall_threshold_m()
    from wmplan.model.ego import EgoKinematics

    oracle = OraclePredictor(params, EgoKinematics.from_scenario(params.scenario, cfg.plan_dt_s), cfg.plan_dt_s)
    everyone = {"oracle": oracle, **predictors}
    raw: dict[str, dict[str, np.ndarray]] = {}
    for i, (name, pred) in enumerate(everyone.items()):
        gen = torch.Generator().manual_seed(int(seed) * 1000 + i)
        with torch.inference_mode():
            rows = pred.predict(ctx, plans, samples, generator=gen)
        s_n, c_n = rows.shape[:2]
        risk = summarise_risk(
            rows.flatten(0, 1), cvar_alpha=cfg.cvar_alpha, safe_distance_m=threshold, margin_m=cfg.collision_margin_m
        )
        gap, speed = follower_measures(rows, follower)
        raw[name] = {
            "p_near": risk.p_near.double().numpy().reshape(s_n, c_n),
            "p_from_behind": risk.p_near_from_behind.double().numpy().reshape(s_n, c_n),
            "min_gap": gap,
            "end_speed": speed,
        }
    truth = raw["oracle"]
    has = follower >= 0
    out: dict[str, dict] = {}
    for name, r in raw.items():
        per_plan = {}
        for c, plan in enumerate(PLANS):
            d_p = r["p_from_behind"][:, c] - truth["p_from_behind"][:, c]
            d_gap = (r["min_gap"][:, c] - truth["min_gap"][:, c])[has]
            d_speed = (r["end_speed"][:, c] - truth["end_speed"][:, c])[has]
            per_plan[plan] = {
                "p_near_mean": float(r["p_near"][:, c].mean()),
                "p_from_behind_mean": float(r["p_from_behind"][:, c].mean()),
                "p_from_behind_abs_err": float(np.abs(d_p).mean()),
                "p_from_behind_false_alarm": float((d_p >= FALSE_ALARM).mean()),
                "p_from_behind_missed": float((d_p <= -FALSE_ALARM).mean()),
                "follower_min_gap_m": float(np.nanmean(r["min_gap"][:, c])) if has.any() else None,
                "follower_min_gap_err_m": float(d_gap.mean()) if has.any() else None,
                "follower_min_gap_abs_err_m": float(np.abs(d_gap).mean()) if has.any() else None,
                "follower_end_speed_err_mps": float(d_speed.mean()) if has.any() else None,
            }
        out[name] = per_plan
    anchor_gap = follower_gap_m(state.vehicles(), params)
    return {
        "scenario": params.scenario.name,
        "scenario_hash": scenario_hash(params.scenario),
        "states": int(state.num_scenes),
        "states_with_follower_in_object_list": int(has.sum()),
        "follower_gap_m": float(anchor_gap[np.isfinite(anchor_gap)].mean()),
        "samples": int(samples),
        "seed": int(seed),
        "plans": list(PLANS),
        "predictors": out,
        "per_state": {
            name: {k: np.round(v, 4).T.tolist() for k, v in r.items()} for name, r in raw.items()
        },  # (C, S) nested lists
        "caution": CAUTION,
    }


def assess_braking(
    scenario: Scenario,
    models: Mapping[str, str],
    *,
    episodes: int = 64,
    max_states: int = 96,
    samples: int = 32,
    seed: int = 0,
) -> dict:
    """:func:`braking_reaction` on held-out states of a scenario for latent models by name -> model folder, with
    the constant-velocity predictor beside them (the same numbers for every model set)."""
    from wmplan.plan.predictors import builtin_predictor

    params = SimParams.from_scenario(scenario)
    cfg = PlannerConfig()
    state, rows, ids = reaction_states(params, episodes=episodes, max_states=max_states, seed=seed)
    kw = {"horizon": cfg.horizon, "plan_dt_s": cfg.plan_dt_s}
    preds: dict[str, Predictor] = {"constant-velocity": builtin_predictor("constant-velocity", params, **kw)}
    for name, path in models.items():
        preds[name] = builtin_predictor("latent", params, model_dir=path, **kw)
    out = braking_reaction(params, state, rows, ids, preds, samples=samples, seed=seed, cfg=cfg)
    out["models"] = dict(models)
    out["heldout_episodes"] = int(episodes)
    return out
