"""The compiled simulator step: loops over scenes and vehicles, compiled by numba (nopython, cached on disk).

:func:`wmplan.sim.engine.step` is the public entry; this module holds what it runs. A batch of scenes is a range
``[a, b)`` of rows of the state's arrays; :func:`step_range` advances each scene of the range on its own
(:func:`_step_scene`), so a scene gives the same numbers bit for bit in any batch and on any thread. Each scene
reads its parameters from row ``group[s]`` of the parameter tables (:class:`ParamTable`), so scenes of different
scenario variants run in one call.

Order of one step (each a function below):

1. :func:`_occupancy` and :func:`_sort`: which lanes each body reaches into (or is in or moving to: an indicator
   is visible at once), and the vehicles in order of position (a stable sort: the slot breaks ties);
2. :func:`_leaders` and :func:`_car_following`: IDM toward the nearest vehicle ahead that shares a lane, and toward
   the end of its own lane as a standing obstacle (IDM: Treiber, Hennecke, Helbing 2000; book form of s* with the
   max(0, .) guard, Treiber & Kesting 2013);
3. :func:`_yielding`: a driver with a merging vehicle just ahead in the next lane decides once, at random, whether
   to let it in (then follows it) or not (then closes up on its leader with a bolder desired speed and headway,
   and from the next step on counts a merging vehicle as its leader only once its centre is in its lane);
4. :func:`_braking`: random hard-braking events, then the physical braking limit;
5. :func:`_lane_changes`: MOBIL (Kesting, Treiber, Helbing 2007) on decision steps, right and left at different
   phases, with the mandatory-merge bias where a lane ends;
6. :func:`_traffic_motion` and :func:`_ego_motion`: constant-acceleration longitudinal steps, proportional lateral
   motion for traffic, the kinematic bicycle for the ego (Rajamani 2012, section 2.2);
7. :func:`_leave`, :func:`_spawn`: vehicles leave at the ends of the simulated stretch, at most one enters;
   :func:`_ego_collides` (separating axes, Gottschalk et al. 1996), :func:`_ego_offroad`, the goal.

Random numbers: :mod:`wmplan.sim.draws` (the counter-based hash of :mod:`wmplan.rng`, compiled). The rules are
those of the per-vehicle Python reference :mod:`wmplan.sim.loop_reference`, which the tests compare this step
with.
"""

from __future__ import annotations

import math

import numpy as np

from wmplan.sim._jit import jit
from wmplan.sim.behaviour import MIN_GAP_FLOOR_M
from wmplan.sim.draws import clip, combine2, combine3, combine4, combine5, to_unit, truncated_normal
from wmplan.sim.params import (
    LANE_CHANGE_COOLDOWN_S,
    MANDATORY_BIAS_MPS2,
    MAX_PHYSICAL_DECEL_MPS2,
    NUM_TRAITS,
    T_A,
    T_B,
    T_BSAFE,
    T_P,
    T_S0,
    T_T,
    T_TH,
    T_V0,
    T_YIELD,
    SimParams,
)
from wmplan.sim.tilt import MAX_TILTED_PROB

LATERAL_MARGIN_M = 0.2  # two vehicles interact longitudinally if their bodies come this close sideways
BAND_EPS_M = 0.05  # a body must reach this far into a lane to occupy it
SETTLED_M = 0.4  # a traffic vehicle may start a new lane change once this close to its lane centre
LATERAL_GAIN_PER_S = 1.2  # proportional gain of the traffic's lateral motion toward the lane centre
MIN_SPAWN_GAP_M = 10.0
# A driver who does not yield to a merging vehicle drives as if its desired speed were 15% higher and its time
# headway 30% shorter while the interaction lasts; invented for this sandbox (no source).
NON_YIELD_SPEEDUP = 1.15
NON_YIELD_HEADWAY_FACTOR = 0.7
MAX_LANE_CHANGE_HEADING_RAD = 0.15  # about 8.6 degrees; common practice, no source
MAX_LANE_CHANGE_SLOPE = float(np.tan(MAX_LANE_CHANGE_HEADING_RAD))
SPAWN_PERIOD_STEPS = 5  # entries are attempted every 5 steps (0.5 s at 0.1 s steps)
# Steps between lane-change decisions of a driver (0.6 s at 0.1 s steps); common practice, no source.
LANE_DECISION_PERIOD_STEPS = 6
LEAVE_MARGIN_M = 10.0  # a vehicle leaves once this far outside the simulated stretch

# Stream ids of wmplan.rng (repeated here as compile-time constants; tests/sim/test_rng.py checks they agree).
STREAM_TRAITS, STREAM_SPAWN, STREAM_YIELD, STREAM_BRAKE_START, STREAM_BRAKE_SIZE = 1, 2, 3, 4, 5
SIZE_SALTS = (101, 102)  # last counter of the length and width draws (wmplan.sim.spawn.draw_size)

EGO = 0

# --- the state's packed layout (what step_range reads and writes) -----------------------------------------------------
# (S, V) float64 fields of a TrafficState, stacked as the rows of one (NVF, S, V) array, and so on for the others.
VF_FIELDS = (
    "x_m",
    "y_m",
    "vx_mps",
    "vy_mps",
    "heading_rad",
    "length_m",
    "width_m",
    "brake_timer_s",
    "brake_decel_mps2",
    "cooldown_s",
)
F_X, F_Y, F_VX, F_VY, F_H, F_LEN, F_WID, F_TIMER, F_DECEL, F_CD = range(len(VF_FIELDS))
VI_FIELDS = ("vehicle_id", "lane")  # (NVI, S, V) int64
I_VID, I_LANE = range(len(VI_FIELDS))
SF_FIELDS = ("ego_speed_mps", "ego_steer_rad")  # (NSF, S) float64
S_EGO_SPEED, S_EGO_STEER = range(len(SF_FIELDS))
SI_FIELDS = ("step", "next_id")  # (NSI, S) int64
S_STEP, S_NEXT_ID = range(len(SI_FIELDS))
ENDED_FIELDS = ("collided", "offroad", "reached_goal")  # (NE, S) bool
E_COLLIDED, E_OFFROAD, E_REACHED = range(len(ENDED_FIELDS))

# --- parameter tables -------------------------------------------------------------------------------------------------
# Scalars of one parameter set, by column of ParamTable.scalars:
(
    P_DT,
    P_LANE_W,
    P_ROAD_LEN,
    P_SPEED_LIMIT,
    P_BEHIND,
    P_AHEAD,
    P_BRAKE_PROB,
    P_BD_MEAN,
    P_BD_STD,
    P_BD_LO,
    P_BD_HI,
    P_BT_MEAN,
    P_BT_STD,
    P_BT_LO,
    P_BT_HI,
    P_LEN_MEAN,
    P_LEN_STD,
    P_LEN_LO,
    P_LEN_HI,
    P_WID_MEAN,
    P_WID_STD,
    P_WID_LO,
    P_WID_HI,
    P_LC_SPEED,
    P_MERGE_ZONE,
    P_YIELD_WINDOW,
    P_INIT_FRAC,
    P_WHEELBASE,
    P_L_R,
    P_MAX_ACCEL,
    P_MAX_BRAKE,
    P_MAX_STEER,
    P_MAX_STEER_RATE,
    P_GOAL_X,
    P_NUM_LANES,
    P_ANY_END,
    P_MAX_DENSITY,
    P_TILT_BRAKE,
    P_TILT_YIELD,
    P_TILT_RADIUS,
) = range(40)
NUM_SCALARS = 40
# Per-lane rows of ParamTable.lanes:
L_START, L_END, L_ENDS, L_MERGE_TO, L_DENSITY, L_GOAL = range(6)
NUM_LANE_ROWS = 6
# Rows of ParamTable.traits: mean, std, low, high of each trait's truncated normal.
D_MEAN, D_STD, D_LO, D_HI = range(4)


class ParamTable:
    """Parameter sets laid out for the kernel: ``scalars`` (G, NUM_SCALARS), ``lanes`` (G, 6, Lmax) and
    ``traits`` (G, 4, NT), one row per set (a scenario or a variant of one); scene s uses row ``group[s]``.

    Every field a scenario variant may change is a column here, so variants that differ in any of them (traffic,
    drivers, random events, limits, even the road) run in one batch."""

    __slots__ = ("scalars", "lanes", "traits")

    def __init__(self, params: tuple[SimParams, ...]):
        g_n = len(params)
        l_max = max(p.num_lanes for p in params)
        self.scalars = np.zeros((g_n, NUM_SCALARS))
        self.lanes = np.zeros((g_n, NUM_LANE_ROWS, l_max))
        self.traits = np.zeros((g_n, 4, NUM_TRAITS))
        for g, p in enumerate(params):
            self._fill(g, p)

    def _fill(self, g: int, p: SimParams) -> None:
        tilt = p.tilt if p.tilt is not None and p.tilt.active else None
        sc = self.scalars[g]
        sc[P_DT], sc[P_LANE_W], sc[P_ROAD_LEN], sc[P_SPEED_LIMIT] = (
            p.dt_s,
            p.lane_width_m,
            p.road_length_m,
            p.speed_limit_mps,
        )
        sc[P_BEHIND], sc[P_AHEAD], sc[P_BRAKE_PROB] = p.window_behind_m, p.window_ahead_m, p.brake_prob_per_step
        sc[P_BD_MEAN : P_BD_HI + 1] = p.brake_decel
        sc[P_BT_MEAN : P_BT_HI + 1] = p.brake_duration
        sc[P_LEN_MEAN : P_LEN_HI + 1] = p.length_dist
        sc[P_WID_MEAN : P_WID_HI + 1] = p.width_dist
        sc[P_LC_SPEED], sc[P_MERGE_ZONE], sc[P_YIELD_WINDOW] = p.lane_change_speed_mps, p.merge_zone_m, p.yield_window_m
        sc[P_INIT_FRAC], sc[P_WHEELBASE], sc[P_L_R] = p.initial_speed_fraction, p.wheelbase_m, p.l_r_m
        sc[P_MAX_ACCEL], sc[P_MAX_BRAKE], sc[P_MAX_STEER] = p.max_accel_mps2, p.max_brake_mps2, p.max_steer_rad
        sc[P_MAX_STEER_RATE], sc[P_GOAL_X], sc[P_NUM_LANES] = p.max_steer_rate_radps, p.goal_x_m, p.num_lanes
        sc[P_ANY_END] = float(bool(p.lane_ends_on_road.any()))
        sc[P_MAX_DENSITY] = float(p.density_veh_per_m.max())
        sc[P_TILT_BRAKE] = 1.0 if tilt is None else tilt.brake_factor
        sc[P_TILT_YIELD] = 1.0 if tilt is None else tilt.yield_factor
        sc[P_TILT_RADIUS] = 0.0 if tilt is None else tilt.radius_m
        ln, n = self.lanes[g], p.num_lanes
        ln[L_START, :n], ln[L_END, :n], ln[L_ENDS, :n] = p.lane_start_m, p.lane_end_m, p.lane_ends_on_road
        ln[L_MERGE_TO, :n], ln[L_DENSITY, :n], ln[L_GOAL, :n] = p.merge_target, p.density_veh_per_m, p.goal_lane_mask
        tr = self.traits[g]
        tr[D_MEAN], tr[D_STD], tr[D_LO], tr[D_HI] = p.trait_mean, p.trait_std, p.trait_lo, p.trait_hi


# --- road geometry (one scene's parameter set: sc scalars, ln lane rows) ------------------------------------------


@jit
def _lane_of(sc, y):
    """Lane that contains lateral position y, clipped to the road's lanes."""
    n = int(sc[P_NUM_LANES])
    return min(max(int(math.floor(y / sc[P_LANE_W])), 0), n - 1)


@jit
def _centre(sc, lane):
    return (lane + 0.5) * sc[P_LANE_W]


@jit
def _exists(sc, ln, lane, x):
    """Lane ``lane`` exists at position x (out-of-range lanes do not)."""
    if lane < 0 or lane >= int(sc[P_NUM_LANES]):
        return False
    return ln[L_START, lane] <= x <= ln[L_END, lane]


@jit
def _to_end(sc, ln, lane, x):
    """Metres from x to where lane ``lane`` (clipped to the road's lanes) ends, inf if it runs to the road's end."""
    if sc[P_ANY_END] == 0.0:
        return np.inf
    li = min(max(lane, 0), int(sc[P_NUM_LANES]) - 1)
    return ln[L_END, li] - x if ln[L_ENDS, li] != 0.0 else np.inf


@jit
def _half_extent_y(length, width, heading):
    """Lateral half-extent of a footprint turned by ``heading``: w/2 cos h + l/2 |sin h| (w/2 when h = 0)."""
    if heading == 0.0:
        return 0.5 * width
    return 0.5 * width * math.cos(heading) + 0.5 * (length * abs(math.sin(heading)))


@jit
def _lane_bits(sc, y, hw, lane_now):
    """Bit l set where the body (lateral half-extent hw) reaches BAND_EPS_M into lane l, or l is the lane the
    vehicle is in or moving to (an indicator is visible at once)."""
    w = sc[P_LANE_W]
    bits = 0
    for ln in range(int(sc[P_NUM_LANES])):
        lo = ln * w
        if ln == lane_now or (y + hw > lo + BAND_EPS_M and y - hw < lo + w - BAND_EPS_M):
            bits |= 1 << ln
    return bits


# --- driver laws ------------------------------------------------------------------------------------------------------


@jit
def _idm(v, v0, gap, dv, t, s0, a, c):
    """IDM acceleration, delta = 4, ``c = 1 / (2 sqrt(a b))``, gap floored at MIN_GAP_FLOOR_M (inf: free road);
    the same operations as :func:`wmplan.sim.behaviour.idm_accel_fast`."""
    s_star = s0 + max(0.0, v * (t + dv * c))
    r = v / v0
    r = r * r
    inter = s_star / max(gap, MIN_GAP_FLOOR_M)
    return a * (1.0 - r * r - inter * inter)


@jit
def _c(traits, j):
    """1 / (2 sqrt(a b)) of driver j's traits. (Traits are read as traits[j, k] throughout: a row view
    traits[j] would cost an atomic reference count change each time.)"""
    return 0.5 / math.sqrt(traits[j, T_A] * traits[j, T_B])


@jit
def _follow(vx, traits, cc, j, gap, v_lead):
    """IDM acceleration of vehicle j behind a leader ``gap`` ahead going ``v_lead`` (``cc[j]``: its
    :func:`_c`, worked out once a step)."""
    return _idm(vx[j], traits[j, T_V0], gap, vx[j] - v_lead, traits[j, T_T], traits[j, T_S0], traits[j, T_A], cc[j])


@jit
def _distance_and_speed(v, a, dt):
    """Distance and final speed over dt at constant acceleration, stopping (never reversing) at zero speed."""
    v_new = v + a * dt
    if v_new < 0.0:
        dist = -(v * v) / (2.0 * a) if a < 0.0 else 0.0
    else:
        dist = v * dt + 0.5 * a * (dt * dt)
    return dist, max(v_new, 0.0)


# --- neighbours -------------------------------------------------------------------------------------------------------


@jit
def _sort(x, valid, order, rank):
    """Valid slots in order of position (insertion sort, stable: the lower slot first on a tie); returns how many.
    ``rank[slot]`` is the slot's place in ``order`` (-1 for empty slots)."""
    n = 0
    for i in range(x.shape[0]):
        rank[i] = -1
        if not valid[i]:
            continue
        k = n
        while k > 0 and x[order[k - 1]] > x[i]:
            order[k] = order[k - 1]
            k -= 1
        order[k] = i
        n += 1
    for r in range(n):
        rank[order[r]] = r
    return n


@jit
def _next_in(order, rank, n, i, bits, mask):
    """Slot of the nearest vehicle after i in position order whose lane bits meet ``mask``, or -1."""
    for r in range(rank[i] + 1, n):
        j = order[r]
        if bits[j] & mask:
            return j
    return -1


@jit
def _prev_in(order, rank, i, bits, mask):
    """Slot of the nearest vehicle before i in position order whose lane bits meet ``mask``, or -1."""
    for r in range(rank[i] - 1, -1, -1):
        j = order[r]
        if bits[j] & mask:
            return j
    return -1


@jit
def _next_strict(order, rank, n, i, bits, merger, centre_bit):
    """As :func:`_next_in` with i's own lanes, but a merging vehicle counts only in the lane of its centre."""
    mask = bits[i]
    for r in range(rank[i] + 1, n):
        j = order[r]
        if (centre_bit[j] if merger[j] else bits[j]) & mask:
            return j
    return -1


@jit
def _next_merger_into(order, rank, n, i, lane, merger, merge_to):
    """Slot of the nearest merging vehicle after i in position order whose merge target is ``lane``, or -1."""
    for r in range(rank[i] + 1, n):
        j = order[r]
        if merger[j] and merge_to[j] == lane:
            return j
    return -1


@jit
def _gap_ahead(x, length, i, j):
    return np.inf if j < 0 else (x[j] - x[i]) - 0.5 * (length[j] + length[i])


@jit
def _gap_behind(x, length, i, j):
    return np.inf if j < 0 else (x[i] - x[j]) - 0.5 * (length[j] + length[i])


# --- the phases of one scene's step -----------------------------------------------------------------------------------


@jit
def _occupancy(sc, x, y, length, width, heading, valid, lane, bits, centre_bit):
    """Lane bits of every slot (0 for empty slots) and the bit of the lane of each centre."""
    for i in range(x.shape[0]):
        if valid[i]:
            bits[i] = _lane_bits(sc, y[i], _half_extent_y(length[i], width[i], heading[i]), lane[i])
            centre_bit[i] = 1 << _lane_of(sc, y[i])
        else:
            bits[i] = 0
            centre_bit[i] = 0


@jit
def _mergers(sc, ln, x, y, valid, lane, merger, merge_to):
    """Which vehicles must leave their ending lane soon (within the merge zone), and the lane they merge into.
    The ego's lane is that of its centre. Returns whether any must."""
    any_merger = False
    for i in range(x.shape[0]):
        li = _lane_of(sc, y[i]) if i == EGO else lane[i]
        li = min(max(li, 0), int(sc[P_NUM_LANES]) - 1)
        merge_to[i] = int(ln[L_MERGE_TO, li])
        merger[i] = valid[i] and _to_end(sc, ln, li, x[i]) < sc[P_MERGE_ZONE] and merge_to[i] >= 0
        any_merger |= merger[i]
    return any_merger


@jit
def _leaders(
    x, vx, length, traffic, ys_old, order, rank, n, bits, any_merger, merger, centre_bit, lead, lead_gap, v_lead
):
    """Leader of every traffic vehicle: the nearest vehicle ahead sharing one of its lanes. A driver who decided
    not to yield to a merging vehicle counts a merging vehicle only once its centre is in one of its lanes."""
    for i in range(x.shape[0]):
        if not traffic[i]:
            continue
        if any_merger and ys_old[i] == 2:
            j = _next_strict(order, rank, n, i, bits, merger, centre_bit)
        else:
            j = _next_in(order, rank, n, i, bits, bits[i])
        lead[i] = j
        lead_gap[i] = _gap_ahead(x, length, i, j)
        v_lead[i] = vx[j] if j >= 0 else 0.0


@jit
def _car_following(sc, ln, x, vx, length, lane, traits, cc, traffic, lead_gap, v_lead, acc):
    """IDM toward the leader and, where any lane of the road ends, toward the end of the own lane."""
    any_end = sc[P_ANY_END] != 0.0
    for i in range(x.shape[0]):
        if not traffic[i]:
            continue
        a = _follow(vx, traits, cc, i, lead_gap[i], v_lead[i])
        if any_end:
            a = min(a, _follow(vx, traits, cc, i, _to_end(sc, ln, lane[i], x[i]) - 0.5 * length[i], 0.0))
        acc[i] = a


@jit
def _bold(sc, ln, x, vx, length, lane, traits, i, gap, v_lead):
    """Acceleration of a driver who does not yield: IDM with a higher desired speed and a shorter headway."""
    c = _c(traits, i)
    v0, t, s0, a_max = (
        traits[i, T_V0] * NON_YIELD_SPEEDUP,
        traits[i, T_T] * NON_YIELD_HEADWAY_FACTOR,
        traits[i, T_S0],
        traits[i, T_A],
    )
    a = _idm(vx[i], v0, gap, vx[i] - v_lead, t, s0, a_max, c)
    if sc[P_ANY_END] != 0.0:
        a = min(a, _idm(vx[i], v0, _to_end(sc, ln, lane[i], x[i]) - 0.5 * length[i], vx[i], t, s0, a_max, c))
    return a


@jit
def _yielding(
    sc,
    ln,
    key,
    stp,
    x,
    vx,
    length,
    lane,
    vid,
    traits,
    cc,
    traffic,
    ys_old,
    order,
    rank,
    n,
    any_merger,
    merger,
    merge_to,
    lead_gap,
    v_lead,
    acc,
    ys,
):
    """Drivers with a merging vehicle just ahead whose target is their lane decide (once, at random) whether to
    let it in; sets ``ys`` (0 no partner, 1 yields, 2 does not) and adjusts ``acc``. Returns the log-likelihood
    ratio of the tilted decisions (0 without a tilt)."""
    log_w = 0.0
    if not any_merger:
        for i in range(x.shape[0]):
            ys[i] = 0
        return log_w
    num_lanes = int(sc[P_NUM_LANES])
    tilt_yield = sc[P_TILT_YIELD]
    yield_key = combine3(key, stp, STREAM_YIELD)
    for i in range(x.shape[0]):
        ys[i] = 0
        if not traffic[i] or merger[i]:
            continue
        own = min(max(lane[i], 0), num_lanes - 1)
        p = _next_merger_into(order, rank, n, i, own, merger, merge_to)
        if p < 0 or not x[p] - x[i] < sc[P_YIELD_WINDOW]:
            continue
        state = ys_old[i]
        if state == 0:  # the interaction begins now: draw the decision
            u = to_unit(combine2(yield_key, vid[i]))
            p_yield = traits[i, T_YIELD]
            if tilt_yield != 1.0 and p == EGO:  # decisions about letting the ego in are tilted
                q_yield = p_yield * tilt_yield
                yields = u < q_yield
                if yields:
                    log_w += math.log(p_yield) - math.log(q_yield)
                else:
                    log_w += math.log1p(-p_yield) - math.log1p(-q_yield)
            else:
                yields = u < p_yield
            state = 1 if yields else 2
        ys[i] = state
        if state == 1:
            a_yield = _follow(vx, traits, cc, i, max(_gap_ahead(x, length, i, p), traits[i, T_S0]), vx[p])
            acc[i] = min(acc[i], max(a_yield, -traits[i, T_BSAFE]))
        else:  # close up on the leader, so that the merging vehicle finds no gap in front
            acc[i] = _bold(sc, ln, x, vx, length, lane, traits, i, lead_gap[i], v_lead[i])
    return log_w


@jit
def _braking(sc, key, stp, x, vx, vid, traffic, timer_in, decel_in, acc, timer, decel):
    """Hard-braking events (random start, size and duration), then the physical braking limit. Returns the
    log-likelihood ratio of the tilted starts (0 without a tilt)."""
    dt = sc[P_DT]
    p_brake = sc[P_BRAKE_PROB]
    tilt_brake = sc[P_TILT_BRAKE]
    q_brake = min(p_brake * tilt_brake, MAX_TILTED_PROB)
    start_key = combine3(key, stp, STREAM_BRAKE_START)
    log_w = 0.0
    for i in range(x.shape[0]):
        timer[i] = max(timer_in[i] - dt, 0.0)
        decel[i] = decel_in[i]
        if not traffic[i]:
            continue
        if p_brake > 0.0 and timer[i] <= 0.0 and vx[i] > 5.0:
            u = to_unit(combine2(start_key, vid[i]))
            if tilt_brake != 1.0:  # starts of drivers near the ego are tilted
                dx_ego = x[i] - x[EGO]
                near = abs(dx_ego) <= sc[P_TILT_RADIUS] and dx_ego > -5.0
                starts = u < (q_brake if near else p_brake)
                if near:
                    log_w += (
                        math.log(p_brake) - math.log(q_brake) if starts else math.log1p(-p_brake) - math.log1p(-q_brake)
                    )
            else:
                starts = u < p_brake
            if starts:
                size_key = combine4(key, stp, STREAM_BRAKE_SIZE, vid[i])
                decel[i] = truncated_normal(
                    sc[P_BD_MEAN], sc[P_BD_STD], sc[P_BD_LO], sc[P_BD_HI], to_unit(combine2(size_key, 0))
                )
                timer[i] = truncated_normal(
                    sc[P_BT_MEAN], sc[P_BT_STD], sc[P_BT_LO], sc[P_BT_HI], to_unit(combine2(size_key, 1))
                )
        if timer[i] > 0.0:
            acc[i] = min(acc[i], -decel[i])
        acc[i] = max(acc[i], -MAX_PHYSICAL_DECEL_MPS2)
    return log_w


@jit
def _incentive(sc, ln, x, vx, length, lane, traits, cc, order, rank, n, bits, lead, lead_gap, v_lead, acc, i, d):
    """MOBIL incentive of vehicle i for a change by d lanes, or -inf where the change is not allowed or not safe.
    The incentive includes the mandatory-merge bias where i's lane ends within the merge zone."""
    target = lane[i] + d
    if not _exists(sc, ln, target, x[i]):
        return -np.inf
    d_end_own = _to_end(sc, ln, lane[i], x[i])
    d_end_t = _to_end(sc, ln, target, x[i])
    if not (d_end_t >= sc[P_MERGE_ZONE] or d_end_t > d_end_own + 1.0):
        return -np.inf  # never into a lane that ends sooner, unless it ends later than one's own
    # old follower (in any lane this vehicle occupies), before and after the change
    f = _prev_in(order, rank, i, bits, bits[i])
    f_gap = _gap_behind(x, length, i, f)
    a_o = _follow(vx, traits, cc, f, f_gap, vx[i]) if f >= 0 else 0.0
    a_o_after = _follow(vx, traits, cc, f, f_gap + lead_gap[i] + length[i], v_lead[i]) if f >= 0 else 0.0
    # new leader and new follower in the target lane
    nl = _next_in(order, rank, n, i, bits, 1 << target)
    nf = _prev_in(order, rank, i, bits, 1 << target)
    nl_gap, nf_gap = _gap_ahead(x, length, i, nl), _gap_behind(x, length, i, nf)
    v_nl = vx[nl] if nl >= 0 else 0.0
    a_self_after = min(
        _follow(vx, traits, cc, i, nl_gap, v_nl), _follow(vx, traits, cc, i, d_end_t - 0.5 * length[i], 0.0)
    )
    a_n = _follow(vx, traits, cc, nf, nl_gap + nf_gap + length[i], v_nl) if nf >= 0 else 0.0
    a_n_after = _follow(vx, traits, cc, nf, nf_gap, vx[i]) if nf >= 0 else 0.0
    b_safe = traits[i, T_BSAFE]
    if not ((nf < 0 or a_n_after >= -b_safe) and nl_gap > 1.0 and nf_gap > 1.0 and a_self_after >= -b_safe):
        return -np.inf
    inc = (a_self_after - acc[i]) + traits[i, T_P] * ((a_n_after - a_n) + (a_o_after - a_o))
    if int(ln[L_MERGE_TO, lane[i]]) == target and d_end_own < sc[P_MERGE_ZONE]:  # mandatory: the lane ends
        urgency = clip(1.0 - d_end_own / sc[P_MERGE_ZONE], 0.0, 1.0)
        inc = inc + (MANDATORY_BIAS_MPS2 * urgency + traits[i, T_TH])
    return inc


@jit
def _lane_changes(
    sc,
    ln,
    stp,
    x,
    y,
    vx,
    length,
    lane,
    traits,
    cc,
    traffic,
    cd_in,
    order,
    rank,
    n,
    bits,
    lead,
    lead_gap,
    v_lead,
    acc,
    new_lane,
    cooldown,
):
    """MOBIL on decision steps: right (-1) at phase 0 of the decision period, left (+1) at half the period."""
    dt = sc[P_DT]
    phase = stp % LANE_DECISION_PERIOD_STEPS
    d = -1 if phase == 0 else (1 if phase == LANE_DECISION_PERIOD_STEPS // 2 else 0)
    for i in range(x.shape[0]):
        cooldown[i] = max(cd_in[i] - dt, 0.0)
        new_lane[i] = lane[i]
        if d == 0 or not traffic[i] or cooldown[i] > 0.0 or not abs(y[i] - _centre(sc, lane[i])) < SETTLED_M:
            continue
        inc = _incentive(
            sc, ln, x, vx, length, lane, traits, cc, order, rank, n, bits, lead, lead_gap, v_lead, acc, i, d
        )
        if inc > traits[i, T_TH]:
            new_lane[i] = lane[i] + d
            cooldown[i] = LANE_CHANGE_COOLDOWN_S


@jit
def _traffic_motion(sc, x, y, vx, traffic, acc, new_lane, o_x, o_y, o_vx, o_vy, o_h):
    """Constant-acceleration longitudinal step; lateral speed toward the lane centre, at most 1.5x the nominal
    lane-change speed and at most tan(MAX_LANE_CHANGE_HEADING_RAD) x the forward speed. Empty slots keep their
    position, with zero speed and heading."""
    dt = sc[P_DT]
    vlat_cap = 1.5 * sc[P_LC_SPEED]
    for i in range(x.shape[0]):
        if not traffic[i]:
            o_x[i], o_y[i], o_vx[i], o_vy[i], o_h[i] = x[i], y[i], 0.0, 0.0, 0.0
            continue
        dist, v_new = _distance_and_speed(vx[i], acc[i], dt)
        vlat_max = min(vlat_cap, MAX_LANE_CHANGE_SLOPE * v_new)
        vy = clip(LATERAL_GAIN_PER_S * (_centre(sc, new_lane[i]) - y[i]), -vlat_max, vlat_max)
        o_x[i] = x[i] + dist
        o_y[i] = y[i] + vy * dt
        o_vx[i], o_vy[i] = v_new, vy
        o_h[i] = vy if vy == 0.0 else math.atan2(vy, max(v_new, 0.1))  # atan2(+-0, v > 0) = +-0


@jit
def _ego_motion(sc, x, y, heading, speed, steer_prev, a_cmd, steer_cmd, o_x, o_y, o_vx, o_vy, o_h):
    """The action clipped to the limits (steering also to the rate limit), then one step of the kinematic bicycle
    (centre-of-gravity reference, Rajamani 2012, section 2.2). Returns (acceleration, steering angle, speed)."""
    dt = sc[P_DT]
    a_ego = clip(a_cmd, -sc[P_MAX_BRAKE], sc[P_MAX_ACCEL])
    steer = clip(steer_cmd, -sc[P_MAX_STEER], sc[P_MAX_STEER])
    max_dsteer = sc[P_MAX_STEER_RATE] * dt
    steer = clip(steer, steer_prev - max_dsteer, steer_prev + max_dsteer)
    beta = math.atan(sc[P_L_R] / sc[P_WHEELBASE] * math.tan(steer))
    dist, ev = _distance_and_speed(speed, a_ego, dt)
    h0 = heading[EGO]
    ex = x[EGO] + dist * math.cos(h0 + beta)
    ey = y[EGO] + dist * math.sin(h0 + beta)
    eh = h0 + dist / sc[P_L_R] * math.sin(beta)
    eh = (eh + math.pi) % (2.0 * math.pi) - math.pi
    o_x[EGO], o_y[EGO], o_h[EGO] = ex, ey, eh
    o_vx[EGO], o_vy[EGO] = ev * math.cos(eh + beta), ev * math.sin(eh + beta)
    return a_ego, steer, ev


@jit
def _leave(sc, valid, o_x, o_valid):
    """Vehicles more than LEAVE_MARGIN_M outside the simulated stretch around the ego, or past the road's end,
    leave; the ego always stays."""
    ex = o_x[EGO]
    lo_x, hi_x = ex - sc[P_BEHIND], ex + sc[P_AHEAD]
    for i in range(o_x.shape[0]):
        o_valid[i] = valid[i] and lo_x - LEAVE_MARGIN_M < o_x[i] < hi_x + LEAVE_MARGIN_M and o_x[i] < sc[P_ROAD_LEN]
    o_valid[EGO] = True


@jit
def _draw_trait(pt, key, new_id, t):
    return truncated_normal(
        pt[D_MEAN, t], pt[D_STD, t], pt[D_LO, t], pt[D_HI, t], to_unit(combine5(key, STREAM_TRAITS, new_id, t, 0))
    )


@jit
def _spawn_lane(sc, ln, key, stp, lo_x, hi_x, o_valid, o_lane):
    """The lane most short of its density (plus a uniform draw, so that ties break at random), -1 if none is
    short by more than half a vehicle."""
    best, best_score = -1, -np.inf
    lane_key = combine3(key, stp, STREAM_SPAWN)
    for lane in range(int(sc[P_NUM_LANES])):
        count = 0
        for j in range(1, o_valid.shape[0]):
            if o_valid[j] and o_lane[j] == lane:
                count += 1
        seg = max(min(hi_x, ln[L_END, lane]) - max(lo_x, ln[L_START, lane]), 0.0)
        missing = ln[L_DENSITY, lane] * seg - count
        if missing > 0.5:
            score = missing + to_unit(combine2(lane_key, lane))
            if score > best_score:  # the first lane wins a tie
                best, best_score = lane, score
    return best


@jit
def _spawn(
    sc,
    ln,
    pt,
    key,
    stp,
    new_id,
    o_x,
    o_y,
    o_vx,
    o_vy,
    o_h,
    o_len,
    o_wid,
    o_valid,
    o_vid,
    o_lane,
    o_traits,
    o_ys,
    o_timer,
    o_decel,
    o_cd,
):
    """On entry steps, at most one vehicle enters the lane most short of its density: at the back end of the
    simulated stretch if its driver is faster than the ego (by more than 1 m/s), else at the front, where the
    lane runs on for at least the merge zone and the gaps allow it. Returns 1 if a vehicle entered, else 0."""
    if sc[P_MAX_DENSITY] <= 0.0 or stp % SPAWN_PERIOD_STEPS != 0:
        return 0
    slot = -1
    for j in range(o_valid.shape[0]):
        if not o_valid[j]:
            slot = j
            break
    if slot < 0:
        return 0
    ego_x = o_x[EGO]
    lo_x, hi_x = ego_x - sc[P_BEHIND], ego_x + sc[P_AHEAD]
    lane = _spawn_lane(sc, ln, key, stp, lo_x, hi_x, o_valid, o_lane)
    if lane < 0:
        return 0
    v0, s0, t = (
        _draw_trait(pt, key, new_id, T_V0),
        _draw_trait(pt, key, new_id, T_S0),
        _draw_trait(pt, key, new_id, T_T),
    )
    length = truncated_normal(
        sc[P_LEN_MEAN],
        sc[P_LEN_STD],
        sc[P_LEN_LO],
        sc[P_LEN_HI],
        to_unit(combine4(key, STREAM_TRAITS, new_id, SIZE_SALTS[0])),
    )
    width = truncated_normal(
        sc[P_WID_MEAN],
        sc[P_WID_STD],
        sc[P_WID_LO],
        sc[P_WID_HI],
        to_unit(combine4(key, STREAM_TRAITS, new_id, SIZE_SALTS[1])),
    )
    xs = lo_x if v0 > o_vx[EGO] + 1.0 else hi_x
    if not (_exists(sc, ln, lane, xs) and _to_end(sc, ln, lane, xs) >= sc[P_MERGE_ZONE]):
        return 0  # nobody appears just before a lane end
    # nearest occupant of the lane ahead of and behind the entry point (the first slot wins a tie)
    ga, gb, v_lead, v_foll = np.inf, np.inf, np.inf, 0.0
    bit = 1 << lane
    for j in range(o_valid.shape[0]):
        if not (o_valid[j] and _lane_bits(sc, o_y[j], _half_extent_y(o_len[j], o_wid[j], o_h[j]), o_lane[j]) & bit):
            continue
        dx = o_x[j] - xs
        half = 0.5 * (o_len[j] + length)
        if dx >= 0:
            if dx - half < ga:
                ga, v_lead = dx - half, o_vx[j]
        elif -dx - half < gb:
            gb, v_foll = -dx - half, o_vx[j]
    speed = min(v0 * sc[P_INIT_FRAC], sc[P_SPEED_LIMIT] * 1.15)
    if ga < 2.0 * (s0 + speed * t):
        speed = min(speed, v_lead)
    if not ga >= max(s0 + speed * t, MIN_SPAWN_GAP_M):
        return 0
    closing = max(v_foll - speed, 0.0)
    if not gb >= 2.0 + 1.2 * v_foll + closing * closing / 6.0 + MIN_SPAWN_GAP_M:
        return 0
    o_valid[slot] = True
    o_x[slot], o_y[slot], o_vx[slot], o_vy[slot], o_h[slot] = xs, _centre(sc, lane), speed, 0.0, 0.0
    o_len[slot], o_wid[slot], o_vid[slot], o_lane[slot] = length, width, new_id, lane
    for k in range(NUM_TRAITS):
        o_traits[slot, k] = _draw_trait(pt, key, new_id, k)
    o_ys[slot], o_timer[slot], o_decel[slot], o_cd[slot] = 0, 0.0, 0.0, 0.0
    return 1


@jit
def boxes_overlap(ax, ay, al, aw, ah, bx, by, bl, bw, bh):
    """Separating-axis test of two oriented rectangles (the four edge normals suffice, Gottschalk, Lin, Manocha
    1996); touching counts as overlapping. The same operations as :func:`wmplan.sim.collision.boxes_overlap`."""
    dx, dy = bx - ax, by - ay
    ca, sa, cb, sb = math.cos(ah), math.sin(ah), math.cos(bh), math.sin(bh)
    ahl, ahw, bhl, bhw = 0.5 * al, 0.5 * aw, 0.5 * bl, 0.5 * bw
    c_uu = abs(ca * cb + sa * sb)
    c_uv = abs(-ca * sb + sa * cb)
    c_vu = abs(-sa * cb + ca * sb)
    c_vv = abs(sa * sb + ca * cb)
    if abs(dx * ca + dy * sa) > ahl + bhl * c_uu + bhw * c_uv:
        return False
    if abs(-dx * sa + dy * ca) > ahw + bhl * c_vu + bhw * c_vv:
        return False
    if abs(dx * cb + dy * sb) > bhl + ahl * c_uu + ahw * c_vu:
        return False
    return not abs(-dx * sb + dy * cb) > bhw + ahl * c_uv + ahw * c_vv


@jit
def _ego_collides(o_x, o_y, o_len, o_wid, o_h, o_valid):
    """The ego's footprint overlaps another vehicle's. Pairs farther apart along the road than the sum of their
    half lengths plus half widths cannot overlap and are skipped."""
    reach_e = 0.5 * (o_len[EGO] + o_wid[EGO])
    for j in range(1, o_x.shape[0]):
        if not o_valid[j] or abs(o_x[j] - o_x[EGO]) > reach_e + 0.5 * (o_len[j] + o_wid[j]):
            continue
        if boxes_overlap(
            o_x[EGO], o_y[EGO], o_len[EGO], o_wid[EGO], o_h[EGO], o_x[j], o_y[j], o_len[j], o_wid[j], o_h[j]
        ):
            return True
    return False


@jit
def _ego_offroad(sc, ln, x, y, length, width, heading):
    """A corner of the ego's footprint lies outside every lane that exists at that corner."""
    c, s = math.cos(heading), math.sin(heading)
    for k in range(4):
        sx = 1.0 if k == 0 or k == 3 else -1.0
        sy = 1.0 if k < 2 else -1.0
        lx, ly = sx * (0.5 * length), sy * (0.5 * width)
        cx, cy = x + c * lx - s * ly, y + s * lx + c * ly
        if not _exists(sc, ln, int(math.floor(cy / sc[P_LANE_W])), cx):
            return True
    return False


@jit
def _outcome(sc, ln, o_x, o_y, o_len, o_wid, o_h, o_valid, ended, s, o_ended, info):
    """The ego's collision, off-road and goal checks of scene s after its step into ``info[:, s]``; the outcome
    flags ``ended[:, s]`` (collided, off-road, reached) are sticky (``o_ended``: the new ones)."""
    col = _ego_collides(o_x, o_y, o_len, o_wid, o_h, o_valid)
    ex, ey = o_x[EGO], o_y[EGO]
    off = _ego_offroad(sc, ln, ex, ey, o_len[EGO], o_wid[EGO], o_h[EGO])
    goal = ex >= sc[P_GOAL_X] and ln[L_GOAL, _lane_of(sc, ey)] != 0.0 and not col and not off
    info[0, s], info[1, s], info[2, s] = col, off, goal
    o_ended[E_COLLIDED, s] = ended[E_COLLIDED, s] or col
    o_ended[E_OFFROAD, s] = ended[E_OFFROAD, s] or off
    o_ended[E_REACHED, s] = ended[E_REACHED, s] or (goal and not ended[E_COLLIDED, s] and not ended[E_OFFROAD, s])


# --- one scene, and a range of scenes ------------------------------------------------------------------------------


@jit
def _step_scene(
    sc,
    ln,
    pt,
    key,
    stp,
    new_id,
    x,
    y,
    vx,
    heading,
    length,
    width,
    valid,
    vid,
    lane,
    traits,
    ys_old,
    timer_in,
    decel_in,
    cd_in,
    ego_speed,
    ego_steer,
    a_cmd,
    steer_cmd,
    o_x,
    o_y,
    o_vx,
    o_vy,
    o_h,
    o_len,
    o_wid,
    o_valid,
    o_vid,
    o_lane,
    o_traits,
    o_ys,
    o_timer,
    o_decel,
    o_cd,
    acc,
    order,
    rank,
    bits,
    centre_bit,
    lead,
    merge_to,
    new_lane,
    lead_gap,
    v_lead,
    traffic,
    merger,
    cc,
):
    """Advance one scene by one step (module docstring). Writes the scene's new rows into the ``o_*`` arrays
    (``o_len``, ``o_wid``, ``o_vid``, ``o_traits`` already hold the old rows) and the applied accelerations into
    ``acc``; ``order`` ... ``cc`` are work space (V,). Returns (log-weight, ego steering, ego speed, vehicles
    entered)."""
    v_n = x.shape[0]
    for i in range(v_n):
        traffic[i] = valid[i] and i != EGO
        acc[i] = 0.0
        cc[i] = _c(traits, i) if valid[i] else 0.0  # the IDM's 1 / (2 sqrt(a b)) of each driver, once a step
    # 1. neighbours
    _occupancy(sc, x, y, length, width, heading, valid, lane, bits, centre_bit)
    n = _sort(x, valid, order, rank)
    any_merger = _mergers(sc, ln, x, y, valid, lane, merger, merge_to)
    _leaders(
        x, vx, length, traffic, ys_old, order, rank, n, bits, any_merger, merger, centre_bit, lead, lead_gap, v_lead
    )
    # 2. car following
    _car_following(sc, ln, x, vx, length, lane, traits, cc, traffic, lead_gap, v_lead, acc)
    # 3. yielding to merging vehicles
    log_w = _yielding(
        sc,
        ln,
        key,
        stp,
        x,
        vx,
        length,
        lane,
        vid,
        traits,
        cc,
        traffic,
        ys_old,
        order,
        rank,
        n,
        any_merger,
        merger,
        merge_to,
        lead_gap,
        v_lead,
        acc,
        o_ys,
    )
    # 4. hard braking
    log_w += _braking(sc, key, stp, x, vx, vid, traffic, timer_in, decel_in, acc, o_timer, o_decel)
    # 5. lane changes
    _lane_changes(
        sc,
        ln,
        stp,
        x,
        y,
        vx,
        length,
        lane,
        traits,
        cc,
        traffic,
        cd_in,
        order,
        rank,
        n,
        bits,
        lead,
        lead_gap,
        v_lead,
        acc,
        new_lane,
        o_cd,
    )
    # 6. motion
    _traffic_motion(sc, x, y, vx, traffic, acc, new_lane, o_x, o_y, o_vx, o_vy, o_h)
    a_ego, steer, ev = _ego_motion(sc, x, y, heading, ego_speed, ego_steer, a_cmd, steer_cmd, o_x, o_y, o_vx, o_vy, o_h)
    acc[EGO] = a_ego
    for i in range(v_n):
        o_lane[i] = new_lane[i] if valid[i] else lane[i]
    o_lane[EGO] = _lane_of(sc, o_y[EGO])
    # 7. leave, enter
    _leave(sc, valid, o_x, o_valid)
    for i in range(v_n):
        if not o_valid[i]:
            o_ys[i], o_timer[i] = 0, 0.0
    entered = _spawn(
        sc,
        ln,
        pt,
        key,
        stp + 1,
        new_id,
        o_x,
        o_y,
        o_vx,
        o_vy,
        o_h,
        o_len,
        o_wid,
        o_valid,
        o_vid,
        o_lane,
        o_traits,
        o_ys,
        o_timer,
        o_decel,
        o_cd,
    )
    return log_w, steer, ev, entered


@jit
def step_range(
    a,
    b,
    group,
    p_scalars,
    p_lanes,
    p_traits,
    key,
    vf,
    vi,
    valid,
    ys,
    traits,
    sf,
    si,
    ended,
    action,
    o_vf,
    o_vi,
    o_valid,
    o_ys,
    o_traits,
    o_sf,
    o_si,
    o_ended,
    info,
    i_acc,
    i_log_w,
    scratch_i,
    scratch_f,
    scratch_b,
):
    """Advance scenes [a, b) by one step: the state's packed arrays in, the new state's and the step's outcome
    arrays out (``o_*``, ``info``, ``i_*``). Layouts (:data:`VF_FIELDS` and the other tables): ``vf`` (NVF, S, V)
    float64, ``vi`` (NVI, S, V) int64, ``valid`` (S, V) bool, ``ys`` (S, V) int8, ``traits`` (S, V, NT), ``sf``
    (NSF, S) float64, ``si`` (NSI, S) int64, ``ended`` (NE, S) bool; ``info`` (3, S) bool (collision, off-road,
    goal), ``i_acc`` (S, V), ``i_log_w`` (S,). ``o_traits`` already holds the old traits (or is ``traits`` itself
    on steps where nobody may enter). Scene s uses parameter row ``group[s]``; only rows [a, b) are touched.
    ``scratch_*``: work space of this call only ((7, V) int64, (3, V) float64, (2, V) bool): the kernel runs
    without numba's reference counting (no allocation inside), so the caller provides it."""
    order, rank, bits, centre_bit = scratch_i[0], scratch_i[1], scratch_i[2], scratch_i[3]
    lead, merge_to, new_lane = scratch_i[4], scratch_i[5], scratch_i[6]
    lead_gap, v_lead, cc, traffic, merger = scratch_f[0], scratch_f[1], scratch_f[2], scratch_b[0], scratch_b[1]
    for s in range(a, b):
        g = group[s]
        sc, ln, pt = p_scalars[g], p_lanes[g], p_traits[g]
        new_id = si[S_NEXT_ID, s]
        o_len, o_wid, o_vid = o_vf[F_LEN, s], o_vf[F_WID, s], o_vi[I_VID, s]
        for i in range(o_len.shape[0]):
            o_len[i], o_wid[i], o_vid[i] = vf[F_LEN, s, i], vf[F_WID, s, i], vi[I_VID, s, i]
        o_x, o_y, o_h = o_vf[F_X, s], o_vf[F_Y, s], o_vf[F_H, s]
        log_w, steer, ev, entered = _step_scene(
            sc,
            ln,
            pt,
            key[s],
            si[S_STEP, s],
            new_id,
            vf[F_X, s],
            vf[F_Y, s],
            vf[F_VX, s],
            vf[F_H, s],
            vf[F_LEN, s],
            vf[F_WID, s],
            valid[s],
            vi[I_VID, s],
            vi[I_LANE, s],
            traits[s],
            ys[s],
            vf[F_TIMER, s],
            vf[F_DECEL, s],
            vf[F_CD, s],
            sf[S_EGO_SPEED, s],
            sf[S_EGO_STEER, s],
            action[s, 0],
            action[s, 1],
            o_x,
            o_y,
            o_vf[F_VX, s],
            o_vf[F_VY, s],
            o_h,
            o_len,
            o_wid,
            o_valid[s],
            o_vid,
            o_vi[I_LANE, s],
            o_traits[s],
            o_ys[s],
            o_vf[F_TIMER, s],
            o_vf[F_DECEL, s],
            o_vf[F_CD, s],
            i_acc[s],
            order,
            rank,
            bits,
            centre_bit,
            lead,
            merge_to,
            new_lane,
            lead_gap,
            v_lead,
            traffic,
            merger,
            cc,
        )
        o_si[S_STEP, s], o_si[S_NEXT_ID, s] = si[S_STEP, s] + 1, new_id + entered
        o_sf[S_EGO_SPEED, s], o_sf[S_EGO_STEER, s], i_log_w[s] = ev, steer, log_w
        _outcome(sc, ln, o_x, o_y, o_len, o_wid, o_h, o_valid[s], ended, s, o_ended, info)
