"""A plain per-vehicle Python implementation of one simulator step: the slow, obviously correct reference.

Not for use in simulations: it is some hundreds of times slower than :func:`wmplan.sim.engine.step`.

:func:`step_loop` does what :func:`wmplan.sim.engine.step` does, scene by scene and vehicle by vehicle, with
Python floats and the ``math`` module. It exists for two reasons: the equivalence test
(``tests/test_loop_reference.py``) checks the compiled engine against it, and the throughput benchmark
(``benchmarks/sim_throughput.py``) times it next to the engine, so that the speed-up figure compares the same
step done two ways. It is written for reading, not for speed, but without deliberate waste: state is turned into
Python lists once per call, neighbours are found by walking a sorted list, and random numbers come from a
pure-integer copy of the package's counter-based hash. It has no importance-sampling tilt (``params.tilt`` is
ignored).

The rules (same order as the engine):

1. neighbours: vehicles sorted by centre position (a stable sort, so the slot number breaks ties); a vehicle
   occupies a lane if its body reaches ``BAND_EPS_M`` into it or the lane is the one it is in or moving to; its
   leader (follower) is the nearest vehicle ahead (behind) in sorted order that occupies one of its lanes (the
   lateral extent of a body is that of its footprint rotated by its heading);
2. IDM (Treiber, Hennecke, Helbing 2000; book form of s* from Treiber & Kesting 2013) toward the leader and, if
   any lane of the road ends, toward the end of its own lane as a standing obstacle;
3. yielding: a traffic driver that is not itself merging and has a merging vehicle ahead (within the yield
   window) whose merge target is its lane decides once, at random, whether to yield; if so it follows it, if not
   it closes up on its leader with a bolder desired speed and headway, and (from the next step on) counts a
   merging vehicle as its leader only once the merger's centre is in its lane;
4. hard-braking events (random start, random size and duration), then the physical braking limit;
5. MOBIL (Kesting, Treiber, Helbing 2007) on decision steps, right/left at different phases, with the
   mandatory-merge bias;
6. motion: constant-acceleration longitudinal step, proportional lateral motion (its speed limited, also by the
   forward speed), kinematic bicycle for the ego;
7. vehicles outside the window leave; every ``SPAWN_PERIOD_STEPS`` at most one vehicle enters (traits and size
   drawn from truncated normals, never just before a lane end); then the ego's
   collision (separating axes), off-road and goal checks.

Shapes: S scenes, V vehicle slots (slot 0 is the ego), L lanes, NT traits. Results on this simplified traffic
model certify nothing about a real vehicle.
"""

from __future__ import annotations

import math
import statistics

import numpy as np

from wmplan.sim.behaviour import MIN_GAP_FLOOR_M
from wmplan.sim.engine import StepInfo
from wmplan.sim.kernel import (
    BAND_EPS_M,
    LANE_DECISION_PERIOD_STEPS,
    LATERAL_GAIN_PER_S,
    MAX_LANE_CHANGE_SLOPE,
    MIN_SPAWN_GAP_M,
    NON_YIELD_HEADWAY_FACTOR,
    NON_YIELD_SPEEDUP,
    SETTLED_M,
    SPAWN_PERIOD_STEPS,
)
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
from wmplan.sim.state import EGO, TrafficState

INF = math.inf

# --- counter-based random numbers, in Python integers ---------------------------------------------------------------
# The same splitmix64 finaliser as wmplan.rng (Steele, Lea, Flood, OOPSLA 2014), written with explicit 64-bit
# wrapping so that a scene draws exactly the numbers the engine draws.
_MASK64 = (1 << 64) - 1
_GOLDEN = 0x9E3779B97F4A7C15
_M1 = 0xBF58476D1CE4E5B9
_M2 = 0x94D049BB133111EB
_H0 = 0x243F6A8885A308D3
_INV53 = 1.0 / float(1 << 53)
# Stream ids of wmplan.rng.
_STREAM_TRAITS, _STREAM_SPAWN, _STREAM_YIELD, _STREAM_BRAKE_START, _STREAM_BRAKE_SIZE = 1, 2, 3, 4, 5


def mix64(z: int) -> int:
    """splitmix64 finaliser of one 64-bit unsigned integer."""
    z = (z + _GOLDEN) & _MASK64
    z = ((z ^ (z >> 30)) * _M1) & _MASK64
    z = ((z ^ (z >> 27)) * _M2) & _MASK64
    return z ^ (z >> 31)


def combine(*parts: int) -> int:
    """Hash integer counters into one 64-bit value (negative counters wrap as two's complement)."""
    h = _H0
    for p in parts:
        h = mix64(h ^ (p & _MASK64))
    return h


def uniform(*parts: int) -> float:
    """Uniform variate in [0, 1) from the counters."""
    return (combine(*parts) >> 11) * _INV53


_STD_NORMAL = statistics.NormalDist()  # inv_cdf: Wichura's algorithm AS 241 (Applied Statistics, 1988)


def std_normal_cdf(z: float) -> float:
    """Phi(z) = erfc(-z / sqrt 2) / 2."""
    return 0.5 * math.erfc(-z / math.sqrt(2.0))


def truncated_normal(mean: float, std: float, low: float, high: float, *parts: int) -> float:
    """Normal(mean, std) truncated to [low, high] by inverse transform sampling of one counter-based uniform:
    u' = Phi(a) + u (Phi(b) - Phi(a)), x = mean + std Phi^-1(u'); std = 0 gives the mean (clipped)."""
    u = uniform(*parts)
    if not std > 0.0:
        return clip(mean, low, high)
    a = std_normal_cdf((low - mean) / std)
    b = std_normal_cdf((high - mean) / std)
    p = clip(a + u * (b - a), 1e-300, 1.0 - 1e-16)
    return clip(mean + std * _STD_NORMAL.inv_cdf(p), low, high)


# --- scalar laws ------------------------------------------------------------------------------------------------------


def idm(v: float, v0: float, gap: float, dv: float, t: float, s0: float, a: float, c: float) -> float:
    """IDM acceleration, delta = 4: a [1 - (v/v0)^4 - (s*/s)^2], s* = s0 + max(0, v T + v dv c), c = 1/(2 sqrt(ab)).

    The gap is floored at ``MIN_GAP_FLOOR_M`` (the package's convention, to stay finite); gap = inf is a free road.
    """
    s_star = s0 + max(0.0, v * (t + dv * c))
    r = v / v0
    r = r * r
    inter = s_star / max(gap, MIN_GAP_FLOOR_M)
    return a * (1.0 - r * r - inter * inter)


def distance_and_speed(v: float, a: float, dt: float) -> tuple[float, float]:
    """Distance and final speed over dt at constant acceleration, stopping (not reversing) at zero speed."""
    v_new = v + a * dt
    if v_new < 0.0:
        dist = -(v * v) / (2.0 * a) if a < 0.0 else 0.0
    else:
        dist = v * dt + 0.5 * a * dt**2
    return dist, max(v_new, 0.0)


def clip(value: float, lo: float, hi: float) -> float:
    """``value`` limited to [lo, hi]."""
    return min(max(value, lo), hi)


def boxes_overlap(ax, ay, al, aw, ah, bx, by, bl, bw, bh) -> bool:
    """Separating-axis test of two oriented rectangles (Ericson 2005, ch. 4); touching counts as overlapping."""
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


class Road:
    """The scenario numbers of :class:`SimParams` as Python floats and lists (read once per call)."""

    def __init__(self, p: SimParams):
        self.dt = float(p.dt_s)
        self.num_lanes = int(p.num_lanes)
        self.lane_w = float(p.lane_width_m)
        self.road_len = float(p.road_length_m)
        self.speed_limit = float(p.speed_limit_mps)
        self.start = [float(v) for v in p.lane_start_m]
        self.end = [float(v) for v in p.lane_end_m]
        self.ends = [bool(v) for v in p.lane_ends_on_road]
        self.any_end = any(self.ends)
        self.merge_target = [int(v) for v in p.merge_target]
        self.density = [float(v) for v in p.density_veh_per_m]
        self.behind, self.ahead = float(p.window_behind_m), float(p.window_ahead_m)
        self.t_mean, self.t_std = [float(v) for v in p.trait_mean], [float(v) for v in p.trait_std]
        self.t_lo, self.t_hi = [float(v) for v in p.trait_lo], [float(v) for v in p.trait_hi]
        self.brake_prob = float(p.brake_prob_per_step)
        self.brake_decel, self.brake_duration = p.brake_decel, p.brake_duration
        self.length_dist, self.width_dist = p.length_dist, p.width_dist
        self.vlat_max = 1.5 * float(p.lane_change_speed_mps)
        self.merge_zone, self.yield_window = float(p.merge_zone_m), float(p.yield_window_m)
        self.init_frac = float(p.initial_speed_fraction)
        self.wheelbase, self.l_r = float(p.wheelbase_m), float(p.l_r_m)
        self.max_accel, self.max_brake = float(p.max_accel_mps2), float(p.max_brake_mps2)
        self.max_steer, self.max_dsteer = float(p.max_steer_rad), float(p.max_steer_rate_radps) * self.dt
        self.goal_x = float(p.goal_x_m)
        self.goal_lanes = [bool(v) for v in p.goal_lane_mask]

    def centre(self, lane: int) -> float:
        """Lateral position (m) of the centre line of ``lane`` (0 = the rightmost)."""
        return (lane + 0.5) * self.lane_w

    def lane_of(self, y: float) -> int:
        """The lane whose strip holds lateral position ``y`` (m), clipped to the road's lanes."""
        return min(max(math.floor(y / self.lane_w), 0), self.num_lanes - 1)

    def exists(self, lane: int, x: float) -> bool:
        """Whether ``lane`` is a lane of the road and is open at longitudinal position ``x`` (m)."""
        return 0 <= lane < self.num_lanes and self.start[lane] <= x <= self.end[lane]

    def to_end(self, lane: int, x: float) -> float:
        """Metres from x to the end of the lane (clipped to the road's lanes), inf if it runs to the road's end."""
        lane = min(max(lane, 0), self.num_lanes - 1)
        return self.end[lane] - x if self.ends[lane] else INF

    def occupies(self, y: float, hw: float, lane_now: int, lane: int) -> bool:
        """The body (lateral half-extent ``hw``) reaches BAND_EPS_M into ``lane``, or ``lane`` is the one the
        vehicle is in or moving to."""
        lo = lane * self.lane_w
        return lane_now == lane or (y + hw > lo + BAND_EPS_M and y - hw < lo + self.lane_w - BAND_EPS_M)


def half_extent_y(length: float, width: float, heading: float) -> float:
    """Lateral half-extent of a footprint rotated by ``heading``: w/2 cos h + l/2 |sin h|."""
    return 0.5 * width * math.cos(heading) + 0.5 * (length * abs(math.sin(heading)))


# --- one scene ------------------------------------------------------------------------------------------------------


def _scene_step(sc: dict, a_cmd: float, steer_cmd: float, rd: Road) -> tuple[dict, dict]:
    """Advance one scene (a dict of Python lists of length V, plus scalars) by one step."""
    dt, num_lanes = rd.dt, rd.num_lanes
    key, stp = sc["key"], sc["step"]
    x, y, vx, length, width = sc["x_m"], sc["y_m"], sc["vx_mps"], sc["length_m"], sc["width_m"]
    valid, lane, tr, vid = sc["valid"], sc["lane"], sc["traits"], sc["vehicle_id"]
    v_n = len(x)
    traffic = [valid[i] and i != EGO for i in range(v_n)]
    c = [0.5 / math.sqrt(tr[i][T_A] * tr[i][T_B]) for i in range(v_n)]

    def follow(j: int, gap: float, v_lead: float) -> float:
        """IDM acceleration of vehicle j (its own speed and traits) behind a leader at ``gap`` going ``v_lead``."""
        t = tr[j]
        return idm(vx[j], t[T_V0], gap, vx[j] - v_lead, t[T_T], t[T_S0], t[T_A], c[j])

    # --- 1. neighbours ---
    order = sorted((i for i in range(v_n) if valid[i]), key=lambda i: x[i])  # stable: slot order breaks ties
    rank = {slot: r for r, slot in enumerate(order)}
    head = sc["heading_rad"]
    hw = [half_extent_y(length[i], width[i], head[i]) for i in range(v_n)]
    occ = [[valid[i] and rd.occupies(y[i], hw[i], lane[i], ln) for ln in range(num_lanes)] for i in range(v_n)]

    def shares_lane(i: int, j: int) -> bool:
        return any(occ[i][ln] and occ[j][ln] for ln in range(num_lanes))

    def ahead_of(i: int, wanted) -> int:
        """Slot of the nearest vehicle after i in position order satisfying ``wanted(j)``, or -1."""
        for j in order[rank[i] + 1 :]:
            if wanted(j):
                return j
        return -1

    def behind_of(i: int, wanted) -> int:
        for j in reversed(order[: rank[i]]):
            if wanted(j):
                return j
        return -1

    def gap_ahead(i: int, j: int) -> float:
        return INF if j < 0 else (x[j] - x[i]) - 0.5 * (length[j] + length[i])

    def gap_behind(i: int, j: int) -> float:
        return INF if j < 0 else (x[i] - x[j]) - 0.5 * (length[j] + length[i])

    # mergers (from the state before the step): vehicles whose lane ends within the merge zone
    lane_m = [rd.lane_of(y[i]) if i == EGO else lane[i] for i in range(v_n)]  # the ego's own lane is its centre's
    merge_to = [rd.merge_target[lane_m[i]] for i in range(v_n)]
    is_merger = [valid[i] and rd.to_end(lane_m[i], x[i]) < rd.merge_zone and merge_to[i] >= 0 for i in range(v_n)]

    def shares_lane_strict(i: int, j: int) -> bool:
        """As shares_lane, but a merging vehicle j occupies only the lane of its centre."""
        if not is_merger[j]:
            return shares_lane(i, j)
        cl = rd.lane_of(y[j])
        return valid[j] and occ[i][cl]

    lead = [-1] * v_n
    for i in range(v_n):
        if traffic[i]:
            if sc["yield_state"][i] == 2:  # a driver not yielding ignores a merging body over the line
                lead[i] = ahead_of(i, lambda j, i=i: shares_lane_strict(i, j))
            else:
                lead[i] = ahead_of(i, lambda j, i=i: shares_lane(i, j))

    # --- 2. car following ---
    acc = [math.nan] * v_n  # stays NaN for empty slots (the engine's values there are never used)
    for i in range(v_n):
        if traffic[i]:
            j = lead[i]
            acc[i] = follow(i, gap_ahead(i, j), vx[j] if j >= 0 else 0.0)
            if rd.any_end:
                acc[i] = min(acc[i], follow(i, rd.to_end(lane[i], x[i]) - 0.5 * length[i], 0.0))

    # --- 3. yielding to merging vehicles ---
    ys = [0] * v_n
    for i in range(v_n) if any(is_merger) else ():
        if not traffic[i] or is_merger[i]:
            continue
        own = min(max(lane[i], 0), num_lanes - 1)
        p = ahead_of(i, lambda j, own=own: is_merger[j] and merge_to[j] == own)
        if p < 0 or not x[p] - x[i] < rd.yield_window:
            continue
        ys[i] = sc["yield_state"][i]
        if ys[i] == 0:  # the interaction begins now: draw the decision
            u = uniform(combine(key, stp, _STREAM_YIELD), vid[i])
            ys[i] = 1 if u < tr[i][T_YIELD] else 2
        if ys[i] == 1:
            a_yield = follow(i, max(gap_ahead(i, p), tr[i][T_S0]), vx[p])
            acc[i] = min(acc[i], max(a_yield, -tr[i][T_BSAFE]))
        elif ys[i] == 2:  # not yielding: close up on the leader, with a higher desired speed, shorter headway
            t = tr[i]
            j = lead[i]
            bold = idm(
                vx[i],
                t[T_V0] * NON_YIELD_SPEEDUP,
                gap_ahead(i, j),
                vx[i] - (vx[j] if j >= 0 else 0.0),
                t[T_T] * NON_YIELD_HEADWAY_FACTOR,
                t[T_S0],
                t[T_A],
                c[i],
            )
            if rd.any_end:
                bold = min(
                    bold,
                    idm(
                        vx[i],
                        t[T_V0] * NON_YIELD_SPEEDUP,
                        rd.to_end(lane[i], x[i]) - 0.5 * length[i],
                        vx[i],
                        t[T_T] * NON_YIELD_HEADWAY_FACTOR,
                        t[T_S0],
                        t[T_A],
                        c[i],
                    ),
                )
            acc[i] = bold

    # --- 4. hard-braking events ---
    timer = [max(t - dt, 0.0) for t in sc["brake_timer_s"]]
    decel = list(sc["brake_decel_mps2"])
    ev_key = combine(key, stp, _STREAM_BRAKE_START)
    for i in range(v_n):
        if not traffic[i]:
            continue
        if rd.brake_prob > 0.0 and timer[i] <= 0.0 and vx[i] > 5.0 and uniform(ev_key, vid[i]) < rd.brake_prob:
            size_key = combine(key, stp, _STREAM_BRAKE_SIZE, vid[i])
            decel[i] = truncated_normal(*rd.brake_decel, size_key, 0)
            timer[i] = truncated_normal(*rd.brake_duration, size_key, 1)
        if timer[i] > 0.0:
            acc[i] = min(acc[i], -decel[i])
        acc[i] = max(acc[i], -MAX_PHYSICAL_DECEL_MPS2)

    # --- 5. lane changes (MOBIL) ---
    cooldown = [max(cd - dt, 0.0) for cd in sc["cooldown_s"]]
    new_lane = list(lane)
    for i in range(v_n):
        if not traffic[i] or not abs(y[i] - rd.centre(lane[i])) < SETTLED_M or cooldown[i] > 0.0:
            continue
        d_end_own = rd.to_end(lane[i], x[i])
        best_inc, best_dir = -INF, 0
        for d in (-1, 1):
            # right (-1) and left (+1) are reconsidered at different phases of the decision period
            phase = 0 if d < 0 else LANE_DECISION_PERIOD_STEPS // 2
            if stp % LANE_DECISION_PERIOD_STEPS != phase:
                continue
            target = lane[i] + d
            if not rd.exists(target, x[i]):
                continue
            d_end_t = rd.to_end(target, x[i])
            if not (d_end_t >= rd.merge_zone or d_end_t > d_end_own + 1.0):
                continue  # never into a lane that ends sooner, unless it ends later than one's own
            # old follower (in any lane this vehicle occupies), before and after the change
            f = behind_of(i, lambda j, i=i: shares_lane(i, j))
            f_gap = gap_behind(i, f)
            j = lead[i]
            v_lead = vx[j] if j >= 0 else 0.0
            a_o = follow(f, f_gap, vx[i]) if f >= 0 else 0.0
            a_o_after = follow(f, f_gap + gap_ahead(i, j) + length[i], v_lead) if f >= 0 else 0.0
            # new leader and new follower in the target lane
            nl = ahead_of(i, lambda j, t=target: occ[j][t])
            nf = behind_of(i, lambda j, t=target: occ[j][t])
            nl_gap, nf_gap = gap_ahead(i, nl), gap_behind(i, nf)
            v_nl = vx[nl] if nl >= 0 else 0.0
            a_self_after = min(follow(i, nl_gap, v_nl), follow(i, d_end_t - 0.5 * length[i], 0.0))
            a_n = follow(nf, nl_gap + nf_gap + length[i], v_nl) if nf >= 0 else 0.0
            a_n_after = follow(nf, nf_gap, vx[i]) if nf >= 0 else 0.0
            inc = (a_self_after - acc[i]) + tr[i][T_P] * ((a_n_after - a_n) + (a_o_after - a_o))
            if rd.merge_target[lane[i]] == target and d_end_own < rd.merge_zone:  # mandatory: the lane ends
                urgency = clip(1.0 - d_end_own / rd.merge_zone, 0.0, 1.0)
                inc = inc + (MANDATORY_BIAS_MPS2 * urgency + tr[i][T_TH])
            b_safe = tr[i][T_BSAFE]
            safe = (nf < 0 or a_n_after >= -b_safe) and nl_gap > 1.0 and nf_gap > 1.0 and a_self_after >= -b_safe
            if safe and inc > tr[i][T_TH] and inc > best_inc:
                best_inc, best_dir = inc, d
        if best_dir != 0:
            new_lane[i] = lane[i] + best_dir
            cooldown[i] = LANE_CHANGE_COOLDOWN_S

    # --- 6. motion ---
    x_new, y_new = list(x), list(y)
    vx_new, vy_new, head_new = [0.0] * v_n, [0.0] * v_n, [0.0] * v_n
    for i in range(v_n):
        if not traffic[i]:
            continue
        dist, v_new = distance_and_speed(vx[i], acc[i], dt)
        x_new[i] = x[i] + dist
        # lateral speed at most 1.5x the nominal lane-change speed and at most the forward speed x tan(max heading)
        vlat_max = min(rd.vlat_max, MAX_LANE_CHANGE_SLOPE * v_new)
        vy_i = clip(LATERAL_GAIN_PER_S * (rd.centre(new_lane[i]) - y[i]), -vlat_max, vlat_max)
        y_new[i] = y[i] + vy_i * dt
        vx_new[i], vy_new[i] = v_new, vy_i
        head_new[i] = math.atan2(vy_i, max(v_new, 0.1))
    # ego: clip the action, limit the steering rate, then one step of the kinematic bicycle (Rajamani 2012, 2.2)
    a_ego = clip(a_cmd, -rd.max_brake, rd.max_accel)
    steer = clip(steer_cmd, -rd.max_steer, rd.max_steer)
    steer = clip(steer, sc["ego_steer_rad"] - rd.max_dsteer, sc["ego_steer_rad"] + rd.max_dsteer)
    beta = math.atan(rd.l_r / rd.wheelbase * math.tan(steer))
    dist, ev = distance_and_speed(sc["ego_speed_mps"], a_ego, dt)
    h0 = sc["heading_rad"][EGO]
    ex = x[EGO] + dist * math.cos(h0 + beta)
    ey = y[EGO] + dist * math.sin(h0 + beta)
    eh = h0 + dist / rd.l_r * math.sin(beta)
    eh = (eh + math.pi) % (2.0 * math.pi) - math.pi
    x_new[EGO], y_new[EGO], head_new[EGO] = ex, ey, eh
    vx_new[EGO], vy_new[EGO] = ev * math.cos(eh + beta), ev * math.sin(eh + beta)
    acc[EGO] = a_ego
    new_lane[EGO] = rd.lane_of(ey)
    lane_out = [new_lane[i] if valid[i] else lane[i] for i in range(v_n)]

    # --- 7. leave, enter, outcome ---
    lo_x, hi_x = ex - rd.behind, ex + rd.ahead
    valid_new = [valid[i] and lo_x - 10.0 < x_new[i] < hi_x + 10.0 and x_new[i] < rd.road_len for i in range(v_n)]
    valid_new[EGO] = True
    out = dict(
        key=key,
        step=stp + 1,
        next_id=sc["next_id"],
        x_m=x_new,
        y_m=y_new,
        vx_mps=vx_new,
        vy_mps=vy_new,
        heading_rad=head_new,
        length_m=list(length),
        width_m=list(width),
        valid=valid_new,
        vehicle_id=list(vid),
        lane=lane_out,
        traits=[list(t) for t in tr],
        yield_state=[ys[i] if valid_new[i] else 0 for i in range(v_n)],
        brake_timer_s=[timer[i] if valid_new[i] else 0.0 for i in range(v_n)],
        brake_decel_mps2=decel,
        cooldown_s=cooldown,
        ego_speed_mps=ev,
        ego_steer_rad=steer,
    )
    _spawn_scene(out, rd)

    collision = _ego_hits(out)
    off = _ego_offroad(rd, ex, ey, length[EGO], width[EGO], eh)
    goal = ex >= rd.goal_x and rd.goal_lanes[rd.lane_of(ey)] and not collision and not off
    out["collided"] = sc["collided"] or collision
    out["offroad"] = sc["offroad"] or off
    out["reached_goal"] = sc["reached_goal"] or (goal and not sc["collided"] and not sc["offroad"])
    info = dict(collision=collision, offroad=off, goal=goal, accel_mps2=acc, steer_rad=steer)
    return out, info


def _spawn_scene(out: dict, rd: Road) -> None:
    """On spawn steps, let one vehicle enter the lane most short of its density, at the window's back end if its
    driver is faster than the ego (by more than 1 m/s), else at the front, if the gaps there allow it."""
    if max(rd.density) <= 0.0 or out["step"] % SPAWN_PERIOD_STEPS != 0:
        return
    valid = out["valid"]
    if all(valid):
        return
    v_n = len(valid)
    key, stp, new_id = out["key"], out["step"], out["next_id"]
    ego_x = out["x_m"][EGO]
    lo_x, hi_x = ego_x - rd.behind, ego_x + rd.ahead
    best_lane, best_score = -1, -INF
    u_key = combine(key, stp, _STREAM_SPAWN)
    for ln in range(rd.num_lanes):
        count = sum(1 for i in range(v_n) if valid[i] and i != EGO and out["lane"][i] == ln)
        seg = max(min(hi_x, rd.end[ln]) - max(lo_x, rd.start[ln]), 0.0)
        missing = rd.density[ln] * seg - count
        if missing > 0.5:
            score = missing + uniform(u_key, ln)
            if score > best_score:  # first lane wins a tie
                best_lane, best_score = ln, score
    if best_lane < 0:
        return
    ln = best_lane
    traits = [
        truncated_normal(rd.t_mean[t], rd.t_std[t], rd.t_lo[t], rd.t_hi[t], key, _STREAM_TRAITS, new_id, t, 0)
        for t in range(NUM_TRAITS)
    ]
    length = truncated_normal(*rd.length_dist, key, _STREAM_TRAITS, new_id, 101)
    width = truncated_normal(*rd.width_dist, key, _STREAM_TRAITS, new_id, 102)
    v0 = traits[T_V0]
    xs = lo_x if v0 > out["vx_mps"][EGO] + 1.0 else hi_x
    if not (rd.exists(ln, xs) and rd.to_end(ln, xs) >= rd.merge_zone):  # never just before a lane end
        return
    # nearest occupant of the lane ahead of and behind the entry point (first slot wins a tie)
    ga, gb, v_lead, v_foll = INF, INF, INF, 0.0
    for j in range(v_n):
        hw = half_extent_y(out["length_m"][j], out["width_m"][j], out["heading_rad"][j])
        if not (valid[j] and rd.occupies(out["y_m"][j], hw, out["lane"][j], ln)):
            continue
        dx = out["x_m"][j] - xs
        half = 0.5 * (out["length_m"][j] + length)
        if dx >= 0 and dx - half < ga:
            ga, v_lead = dx - half, out["vx_mps"][j]
        elif dx < 0 and -dx - half < gb:
            gb, v_foll = -dx - half, out["vx_mps"][j]
    speed = min(v0 * rd.init_frac, rd.speed_limit * 1.15)
    if ga < 2.0 * (traits[T_S0] + speed * traits[T_T]):
        speed = min(speed, v_lead)
    if not ga >= max(traits[T_S0] + speed * traits[T_T], MIN_SPAWN_GAP_M):
        return
    closing = max(v_foll - speed, 0.0)
    if not gb >= 2.0 + 1.2 * v_foll + closing * closing / 6.0 + MIN_SPAWN_GAP_M:
        return
    slot = valid.index(False)
    for name, value in (
        ("valid", True),
        ("x_m", xs),
        ("y_m", rd.centre(ln)),
        ("vx_mps", speed),
        ("vy_mps", 0.0),
        ("heading_rad", 0.0),
        ("length_m", length),
        ("width_m", width),
        ("vehicle_id", new_id),
        ("lane", ln),
        ("traits", traits),
        ("yield_state", 0),
        ("brake_timer_s", 0.0),
        ("brake_decel_mps2", 0.0),
        ("cooldown_s", 0.0),
    ):
        out[name][slot] = value
    out["next_id"] = new_id + 1


def _ego_hits(out: dict) -> bool:
    """True if the ego's footprint overlaps any other vehicle's (touching counts)."""
    x, y, ln, wd, hd = (out[k] for k in ("x_m", "y_m", "length_m", "width_m", "heading_rad"))
    r_ego = 0.5 * math.hypot(ln[EGO], wd[EGO])
    for j in range(len(x)):
        if j == EGO or not out["valid"][j]:
            continue
        reach = r_ego + 0.5 * math.hypot(ln[j], wd[j])  # bounding circles: an obviously safe quick reject
        if abs(x[j] - x[EGO]) > reach + 1e-6 or abs(y[j] - y[EGO]) > reach + 1e-6:
            continue
        if boxes_overlap(x[EGO], y[EGO], ln[EGO], wd[EGO], hd[EGO], x[j], y[j], ln[j], wd[j], hd[j]):
            return True
    return False


def _ego_offroad(rd: Road, x: float, y: float, length: float, width: float, heading: float) -> bool:
    """True if a corner of the ego's footprint lies outside every lane that exists at that corner."""
    c, s = math.cos(heading), math.sin(heading)
    for sx, sy in ((1.0, 1.0), (-1.0, 1.0), (-1.0, -1.0), (1.0, -1.0)):
        lx, ly = 0.5 * length * sx, 0.5 * width * sy
        cx, cy = x + c * lx - s * ly, y + s * lx + c * ly
        if not rd.exists(math.floor(cy / rd.lane_w), cx):
            return True
    return False


# --- the batch, scene by scene ----------------------------------------------------------------------------------------

_PER_VEHICLE = (
    "x_m",
    "y_m",
    "vx_mps",
    "vy_mps",
    "heading_rad",
    "length_m",
    "width_m",
    "valid",
    "vehicle_id",
    "lane",
    "traits",
    "yield_state",
    "brake_timer_s",
    "brake_decel_mps2",
    "cooldown_s",
)
_PER_SCENE = ("step", "next_id", "ego_speed_mps", "ego_steer_rad", "collided", "offroad", "reached_goal")
_DTYPES = {
    "key": np.uint64,
    "step": np.int64,
    "next_id": np.int64,
    "valid": bool,
    "vehicle_id": np.int64,
    "lane": np.int64,
    "yield_state": np.int8,
    "collided": bool,
    "offroad": bool,
    "reached_goal": bool,
}


def step_loop(state: TrafficState, action: np.ndarray, params: SimParams) -> tuple[TrafficState, StepInfo]:
    """One simulator step of every scene, done with Python loops over scenes and vehicles.

    Args:
        state: the batched state (S scenes, V slots).
        action: ego actions (S, 2): (acceleration m/s^2, front steering angle rad), clipped like the engine.
        params: the scenario's arrays.

    Returns:
        The new state and a :class:`~wmplan.sim.engine.StepInfo`; ``accel_mps2`` (S, V) is NaN on slots that were
        empty at the start of the step (the engine fills them with values that nothing uses).
    """
    action = np.asarray(action, dtype=np.float64)
    if action.shape != (state.num_scenes, 2):
        raise ValueError(f"action must have shape ({state.num_scenes}, 2) (accel_mps2, steer_rad), got {action.shape}")
    rd = Road(params)
    cols = {name: getattr(state, name).tolist() for name in _PER_VEHICLE + _PER_SCENE}
    keys = [int(k) for k in state.key]
    acts = action.tolist()
    outs, infos = [], []
    for s in range(state.num_scenes):
        sc = {name: cols[name][s] for name in cols}
        sc["key"] = keys[s]
        out, info = _scene_step(sc, acts[s][0], acts[s][1], rd)
        outs.append(out)
        infos.append(info)
    arrays = {"key": np.array(keys, dtype=np.uint64)}
    for name in _PER_VEHICLE + _PER_SCENE:
        arrays[name] = np.array([o[name] for o in outs], dtype=_DTYPES.get(name, np.float64))
    info = StepInfo(
        **{
            k: np.array([i[k] for i in infos], dtype=bool if k in ("collision", "offroad", "goal") else np.float64)
            for k in infos[0]
        }
    )
    return TrafficState(**arrays), info
