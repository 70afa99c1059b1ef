"""A rule-based driver for the ego: IDM car following, MOBIL lane choice, a merge rule and lane-keeping steering.

It uses no prediction; it is the non-learning baseline of the planner comparisons and one of the behaviour
policies that generate datasets. Compiled, one scene at a time (the numpy form it replaced is the tests' reference).

* Longitudinal: IDM (Treiber et al. 2000) with the ego's own traits (``params.EGO_RULE_TRAITS``, common
  practice), toward the nearest vehicle ahead in the ego's lane or in the lane it is moving to, and toward the end
  of its lane if that lane ends.
* Lane choice: if the ego's lane ends within the merge zone, it moves to the merge lane as soon as the MOBIL
  safety criterion (Kesting et al. 2007) holds for the new follower; while waiting it also follows the vehicle
  ahead in the target lane, so it slots in behind it. Elsewhere it overtakes by the MOBIL incentive with
  politeness 0.2 and threshold 0.2 m/s^2 (the threshold of the model authors' later material; the 2007 paper
  gives 0.1 m/s^2, from memory: docs/references.md#kesting-2007-mobil).
* Lateral: steer toward a heading that closes the lateral error to the target lane centre (a proportional law
  on lateral and heading error, common practice), through the kinematic bicycle's yaw-rate relation.
"""

from __future__ import annotations

import math

import numpy as np

from wmplan.sim._jit import jit
from wmplan.sim.behaviour import idm_accel
from wmplan.sim.draws import clip
from wmplan.sim.engine import Packed, param_table
from wmplan.sim.kernel import (
    BAND_EPS_M,
    F_H,
    F_LEN,
    F_VX,
    F_WID,
    F_X,
    F_Y,
    I_LANE,
    L_MERGE_TO,
    P_LANE_W,
    P_MAX_ACCEL,
    P_MAX_BRAKE,
    P_MAX_STEER,
    P_MERGE_ZONE,
    P_NUM_LANES,
    P_SPEED_LIMIT,
    P_WHEELBASE,
    S_EGO_SPEED,
    _c,
    _centre,
    _exists,
    _half_extent_y,
    _idm,
    _lane_of,
    _to_end,
)
from wmplan.sim.params import EGO_RULE_TRAITS, T_A, T_S0, T_T, T_V0, SimParams
from wmplan.sim.state import EGO, TrafficState

# The rule-based driver decides every 0.2 s and holds its action in between, as the planners do (the decision
# period of ``wmplan.plan.mpc.PlannerConfig``): one "rules" driver wherever the name appears.
RULE_DECISION_PERIOD_S = 0.2
POLITENESS = 0.2
THRESHOLD_MPS2 = 0.2
SAFE_DECEL_MPS2 = 4.0
LATERAL_GAIN = 0.35  # rad of heading per metre of lateral error per (m/s) scale, see _steer
HEADING_GAIN_PER_S = 2.5
MAX_HEADING_RAD = 0.12


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


_RULE_T, _RULE_S0, _RULE_A = (EGO_RULE_TRAITS[k] for k in ("time_headway_s", "min_gap_m", "max_accel_mps2"))
_RULE_C = 0.5 / math.sqrt(EGO_RULE_TRAITS["max_accel_mps2"] * EGO_RULE_TRAITS["comfort_decel_mps2"])


@jit
def _ego_idm_k(sc, v, gap, v_lead):
    """:func:`_ego_idm`, compiled (the same operations as ``idm_accel``)."""
    return _idm(v, sc[P_SPEED_LIMIT], gap, v - v_lead, _RULE_T, _RULE_S0, _RULE_A, _RULE_C)


@jit
def _leaders_followers_k(sc, x, y, length, width, valid, lane, g_ahead, i_ahead, g_behind, i_behind):
    """Nearest vehicle ahead / behind the ego in every lane (gap and slot, the lowest slot on a tie; slot 0 and
    gap inf where there is none). A vehicle is in lane l if its (unturned) body reaches BAND_EPS_M into it or l
    is its lane."""
    w = sc[P_LANE_W]
    for ln in range(g_ahead.shape[0]):
        g_ahead[ln], i_ahead[ln], g_behind[ln], i_behind[ln] = np.inf, 0, np.inf, 0
    len_e = length[EGO]
    for j in range(1, x.shape[0]):
        if not valid[j]:
            continue
        hw = 0.5 * width[j]
        top, bottom = y[j] + hw, y[j] - hw
        dx = x[j] - x[EGO]
        half = 0.5 * (length[j] + len_e)
        for ln in range(int(sc[P_NUM_LANES])):
            lo = ln * w
            if not ((top > lo + BAND_EPS_M and bottom < lo + w - BAND_EPS_M) or lane[j] == ln):
                continue
            if dx > 0:
                if dx - half < g_ahead[ln]:
                    g_ahead[ln], i_ahead[ln] = dx - half, j
            elif -dx - half < g_behind[ln]:
                g_behind[ln], i_behind[ln] = -dx - half, j


@jit
def _ego_lane_end_gap_k(sc, ln, x, y, length, width, heading):
    """:func:`ego_lane_end_gap` of one ego at (x, y), compiled."""
    hw = _half_extent_y(length, width, heading)
    w = sc[P_LANE_W]
    own = _lane_of(sc, y)
    d = np.inf
    for lane in range(int(sc[P_NUM_LANES])):
        lo = lane * w
        if lane == own or (y + hw > lo + BAND_EPS_M and y - hw < lo + w - BAND_EPS_M):
            d = min(d, _to_end(sc, ln, lane, x))
    return d - 0.5 * length


@jit
def _lead(sc, vx, g_ahead, i_ahead, lane):
    li = min(max(lane, 0), int(sc[P_NUM_LANES]) - 1)
    g = g_ahead[li]
    return g, (vx[i_ahead[li]] if math.isfinite(g) else 0.0)


@jit
def _follower_acc(sc, vx, traits, len_e, v, g_ahead, i_ahead, g_behind, i_behind, lane):
    """(accel now, accel if the ego moved in front, whether there is one, gap) of the nearest follower in a lane."""
    li = min(max(lane, 0), int(sc[P_NUM_LANES]) - 1)
    g, f = g_behind[li], i_behind[li]
    if not math.isfinite(g):
        return 0.0, 0.0, False, g
    vf = vx[f]
    gl, vl = _lead(sc, vx, g_ahead, i_ahead, li)
    c = _c(traits, f)
    now = _idm(vf, traits[f, T_V0], gl + g + len_e, vf - vl, traits[f, T_T], traits[f, T_S0], traits[f, T_A], c)
    after = _idm(vf, traits[f, T_V0], g, vf - v, traits[f, T_T], traits[f, T_S0], traits[f, T_A], c)
    return now, after, True, g


@jit
def _steer_k(sc, y, heading, speed, target):
    """:func:`steer_to_lane` of one ego, compiled."""
    v = max(speed, 1.0)
    err = _centre(sc, target) - y
    heading_des = clip(math.atan(LATERAL_GAIN * err * 10.0 / max(v, 5.0)), -MAX_HEADING_RAD, MAX_HEADING_RAD)
    yaw_rate = HEADING_GAIN_PER_S * (heading_des - heading)
    return clip(math.atan(sc[P_WHEELBASE] * yaw_rate / v), -sc[P_MAX_STEER], sc[P_MAX_STEER])


@jit
def _rule_scene(
    sc, ln, x, y, vx, heading, length, width, valid, lane_arr, traits, v, g_ahead, i_ahead, g_behind, i_behind
):
    """(accel, steer) of the rule-based ego in one scene (module docstring; :func:`rule_actions`)."""
    _leaders_followers_k(sc, x, y, length, width, valid, lane_arr, g_ahead, i_ahead, g_behind, i_behind)
    ex, ey, len_e = x[EGO], y[EGO], length[EGO]
    lane = _lane_of(sc, ey)
    d_end = _ego_lane_end_gap_k(sc, ln, ex, ey, len_e, width[EGO], heading[EGO])
    g_own, v_own = _lead(sc, vx, g_ahead, i_ahead, lane)
    a_now = min(_ego_idm_k(sc, v, g_own, v_own), _ego_idm_k(sc, v, d_end, 0.0))
    target, best = lane, -np.inf
    merge_to = int(ln[L_MERGE_TO, lane])
    must_merge = merge_to >= 0 and _to_end(sc, ln, lane, ex) < sc[P_MERGE_ZONE]
    for d in (-1, 1):
        tl = lane + d
        ok_lane = _exists(sc, ln, tl, ex) and _exists(sc, ln, tl, ex + 30.0)
        g_t, v_t = _lead(sc, vx, g_ahead, i_ahead, tl)
        d_end_t = _to_end(sc, ln, tl, ex)
        a_after = min(_ego_idm_k(sc, v, g_t, v_t), _ego_idm_k(sc, v, d_end_t - 0.5 * len_e, 0.0))
        n_now, n_after, has_n, g_n = _follower_acc(sc, vx, traits, len_e, v, g_ahead, i_ahead, g_behind, i_behind, tl)
        safe = (n_after >= -SAFE_DECEL_MPS2 or not has_n) and g_t > 2.0 and g_n > 2.0 and a_after >= -SAFE_DECEL_MPS2
        inc = (a_after - a_now) + POLITENESS * ((n_after - n_now) + (0.0 - 0.0))  # mobil_incentive
        forced = must_merge and merge_to == tl
        if forced:
            inc = np.inf
        avoid = d_end_t < sc[P_MERGE_ZONE] and not forced
        choose = ok_lane and safe and not avoid and inc > THRESHOLD_MPS2 and inc > best
        if choose:
            target, best = tl, inc
        if forced and not choose and ok_lane:  # while waiting to merge, fall in behind the target lane's vehicle
            a_now = min(a_now, _ego_idm_k(sc, v, max(g_t, 0.5), v_t))
    accel = clip(a_now, -sc[P_MAX_BRAKE], sc[P_MAX_ACCEL])
    return accel, _steer_k(sc, ey, heading[EGO], v, target)


@jit
def _rule_actions(sc, ln, vf, vi, valid, traits, sf, out, work_f, work_i):
    """:func:`rule_actions` of every scene from the engine's packed arrays (``work_*`` (2, L): work space)."""
    for s in range(valid.shape[0]):
        out[s, 0], out[s, 1] = _rule_scene(
            sc,
            ln,
            vf[F_X, s],
            vf[F_Y, s],
            vf[F_VX, s],
            vf[F_H, s],
            vf[F_LEN, s],
            vf[F_WID, s],
            valid[s],
            vi[I_LANE, s],
            traits[s],
            sf[S_EGO_SPEED, s],
            work_f[0],
            work_i[0],
            work_f[1],
            work_i[1],
        )


@jit
def _lane_end_gaps(sc, ln, vf, out):
    for s in range(out.shape[0]):
        out[s] = _ego_lane_end_gap_k(
            sc, ln, vf[F_X, s, EGO], vf[F_Y, s, EGO], vf[F_LEN, s, EGO], vf[F_WID, s, EGO], vf[F_H, s, EGO]
        )


def ego_lane_end_gap(state: TrafficState, params: SimParams) -> np.ndarray:
    """(S,) metres from the ego's front to the nearest end of a lane its body reaches into (inf if none ends).

    Every lane the body still touches counts, not only the lane of its centre: half-way through a merge the rear
    corner may still be over the ending lane. Compiled."""
    table = param_table(params)
    out = np.empty(state.num_scenes)
    _lane_end_gaps(table.scalars[0], table.lanes[0], Packed.of(state).vf, out)
    return out


def rule_actions(state: TrafficState, params: SimParams) -> np.ndarray:
    """Actions (S, 2) of the rule-based ego for every scene: (accel_mps2, steer_rad), within the limits.

    Compiled, one scene at a time: a scene's actions do not depend on the batch (the numpy form this replaced used
    numpy's vectorised arctan on batches of 8 or more, which can differ from the scalar one in the last bit)."""
    table, p = param_table(params), Packed.of(state)
    out = np.empty((state.num_scenes, 2))
    l_n = table.lanes.shape[2]
    _rule_actions(
        table.scalars[0],
        table.lanes[0],
        p.vf,
        p.vi,
        p.valid,
        p.traits,
        p.sf,
        out,
        np.empty((2, l_n)),
        np.empty((2, l_n), dtype=np.int64),
    )
    return out


def steer_to_lane(state: TrafficState, params: SimParams, target_lane: np.ndarray) -> np.ndarray:
    """Steering angle (S,) that brings the ego to the centre of ``target_lane`` smoothly, within the limits."""
    y, heading = state.y_m[:, EGO], state.heading_rad[:, EGO]
    v = np.maximum(state.ego_speed_mps, 1.0)
    err = params.lane_centre_m(target_lane) - y
    heading_des = np.clip(np.arctan(LATERAL_GAIN * err * 10.0 / np.maximum(v, 5.0)), -MAX_HEADING_RAD, MAX_HEADING_RAD)
    yaw_rate = HEADING_GAIN_PER_S * (heading_des - heading)
    steer = np.arctan(params.wheelbase_m * yaw_rate / v)
    return np.clip(steer, -params.max_steer_rad, params.max_steer_rad)


def held_rule_policy(params: SimParams, period_s: float = RULE_DECISION_PERIOD_S):
    """A fresh rule-based driver ``policy(state, params=None) -> actions (S, 2)`` that recomputes
    :func:`rule_actions` on the steps that are multiples of the decision period and holds them in between (call it
    once per simulator step; it keeps the last actions)."""
    sub = max(1, int(round(period_s / params.dt_s)))
    held: dict[str, np.ndarray] = {}

    def policy(state: TrafficState, _params: SimParams | None = None) -> np.ndarray:
        last = held.get("actions")
        if last is None or last.shape[0] != state.num_scenes or bool(np.any(state.step % sub == 0)):
            last = held["actions"] = rule_actions(state, params)
        return last

    return policy
