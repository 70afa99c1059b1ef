"""The numpy forms of the rule-based ego and the brake threat, as they were before they were compiled: the reference
the compiled ones are checked against (tests/sim/test_ego_rules.py, tests/sim/test_threat.py; an equivalence check,
docs/references.md#practice-equivalence-test)."""

from __future__ import annotations

import numpy as np

from wmplan.sim.behaviour import idm_accel, mobil_incentive, mobil_safe
from wmplan.sim.ego_rules import POLITENESS, SAFE_DECEL_MPS2, THRESHOLD_MPS2, steer_to_lane
from wmplan.sim.engine import lane_occupancy
from wmplan.sim.params import EGO_RULE_TRAITS, T_A, T_B, T_S0, T_T, T_V0, SimParams
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.threat import THREAT_CAP


def _ego_idm(params: SimParams, v, gap, v_lead):
    t = EGO_RULE_TRAITS
    return idm_accel(
        v,
        params.speed_limit_mps,
        gap,
        v - v_lead,
        t["time_headway_s"],
        t["min_gap_m"],
        t["max_accel_mps2"],
        t["comfort_decel_mps2"],
    )


def _leaders_followers(state: TrafficState, params: SimParams):
    """Nearest vehicle ahead / behind the ego in every lane: gaps (S, L) and slots (S, L)."""
    x, ln = state.x_m, state.length_m
    occ = lane_occupancy(params, state.y_m, state.width_m, state.valid, state.lane)  # (S, V, L)
    occ[:, EGO, :] = False
    dx = (x - x[:, :1])[..., None]  # (S, V, 1)
    half = (0.5 * (ln + ln[:, :1]))[..., None]
    ahead = np.where(occ & (dx > 0), dx - half, np.inf)
    behind = np.where(occ & (dx <= 0), -dx - half, np.inf)
    return ahead.min(axis=1), ahead.argmin(axis=1), behind.min(axis=1), behind.argmin(axis=1)


def ego_lane_end_gap(state: TrafficState, params: SimParams) -> np.ndarray:
    """(S,) metres from the ego's front to the nearest end of a lane its body reaches into (inf if none ends).

    Every lane the body still touches counts, not only the lane of its centre: half-way through a merge the rear
    corner may still be over the ending lane."""
    s_n = state.num_scenes
    body = lane_occupancy(
        params,
        state.y_m[:, :1],
        state.width_m[:, :1],
        np.ones((s_n, 1), dtype=bool),
        None,
        state.heading_rad[:, :1],
        state.length_m[:, :1],
    )[:, 0]  # (S, L)
    body[np.arange(s_n), params.lane_of(state.y_m[:, EGO])] = True
    lanes = np.broadcast_to(np.arange(params.num_lanes), body.shape)
    d_lanes = params.distance_to_lane_end(lanes, state.x_m[:, :1])  # (S, L)
    return np.where(body, d_lanes, np.inf).min(axis=1) - 0.5 * state.length_m[:, EGO]


def numpy_rule_actions(state: TrafficState, params: SimParams) -> np.ndarray:
    """Actions (S, 2) of the rule-based ego for every scene: (accel_mps2, steer_rad), within the limits."""
    s_n = state.num_scenes
    rows = np.arange(s_n)
    x, y = state.x_m[:, EGO], state.y_m[:, EGO]
    v = state.ego_speed_mps
    lane = params.lane_of(y)
    g_ahead, i_ahead, g_behind, i_behind = _leaders_followers(state, params)
    vx = state.vx_mps

    def lead(l_idx):
        li = np.clip(l_idx, 0, params.num_lanes - 1)
        g = g_ahead[rows, li]
        return g, np.where(np.isfinite(g), vx[rows, i_ahead[rows, li]], 0.0)

    def follower_acc(l_idx):
        """(accel now, accel if the ego moved in front) of the nearest follower in lane l_idx."""
        li = np.clip(l_idx, 0, params.num_lanes - 1)
        g = g_behind[rows, li]
        f = i_behind[rows, li]
        has = np.isfinite(g)
        tr = state.traits[rows, f]
        vf = vx[rows, f]
        gl, vl = lead(li)
        now = idm_accel(
            vf, tr[:, T_V0], gl + g + state.length_m[:, EGO], vf - vl, tr[:, T_T], tr[:, T_S0], tr[:, T_A], tr[:, T_B]
        )
        after = idm_accel(vf, tr[:, T_V0], g, vf - v, tr[:, T_T], tr[:, T_S0], tr[:, T_A], tr[:, T_B])
        return np.where(has, now, 0.0), np.where(has, after, 0.0), has, g

    d_end = ego_lane_end_gap(state, params)
    g_own, v_own = lead(lane)
    a_now = np.minimum(_ego_idm(params, v, g_own, v_own), _ego_idm(params, v, d_end, 0.0))

    # --- lane choice ---
    target = lane.copy()
    best = np.full(s_n, -np.inf)
    merge_to = params.merge_target[lane]
    must_merge = (merge_to >= 0) & (params.distance_to_lane_end(lane, x) < params.merge_zone_m)
    for d in (-1, 1):
        tl = lane + d
        ok_lane = params.lane_exists(tl, x) & params.lane_exists(tl, x + 30.0)
        g_t, v_t = lead(tl)
        a_after = _ego_idm(params, v, g_t, v_t)
        d_end_t = params.distance_to_lane_end(np.clip(tl, 0, params.num_lanes - 1), x)
        a_after = np.minimum(a_after, _ego_idm(params, v, d_end_t - 0.5 * state.length_m[:, EGO], 0.0))
        n_now, n_after, has_n, g_n = follower_acc(tl)
        # MOBIL's safety criterion for the new follower, and the same bound on the ego's own braking toward the
        # new leader (a merge into a short gap behind a slower car is not taken; the ego falls in behind instead)
        safe = (
            (mobil_safe(n_after, SAFE_DECEL_MPS2) | ~has_n)
            & (g_t > 2.0)
            & (g_n > 2.0)
            & mobil_safe(a_after, SAFE_DECEL_MPS2)
        )
        inc = mobil_incentive(a_now, a_after, n_now, n_after, 0.0, 0.0, POLITENESS)
        forced = must_merge & (merge_to == tl)
        inc = np.where(forced, np.inf, inc)
        # never move into a lane that ends soon unless forced
        avoid = (d_end_t < params.merge_zone_m) & ~forced
        choose = ok_lane & safe & ~avoid & (inc > THRESHOLD_MPS2) & (inc > best)
        target = np.where(choose, tl, target)
        best = np.where(choose, inc, best)
        # while waiting to merge, fall in behind the target lane's vehicle alongside
        waiting = forced & ~choose & ok_lane
        a_now = np.where(waiting, np.minimum(a_now, _ego_idm(params, v, np.maximum(g_t, 0.5), v_t)), a_now)
    # Keep a lane change going once the ego's centre has left its lane's middle.
    accel = np.clip(a_now, -params.max_brake_mps2, params.max_accel_mps2)
    steer = steer_to_lane(state, params, target)
    return np.stack([accel, steer], axis=-1)


def numpy_brake_threat(state: TrafficState, params: SimParams) -> np.ndarray:
    """(S,) deceleration needed to avoid the obstacle ahead over the ego's braking limit (module docstring)."""
    x, y = state.x_m, state.y_m
    heading = state.heading_rad[:, EGO]
    v_ego = state.ego_speed_mps * np.cos(heading)
    dx = x - x[:, :1]
    in_path = state.valid & (dx > 0) & (np.abs(y - y[:, :1]) <= 0.5 * (state.width_m + state.width_m[:, :1]))
    in_path[:, EGO] = False
    gap = dx - 0.5 * (state.length_m + state.length_m[:, :1])
    closing = v_ego[:, None] - state.vx_mps
    with np.errstate(divide="ignore", invalid="ignore"):
        need = np.where(gap > 0, closing**2 / (2.0 * gap), np.inf)
    a_leader = np.where(in_path & (closing > 0), need, 0.0).max(axis=1)
    d_end = ego_lane_end_gap(state, params)  # ends of the lanes the ego's body reaches into
    with np.errstate(divide="ignore", invalid="ignore"):
        a_end = np.where(np.isfinite(d_end), np.where(d_end > 0, v_ego**2 / (2.0 * d_end), np.inf), 0.0)
    threat = np.maximum(a_leader, a_end) / params.max_brake_mps2
    return np.minimum(threat, THREAT_CAP)
