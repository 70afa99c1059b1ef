"""The batched engine: one pure ``step`` that advances every scene by one time step with vectorised numpy.

Letters in shape comments: S scenes, V vehicle slots, L lanes. ``dx[s, i, j] = x[s, j] - x[s, i]``: row i looks
at vehicle j. No loop in this module runs over vehicles or scenes; the only loops are over the (at most six)
lanes or the two lane-change directions.

Order of one step:
1. neighbours: for each vehicle the nearest leader and follower in its own lane and the lanes beside it;
2. car following (IDM) with the end of an ending lane as a standing obstacle;
3. yielding: drivers with a merging vehicle just ahead in the next lane decide (a random event, drawn when the
   interaction begins) whether to let it in, and if so follow it as a leader;
4. hard-braking events;
5. lane changes (MOBIL; a lane that ends makes the change mandatory, still subject to the safety criterion);
6. motion: ballistic longitudinal update, smooth lateral motion for traffic, kinematic bicycle for the ego;
7. vehicles leave and enter at the ends of the simulated stretch; ego collision, off-road and goal checks.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from wmplan import rng
from wmplan.sim.behaviour import idm_accel_fast, mobil_incentive, mobil_safe
from wmplan.sim.bicycle import bicycle_step, distance_and_speed
from wmplan.sim.collision import boxes_overlap
from wmplan.sim.params import (
    LANE_CHANGE_COOLDOWN_S,
    MANDATORY_BIAS_MPS2,
    MAX_PHYSICAL_DECEL_MPS2,
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
from wmplan.sim.spawn import draw_size, draw_traits
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.tilt import MAX_TILTED_PROB, bernoulli_log_ratio

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


@dataclass(frozen=True, eq=False)
class StepInfo:
    """What happened during one step, per scene (S,) unless stated."""

    collision: np.ndarray
    offroad: np.ndarray
    goal: np.ndarray
    accel_mps2: np.ndarray  # (S, V) longitudinal acceleration applied (ego: the clipped action)
    steer_rad: np.ndarray  # (S,) ego steering angle applied after clipping and rate limiting
    # (S,) log f/g of this step's tilted random draws (``params.tilt``, see wmplan.sim.tilt); 0 when not tilted
    log_weight: np.ndarray | None = None


def _offsets(a: np.ndarray) -> np.ndarray:
    """Row offsets (S, 1) that turn per-scene slot indices into flat indices of an (S, V, ...) array."""
    return (np.arange(a.shape[0]) * a.shape[1])[:, None]


def _gather(a: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """a[s, idx[s, i]] for (S, V) arrays (idx must hold valid slots; callers mask the result)."""
    return np.take(a, _offsets(a) + idx)


@functools.lru_cache(maxsize=8)
def _positions(s_n: int, v_n: int) -> np.ndarray:
    """0, 1, ..., V-1 repeated for S scenes, flat (read-only; cached per shape)."""
    out = np.tile(np.arange(v_n), s_n)
    out.flags.writeable = False
    return out


class _Order:
    """Vehicles of each scene sorted by position, for nearest-neighbour queries in O(V L) per scene.

    Masks and answers are lane-major, shaped (L, S, V). ``next_pos(mask)`` gives, for every lane and vehicle (by
    slot), the sorted position of the nearest vehicle ahead (by centre position) among those marked in ``mask``,
    or V if none; ``prev_pos`` the nearest behind, or -1. Ties in position are broken by slot number (a stable
    sort), as a plain loop would. Internally the sorted masks are laid out (L, V, S), so that the running
    minimum along the sorted axis works on contiguous rows of S scenes.
    """

    def __init__(self, x_m: np.ndarray, valid: np.ndarray):
        s_n, v_n = x_m.shape
        self.s_n, self.v_n = s_n, v_n
        self.order = np.argsort(np.where(valid, x_m, np.inf), axis=1, kind="stable")  # (S, V) sorted -> slot
        flat_order = _offsets(self.order) + self.order  # (S, V) flat slot index of each sorted position
        self.rank = np.empty_like(self.order)  # slot -> sorted position
        self.rank.reshape(-1)[flat_order.reshape(-1)] = _positions(s_n, v_n)
        self._sorted_idx = np.ascontiguousarray(flat_order.T)  # (V, S): flat slot of sorted position r in scene s
        self._back_idx = self.rank * s_n + np.arange(s_n)[:, None]  # (S, V): flat index into a (V, S) plane
        self._ar = np.arange(v_n, dtype=np.int32)[None, :, None]

    def _sorted(self, mask: np.ndarray) -> np.ndarray:
        """(L, S, V) mask -> (L, V, S) in sorted order."""
        return np.take(mask.reshape(mask.shape[0], -1), self._sorted_idx, axis=1)

    def _back(self, per_pos: np.ndarray) -> np.ndarray:
        """(L, V, S) values by sorted position -> (L, S, V) values by slot (int64)."""
        return np.take(per_pos.reshape(per_pos.shape[0], -1), self._back_idx, axis=1).astype(np.int64)

    def _scan(self, src: np.ndarray, ahead: bool) -> np.ndarray:
        """Strict suffix minimum (ahead) or prefix maximum (behind) along the sorted axis of (L, V, S) positions,
        by log2(V) doubling steps (a parallel prefix scan; numpy's accumulate along a middle axis is slower)."""
        v_n, k = self.v_n, 1
        out = np.empty_like(src)
        if ahead:  # out[r] = min(src[r+1:]), V where empty
            out[:, -1] = v_n
            out[:, :-1] = src[:, 1:]
            while k < v_n - 1:
                np.minimum(out[:, :-1 - k], out[:, k:-1], out=out[:, :-1 - k])
                k *= 2
        else:  # out[r] = max(src[:r]), -1 where empty
            out[:, 0] = -1
            out[:, 1:] = src[:, :-1]
            while k < v_n - 1:
                np.maximum(out[:, 1 + k:], out[:, 1:-k], out=out[:, 1 + k:])
                k *= 2
        return out

    def next_pos(self, mask: np.ndarray) -> np.ndarray:
        return self._back(self._scan(np.where(self._sorted(mask), self._ar, self.v_n).astype(np.int32), True))

    def prev_pos(self, mask: np.ndarray) -> np.ndarray:
        return self._back(self._scan(np.where(self._sorted(mask), self._ar, -1).astype(np.int32), False))

    def slot_of(self, pos: np.ndarray) -> np.ndarray:
        """(S, V) sorted positions -> slots, -1 where the position is out of range (no neighbour)."""
        found = (pos >= 0) & (pos < self.v_n)
        return np.where(found, _gather(self.order, np.where(found, pos, 0)), -1)


def _pick(nb: np.ndarray, lane: np.ndarray) -> np.ndarray:
    """nb[lane[s, i], s, i] for lane-major (L, S, V) neighbour tables."""
    l_n, s_n, v_n = nb.shape
    flat = np.clip(lane, 0, l_n - 1) * (s_n * v_n) + (_offsets(lane) + np.arange(v_n)[None, :])
    return np.take(nb, flat)


def _nearest_over_lanes(occ: np.ndarray, pos: np.ndarray, none: int, ahead: bool) -> np.ndarray:
    """Per vehicle, the nearest of ``pos[l]`` over the lanes l it occupies (occ, pos lane-major (L, S, V))."""
    best = np.where(occ[0], pos[0], none)
    pick = np.minimum if ahead else np.maximum
    for ln in range(1, occ.shape[0]):
        best = pick(best, np.where(occ[ln], pos[ln], none))
    return best


def _gap_to(x, length, i_slot_x, i_len, j_slot, ahead: bool):
    """Bumper-to-bumper gap from each vehicle to neighbour slot j (inf where j = -1)."""
    has = j_slot >= 0
    js = np.where(has, j_slot, 0)
    xj, lj = _gather(x, js), _gather(length, js)
    gap = (xj - i_slot_x) if ahead else (i_slot_x - xj)
    return np.where(has, gap - 0.5 * (lj + i_len), np.inf), js


class _TraitPlanes:
    """``planes[k]``: trait k of every slot as a contiguous (S, V) array, extracted on first use (a step needs
    only the IDM traits on most steps, the MOBIL ones on lane-decision steps).

    The planes are kept with the state (see :func:`_trait_planes`) and handed on to the next state while its
    ``traits`` array is the same object, which it is on every step in which no vehicle enters. The traits array is
    made read-only then, so that writing into it in place (which no code should do: states are immutable) fails
    loudly instead of leaving the planes stale."""

    def __init__(self, traits: np.ndarray):
        self._traits = traits
        self._planes: dict[int, np.ndarray] = {}
        self._drivers: _Drivers | None = None
        traits.flags.writeable = False

    def owns(self, traits: np.ndarray) -> bool:
        return traits is self._traits

    @property
    def drivers(self) -> _Drivers:
        if self._drivers is None:
            self._drivers = _Drivers.of(self)
        return self._drivers

    def __getitem__(self, k: int) -> np.ndarray:
        plane = self._planes.get(k)
        if plane is None:
            plane = self._planes[k] = np.ascontiguousarray(self._traits[..., k])
        return plane


def _trait_planes(state: TrafficState) -> _TraitPlanes:
    """The trait planes of a state, made once and kept on the state object (not a dataclass field)."""
    planes = state.__dict__.get("_trait_planes")
    if planes is None or not planes.owns(state.traits):
        planes = _TraitPlanes(state.traits)
        object.__setattr__(state, "_trait_planes", planes)
    return planes


class _Drivers:
    """Contiguous (S, V) arrays of the IDM traits, with 1 / (2 sqrt(a b)) worked out once per step."""

    def __init__(self, v0, t, s0, a, c):
        self.v0, self.t, self.s0, self.a, self.c = v0, t, s0, a, c

    @classmethod
    def of(cls, trc: _TraitPlanes) -> _Drivers:
        return cls(trc[T_V0], trc[T_T], trc[T_S0], trc[T_A], 0.5 / np.sqrt(trc[T_A] * trc[T_B]))

    def take(self, idx: np.ndarray) -> _Drivers:
        return _Drivers(*(_gather(a, idx) for a in (self.v0, self.t, self.s0, self.a, self.c)))


def _idm(v, d: _Drivers, gap, v_lead):
    return idm_accel_fast(v, d.v0, gap, v - v_lead, d.t, d.s0, d.a, d.c)


def _lane_end_gap(params: SimParams, lane: np.ndarray, x: np.ndarray, length: np.ndarray) -> np.ndarray:
    return params.distance_to_lane_end(lane, x) - 0.5 * length


def _lateral_half_extent(width_m: np.ndarray, length_m: np.ndarray, heading_rad: np.ndarray) -> np.ndarray:
    """Half the lateral extent of rotated footprints, ``w/2 cos h + l/2 |sin h|``. Most vehicles drive straight
    (h exactly 0, where this is w/2), so the trigonometry runs only on the others."""
    hw = np.array(0.5 * np.asarray(width_m), dtype=np.float64, order="C")
    turned = np.flatnonzero(heading_rad)
    if turned.size:
        h = np.take(heading_rad, turned)
        hw.flat[turned] = np.take(hw, turned) * np.cos(h) + 0.5 * (np.take(length_m, turned) * np.abs(np.sin(h)))
    return hw


def lane_occupancy_lm(params: SimParams, y_m: np.ndarray, width_m: np.ndarray, valid: np.ndarray,
                      lane: np.ndarray | None = None, heading_rad: np.ndarray | None = None,
                      length_m: np.ndarray | None = None) -> np.ndarray:
    """Lane-major (L, S, V) form of :func:`lane_occupancy` (contiguous per lane; what the engine uses)."""
    hw = 0.5 * width_m if heading_rad is None else _lateral_half_extent(width_m, length_m, heading_rad)
    top, bottom = y_m + hw, y_m - hw
    occ = np.empty((params.num_lanes,) + np.shape(y_m), dtype=bool)
    for ln in range(params.num_lanes):
        lo = ln * params.lane_width_m
        o = occ[ln]
        np.greater(top, lo + BAND_EPS_M, out=o)
        o &= bottom < lo + params.lane_width_m - BAND_EPS_M
        if lane is not None:
            o |= lane == ln
        o &= valid
    return occ


def lane_occupancy(params: SimParams, y_m: np.ndarray, width_m: np.ndarray, valid: np.ndarray,
                   lane: np.ndarray | None = None, heading_rad: np.ndarray | None = None,
                   length_m: np.ndarray | None = None) -> np.ndarray:
    """(S, V, L) True where a vehicle's body reaches into lane l, or (given ``lane``) l is the lane it is in or
    moving to: a driver who has begun a lane change is visible in the target lane at once, as an indicator is."""
    return np.moveaxis(lane_occupancy_lm(params, y_m, width_m, valid, lane, heading_rad, length_m), 0, -1)


def mergers(params: SimParams, state: TrafficState) -> tuple[np.ndarray, np.ndarray]:
    """(S, V) whether each vehicle must leave its ending lane soon, and the lane it must merge into."""
    if not params.lane_ends_on_road.any():  # no lane ends: nobody must merge
        return np.zeros(state.valid.shape, dtype=bool), np.full(state.valid.shape, -1, dtype=np.int64)
    lane = state.lane.copy()
    lane[:, EGO] = params.lane_of(state.y_m[:, EGO])
    d_end = params.distance_to_lane_end(lane, state.x_m)
    is_merger = state.valid & (d_end < params.merge_zone_m) & (params.merge_target[lane] >= 0)
    return is_merger, params.merge_target[lane]


def step(state: TrafficState, action: np.ndarray, params: SimParams) -> tuple[TrafficState, StepInfo]:
    """Advance every scene by one step.

    Args:
        state: the current batched state (S scenes, V slots).
        action: ego action per scene, shape (S, 2): (acceleration m/s^2, front steering angle rad). Clipped to the
            scenario's limits, and the steering angle to the steering-rate limit.
        params: the scenario's arrays.

    Returns:
        The new state and a :class:`StepInfo`.
    """
    action = np.asarray(action, dtype=np.float64)
    if action.shape != (state.num_scenes, 2):
        raise ValueError(f"action must have shape ({state.num_scenes}, 2) (accel_mps2, steer_rad), got {action.shape}")
    dt = params.dt_s
    s_n, v_n = state.x_m.shape
    valid = state.valid
    x, y, vx, length, width, lane, tr = state.x_m, state.y_m, state.vx_mps, state.length_m, state.width_m, \
        state.lane, state.traits
    is_traffic = valid.copy()
    is_traffic[:, EGO] = False
    tilt = params.tilt if params.tilt is not None and params.tilt.active else None
    log_w = np.zeros(s_n)
    trc = _trait_planes(state)  # contiguous (S, V) trait planes, made when first asked for
    drv = trc.drivers

    # --- 1. neighbours ---
    order = _Order(x, valid)
    occ = lane_occupancy_lm(params, y, width, valid, lane, state.heading_rad, length)  # (L, S, V)
    nxt = order.next_pos(occ)  # (L, S, V) nearest occupant ahead in each lane (sorted position)
    # Own leader: the nearest over all lanes this vehicle occupies (body or intent).
    lead_pos = _nearest_over_lanes(occ, nxt, v_n, ahead=True)
    is_merger, merge_to = mergers(params, state)
    shutting = state.yield_state == 2
    if shutting.any() and is_merger.any():
        # A driver who decided not to yield gives the merging vehicle no room: it reacts to a merging vehicle only
        # once that vehicle's centre is in its lane (not to its body reaching over the line).
        centre_lane = params.lane_of(y)
        lanes_col = np.arange(params.num_lanes)[:, None, None]
        occ_strict = np.where(is_merger, valid & (centre_lane == lanes_col), occ)
        strict_pos = _nearest_over_lanes(occ, order.next_pos(occ_strict), v_n, ahead=True)
        lead_pos = np.where(shutting, strict_pos, lead_pos)
    lead_gap, lead_idx = _gap_to(x, length, x, length, order.slot_of(lead_pos), ahead=True)
    has_lead = np.isfinite(lead_gap)
    v_lead = np.where(has_lead, _gather(vx, lead_idx), 0.0)

    # --- 2. car following ---
    acc = _idm(vx, drv, lead_gap, v_lead)
    if params.lane_ends_on_road.any():
        acc = np.minimum(acc, _idm(vx, drv, _lane_end_gap(params, lane, x, length), 0.0))

    # --- 3. yielding to merging vehicles ---
    ys = np.zeros((s_n, v_n), dtype=np.int8)
    if is_merger.any():
        m_occ = is_merger & (merge_to == np.arange(params.num_lanes)[:, None, None])  # (L, S, V)
        p_slot = order.slot_of(_pick(order.next_pos(m_occ), lane))
        p_gap, p_idx = _gap_to(x, length, x, length, p_slot, ahead=True)
        p_dx = _gather(x, p_idx) - x
        has_partner = (p_slot >= 0) & (p_dx < params.yield_window_m) & is_traffic & ~is_merger
        ys = np.where(has_partner, state.yield_state, 0).astype(np.int8)
        new_s, new_v = np.nonzero(has_partner & (state.yield_state == 0))
        if new_s.size:  # interactions that begin now: draw the decision
            u = rng.uniform(rng.combine(state.key[new_s], state.step[new_s], rng.STREAM_YIELD), state.vehicle_id[new_s, new_v])
            p_yield = tr[new_s, new_v, T_YIELD]
            if tilt is not None and tilt.yield_factor != 1.0:  # decisions about letting the ego in are tilted
                to_ego = p_slot[new_s, new_v] == EGO
                q_yield = np.where(to_ego, p_yield * tilt.yield_factor, p_yield)
                yields = u < q_yield
                np.add.at(log_w, new_s, np.where(to_ego, bernoulli_log_ratio(yields, p_yield, q_yield), 0.0))
            else:
                yields = u < p_yield
            ys[new_s, new_v] = np.where(yields, 1, 2)
        a_yield = _idm(vx, drv, np.maximum(np.where(has_partner, p_gap, np.inf), trc[T_S0]),
                       np.where(has_partner, _gather(vx, p_idx), 0.0))
        a_yield = np.maximum(a_yield, -trc[T_BSAFE])
        acc = np.where(ys == 1, np.minimum(acc, a_yield), acc)
        # A driver who decided not to yield closes up on its leader, as if it wanted to go faster with a shorter
        # headway, so that the merging vehicle finds no gap in front of it: the future is bimodal (brake to let in
        # or speed up to shut out), not a blur around keeping speed.
        shut = ys == 2
        if shut.any():
            bold = _Drivers(drv.v0 * NON_YIELD_SPEEDUP, drv.t * NON_YIELD_HEADWAY_FACTOR, drv.s0, drv.a, drv.c)
            a_shut = _idm(vx, bold, lead_gap, v_lead)
            if params.lane_ends_on_road.any():
                a_shut = np.minimum(a_shut, _idm(vx, bold, _lane_end_gap(params, lane, x, length), 0.0))
            acc = np.where(shut, a_shut, acc)

    # --- 4. hard-braking events ---
    timer = np.maximum(state.brake_timer_s - dt, 0.0)
    decel = state.brake_decel_mps2
    if params.brake_prob_per_step > 0.0:
        ev_key = rng.combine(state.key, state.step, rng.STREAM_BRAKE_START)[:, None]
        u_brake = rng.uniform(ev_key, state.vehicle_id)
        p_brake = params.brake_prob_per_step
        if tilt is not None and tilt.brake_factor != 1.0:  # starts of drivers near the ego are tilted
            eligible = is_traffic & (timer <= 0.0) & (vx > 5.0)
            dx_ego = x - x[:, :1]
            near = eligible & (np.abs(dx_ego) <= tilt.radius_m) & (dx_ego > -5.0)
            q_brake = min(p_brake * tilt.brake_factor, MAX_TILTED_PROB)
            starts = eligible & (u_brake < np.where(near, q_brake, p_brake))
            log_w += np.where(near, bernoulli_log_ratio(starts, p_brake, q_brake), 0.0).sum(axis=1)
        else:
            starts = is_traffic & (timer <= 0.0) & (u_brake < p_brake) & (vx > 5.0)
        if starts.any():
            ss, sv = np.nonzero(starts)
            size_key = rng.combine(state.key[ss], state.step[ss], rng.STREAM_BRAKE_SIZE, state.vehicle_id[ss, sv])
            m, sd, lo, hi = params.brake_decel
            decel = decel.copy()
            decel[ss, sv] = rng.truncated_normal(m, sd, lo, hi, size_key, 0)
            m, sd, lo, hi = params.brake_duration
            timer[ss, sv] = rng.truncated_normal(m, sd, lo, hi, size_key, 1)
    braking = timer > 0.0
    if braking.any():
        acc = np.where(braking, np.minimum(acc, -decel), acc)
    acc = np.maximum(acc, -MAX_PHYSICAL_DECEL_MPS2)

    # --- 5. lane changes (MOBIL) ---
    cooldown = np.maximum(state.cooldown_s - dt, 0.0)
    settled = np.abs(y - params.lane_centre_m(lane)) < SETTLED_M
    may_change = is_traffic & settled & (cooldown <= 0.0)
    d_end_own = params.distance_to_lane_end(lane, x)
    best_inc = np.full((s_n, v_n), -np.inf)
    best_dir = np.zeros((s_n, v_n), dtype=np.int64)
    tr_foll = None
    for d in (-1, 1):
        # Drivers reconsider their lane every LANE_DECISION_PERIOD_STEPS, to the right and to the left at
        # different steps: two drivers on either side of a lane never claim the same gap in the same step (the
        # intent is visible to both from the next step on).
        phase = 0 if d < 0 else LANE_DECISION_PERIOD_STEPS // 2
        deciding = (state.step % LANE_DECISION_PERIOD_STEPS) == phase
        if not deciding.any():
            continue
        target = lane + d
        tclip = np.clip(target, 0, params.num_lanes - 1)
        d_end_t = params.distance_to_lane_end(tclip, x)
        allowed = params.lane_exists(target, x) & ((d_end_t >= params.merge_zone_m) | (d_end_t > d_end_own + 1.0))
        cand = may_change & allowed & deciding[:, None]
        if not cand.any():
            continue
        if tr_foll is None:  # followers are needed only on the steps where drivers reconsider their lane
            prv = order.prev_pos(occ)
            foll_pos = _nearest_over_lanes(occ, prv, -1, ahead=False)
            foll_gap, foll_idx = _gap_to(x, length, x, length, order.slot_of(foll_pos), ahead=False)
            has_foll = np.isfinite(foll_gap)
            v_foll = np.where(has_foll, _gather(vx, foll_idx), 0.0)
            tr_foll = drv.take(foll_idx)
            a_o = np.where(has_foll, _idm(v_foll, tr_foll, foll_gap, vx), 0.0)
            a_o_after = np.where(has_foll, _idm(v_foll, tr_foll, foll_gap + lead_gap + length, v_lead), 0.0)
        nl_gap, nl_idx = _gap_to(x, length, x, length, order.slot_of(_pick(nxt, tclip)), ahead=True)
        nf_gap, nf_idx = _gap_to(x, length, x, length, order.slot_of(_pick(prv, tclip)), ahead=False)
        has_nf = np.isfinite(nf_gap)
        v_nl = np.where(np.isfinite(nl_gap), _gather(vx, nl_idx), 0.0)
        a_self_after = np.minimum(_idm(vx, drv, nl_gap, v_nl), _idm(vx, drv, _lane_end_gap(params, tclip, x, length), 0.0))
        v_nf = np.where(has_nf, _gather(vx, nf_idx), 0.0)
        tr_nf = drv.take(nf_idx)
        a_n = np.where(has_nf, _idm(v_nf, tr_nf, nl_gap + nf_gap + length, v_nl), 0.0)
        a_n_after = np.where(has_nf, _idm(v_nf, tr_nf, nf_gap, vx), 0.0)
        inc = mobil_incentive(acc, a_self_after, a_n, a_n_after, a_o, a_o_after, trc[T_P])
        mandatory = (params.merge_target[lane] == target) & (d_end_own < params.merge_zone_m)
        urgency = np.clip(1.0 - d_end_own / params.merge_zone_m, 0.0, 1.0)
        inc = inc + np.where(mandatory, MANDATORY_BIAS_MPS2 * urgency + trc[T_TH], 0.0)
        safe = (mobil_safe(a_n_after, trc[T_BSAFE]) | ~has_nf) & (nl_gap > 1.0) & (nf_gap > 1.0)
        safe &= a_self_after >= -trc[T_BSAFE]
        ok = cand & safe & (inc > trc[T_TH]) & (inc > best_inc)
        best_inc = np.where(ok, inc, best_inc)
        best_dir = np.where(ok, d, best_dir)
    changing = best_dir != 0
    new_lane = lane + best_dir
    cooldown = np.where(changing, LANE_CHANGE_COOLDOWN_S, cooldown)

    # --- 6. motion ---
    dist, v_new = distance_and_speed(vx, acc, dt)
    x_new = x + dist
    # Lateral speed toward the lane centre, at most 1.5x the nominal lane-change speed and at most
    # tan(MAX_LANE_CHANGE_HEADING_RAD) times the forward speed: a slow car changes lane slowly, never sideways.
    vlat_max = np.minimum(1.5 * params.lane_change_speed_mps, MAX_LANE_CHANGE_SLOPE * v_new)
    vy = np.clip(LATERAL_GAIN_PER_S * (params.lane_centre_m(new_lane) - y), -vlat_max, vlat_max)
    y_new = y + vy * dt
    heading = np.arctan2(vy, np.maximum(v_new, 0.1))
    # ego: clip the action to the scenario's limits, then the kinematic bicycle
    a_ego = np.clip(action[:, 0], -params.max_brake_mps2, params.max_accel_mps2)
    steer = np.clip(action[:, 1], -params.max_steer_rad, params.max_steer_rad)
    max_dsteer = params.max_steer_rate_radps * dt
    steer = np.clip(steer, state.ego_steer_rad - max_dsteer, state.ego_steer_rad + max_dsteer)
    ex, ey, eh, ev, evx, evy, _ = bicycle_step(
        x[:, EGO], y[:, EGO], state.heading_rad[:, EGO], state.ego_speed_mps, a_ego, steer,
        wheelbase_m=params.wheelbase_m, l_r_m=params.l_r_m, dt_s=dt,
    )
    x_new[:, EGO], y_new[:, EGO], heading[:, EGO] = ex, ey, eh
    v_new[:, EGO], vy[:, EGO] = evx, evy
    acc[:, EGO] = a_ego
    new_lane[:, EGO] = params.lane_of(ey)
    x_new = np.where(valid, x_new, x)
    y_new = np.where(valid, y_new, y)

    # --- 7. leave, enter, outcome ---
    lo_x = ex - params.window_behind_m
    hi_x = ex + params.window_ahead_m
    inside = (x_new > lo_x[:, None] - 10.0) & (x_new < hi_x[:, None] + 10.0) & (x_new < params.road_length_m)
    new_valid = valid & inside
    new_valid[:, EGO] = True

    out = dict(
        key=state.key, step=state.step + 1, next_id=state.next_id,
        x_m=x_new, y_m=y_new, vx_mps=np.where(valid, v_new, 0.0), vy_mps=np.where(valid, vy, 0.0),
        heading_rad=np.where(valid, heading, 0.0), length_m=length, width_m=width, valid=new_valid,
        vehicle_id=state.vehicle_id, lane=np.where(valid, new_lane, lane), traits=tr,
        yield_state=np.where(new_valid, ys, 0).astype(np.int8),
        brake_timer_s=np.where(new_valid, timer, 0.0), brake_decel_mps2=decel, cooldown_s=cooldown,
        ego_speed_mps=ev, ego_steer_rad=steer,
        collided=state.collided, offroad=state.offroad, reached_goal=state.reached_goal,
    )
    _spawn(out, params)

    collision = ego_collisions(out)
    off = ego_offroad(params, ex, ey, length[:, EGO], width[:, EGO], eh)
    goal = (ex >= params.goal_x_m) & params.goal_lane_mask[params.lane_of(ey)] & ~collision & ~off
    out["collided"] = state.collided | collision
    out["offroad"] = state.offroad | off
    out["reached_goal"] = state.reached_goal | (goal & ~state.collided & ~state.offroad)
    info = StepInfo(collision=collision, offroad=off, goal=goal, accel_mps2=acc, steer_rad=steer, log_weight=log_w)
    new_state = TrafficState(**out)
    if out["traits"] is tr:  # no vehicle entered in any scene: the trait planes carry over
        object.__setattr__(new_state, "_trait_planes", trc)
    return new_state, info


def ego_collisions(arrays: dict) -> np.ndarray:
    """(S,) True where the ego's footprint overlaps another vehicle's. The separating-axis test runs only on
    pairs whose bounding boxes meet, which is almost never; the answer is the same as testing every pair."""
    x, y, ln, wd, hd = (arrays[k] for k in ("x_m", "y_m", "length_m", "width_m", "heading_rad"))
    # 1. along the road, on every slot: a footprint reaches at most (length + width) / 2 from its centre
    reach = 0.5 * (ln + wd)
    near = (np.abs(x - x[:, :1]) <= reach + reach[:, :1]) & arrays["valid"]
    near[:, EGO] = False
    hit = np.zeros(x.shape[0], dtype=bool)
    ss, vv = np.nonzero(near)
    if ss.size == 0:
        return hit
    # 2. on the few pairs left, axis-aligned bounds of the rotated footprints (|sin h| <= |h|, |cos h| <= 1):
    #    half-extents at most l/2 + w/2 |h| along the road and w/2 + l/2 |h| across it
    h_o, h_e = np.abs(hd[ss, vv]), np.abs(hd[ss, EGO])
    l_o, w_o, l_e, w_e = 0.5 * ln[ss, vv], 0.5 * wd[ss, vv], 0.5 * ln[ss, EGO], 0.5 * wd[ss, EGO]
    meet = np.abs(x[ss, vv] - x[ss, EGO]) <= l_o + w_o * h_o + l_e + w_e * h_e
    meet &= np.abs(y[ss, vv] - y[ss, EGO]) <= w_o + l_o * h_o + w_e + l_e * h_e
    ss, vv = ss[meet], vv[meet]
    if ss.size:
        overlap = boxes_overlap(x[ss, EGO], y[ss, EGO], ln[ss, EGO], wd[ss, EGO], hd[ss, EGO],
                                x[ss, vv], y[ss, vv], ln[ss, vv], wd[ss, vv], hd[ss, vv])
        hit[ss[overlap]] = True
    return hit


CONTACT_SIDES = ("front", "rear", "left", "right")


def _in_ego_frame(state: TrafficState, scenes: np.ndarray, ce: np.ndarray, se: np.ndarray, ox: np.ndarray,
                  oy: np.ndarray, oh: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centres (n, V) of the given scenes' vehicles in a frame at (ox, oy) turned by oh (n, 1), and headings."""
    dx, dy = state.x_m[scenes] - ox, state.y_m[scenes] - oy
    return ce * dx + se * dy, -se * dx + ce * dy, state.heading_rad[scenes] - oh


def contact_sides(state: TrafficState, scenes: np.ndarray, before: TrafficState | None = None) -> list[str]:
    """The side of the ego's footprint that another vehicle touches, for the given scenes (a few: those that
    collided this step); ``""`` where the ego touches nothing.

    In the ego's frame (x forward, y to the left) each other vehicle is bounded by a box aligned with the ego's
    axes. With ``before`` (the state one step earlier) the side is found as for two moving boxes: along each axis
    the fraction of the step at which the projections began to overlap, and the axis that closed last is the one
    of contact (Ericson, *Real-Time Collision Detection*, 2005, section 5.5.8, moving AABBs; from memory). A fast
    run into the car ahead is thus ``"front"`` even when the step ends with the cars overlapping by more lengthwise
    than sideways. Without ``before``, or where the other vehicle already overlapped along both axes a step
    earlier, the axis of least overlap now decides. ``"rear"``: run into from behind; ``"left"`` / ``"right"``: a
    contact beside the ego, as when either changes lane. Naming crashes by the first point of contact is common
    practice, no source. Where several vehicles touch the ego, the one whose centre is nearest decides."""
    scenes = np.asarray(scenes, dtype=np.int64)
    if scenes.size == 0:
        return []
    x, y, ln, wd, hd = (getattr(state, k)[scenes] for k in ("x_m", "y_m", "length_m", "width_m", "heading_rad"))
    valid = state.valid[scenes].copy()
    valid[:, EGO] = False
    touch = boxes_overlap(x[:, :1], y[:, :1], ln[:, :1], wd[:, :1], hd[:, :1], x, y, ln, wd, hd) & valid
    ox, oy, oh = x[:, :1], y[:, :1], hd[:, :1]
    ce, se = np.cos(oh), np.sin(oh)
    fx, fy, rel = _in_ego_frame(state, scenes, ce, se, ox, oy, oh)
    # reach of the two footprints along the ego's axes (the other's bounds in the ego's frame)
    reach_x = 0.5 * ln[:, :1] + 0.5 * ln * np.abs(np.cos(rel)) + 0.5 * wd * np.abs(np.sin(rel))
    reach_y = 0.5 * wd[:, :1] + 0.5 * ln * np.abs(np.sin(rel)) + 0.5 * wd * np.abs(np.cos(rel))
    gap_x, gap_y = np.abs(fx) - reach_x, np.abs(fy) - reach_y  # <= 0: the projections overlap now
    lengthwise = -gap_x <= -gap_y  # least overlap now
    if before is not None:
        # the same vehicles a step earlier, relative to the ego then, along the ego's present axes
        bfx, bfy, _ = _in_ego_frame(before, scenes, ce, se, before.x_m[scenes, :1], before.y_m[scenes, :1], oh)
        g0x, g0y = np.abs(bfx) - reach_x, np.abs(bfy) - reach_y
        with np.errstate(divide="ignore", invalid="ignore"):
            enter_x = np.where(g0x > 0, g0x / (g0x - gap_x), -np.inf)
            enter_y = np.where(g0y > 0, g0y / (g0y - gap_y), -np.inf)
        same = before.vehicle_id[scenes] == state.vehicle_id[scenes]
        known = same & ((g0x > 0) | (g0y > 0))
        lengthwise = np.where(known, enter_x >= enter_y, lengthwise)
    side = np.where(lengthwise, np.where(fx >= 0, 0, 1), np.where(fy >= 0, 2, 3))
    dist = np.where(touch, np.hypot(fx, fy), np.inf)
    j = dist.argmin(axis=1)
    return [CONTACT_SIDES[int(side[r, j[r]])] if touch[r, j[r]] else "" for r in range(scenes.size)]


_CORNER_SIGNS = np.array([[1.0, 1.0], [-1.0, 1.0], [-1.0, -1.0], [1.0, -1.0]])  # box_corners' order


def ego_offroad(params: SimParams, x_m, y_m, length_m, width_m, heading_rad) -> np.ndarray:
    """True where any corner of the ego's footprint lies outside every lane that exists at that corner."""
    c, s = np.cos(heading_rad), np.sin(heading_rad)
    # corners laid out (4, S): each operation runs over contiguous rows of scenes
    lx = _CORNER_SIGNS[:, :1] * (0.5 * np.asarray(length_m))
    ly = _CORNER_SIGNS[:, 1:] * (0.5 * np.asarray(width_m))
    cx = x_m + c * lx - s * ly
    cy = y_m + s * lx + c * ly
    on = params.lane_exists(np.floor(cy / params.lane_width_m).astype(np.int64), cx)
    return ~on.all(axis=0)


def _spawn(out: dict, params: SimParams) -> None:
    """Let at most one vehicle per scene enter at an end of the simulated stretch, where a lane is short of its
    density and a slot is free. Replaces arrays of ``out`` by modified copies (never writes into a previous state).
    Work is done only for the scenes that want a vehicle this step."""
    if params.density_veh_per_m.max() <= 0.0:
        return
    attempt = (out["step"] % SPAWN_PERIOD_STEPS) == 0
    if not attempt.any():
        return
    valid = out["valid"]
    lanes = np.arange(params.num_lanes)
    ego_x = out["x_m"][:, EGO]
    lo_x = ego_x - params.window_behind_m
    hi_x = ego_x + params.window_ahead_m
    traffic = valid.copy()
    traffic[:, EGO] = False
    count = np.stack([(traffic & (out["lane"] == ln)).sum(axis=1) for ln in lanes], axis=1)  # (S, L)
    seg = np.clip(np.minimum(hi_x[:, None], params.lane_end_m) - np.maximum(lo_x[:, None], params.lane_start_m), 0, None)
    short = (params.density_veh_per_m * seg - count > 0.5) & (attempt & ~valid.all(axis=1))[:, None]
    cand = np.nonzero(short.any(axis=1))[0]
    if cand.size == 0:
        return
    # --- from here on, only the candidate scenes (c of them) ---
    key, new_id, stp = out["key"][cand], out["next_id"][cand], out["step"][cand]
    u_lane = rng.uniform(rng.combine(key, stp, rng.STREAM_SPAWN)[:, None], lanes)
    lane = np.where(short[cand], params.density_veh_per_m * seg[cand] - count[cand] + u_lane, -np.inf).argmax(axis=1)
    # the traits the entry checks need (all of them only for the vehicles that enter: the same values)
    v0, s0_c, t_c = draw_traits(params, key, new_id, which=np.array([T_V0, T_S0, T_T])).T
    length, width = draw_size(params, key, new_id)
    from_behind = v0 > out["vx_mps"][cand, EGO] + 1.0
    xs = np.where(from_behind, lo_x[cand], hi_x[cand])
    # enter only where the lane runs on for at least the merge zone (nobody appears just before a lane end)
    want = params.lane_exists(lane, xs) & (params.distance_to_lane_end(lane, xs) >= params.merge_zone_m)
    x_c, len_c, v_c = out["x_m"][cand], out["length_m"][cand], out["vx_mps"][cand]
    # occupancy of the chosen lane only (the test of lane_occupancy_lm, for one lane per scene)
    y_c, h_c = out["y_m"][cand], out["heading_rad"][cand]
    hw = _lateral_half_extent(out["width_m"][cand], len_c, h_c)
    lo = (lane * params.lane_width_m)[:, None]
    occ = (y_c + hw > lo + BAND_EPS_M) & (y_c - hw < lo + params.lane_width_m - BAND_EPS_M)
    occ = valid[cand] & (occ | (out["lane"][cand] == lane[:, None]))  # (c, V)
    dxs = x_c - xs[:, None]
    half = 0.5 * (len_c + length[:, None])
    g_ahead = np.where(occ & (dxs >= 0), dxs - half, np.inf)
    g_behind = np.where(occ & (dxs < 0), -dxs - half, np.inf)
    rr = np.arange(cand.size)
    ia, ib = g_ahead.argmin(axis=1), g_behind.argmin(axis=1)
    ga, gb = g_ahead[rr, ia], g_behind[rr, ib]
    v_lead = np.where(np.isfinite(ga), v_c[rr, ia], np.inf)
    v_foll = np.where(np.isfinite(gb), v_c[rr, ib], 0.0)
    speed = np.minimum(v0 * params.initial_speed_fraction, params.speed_limit_mps * 1.15)
    speed = np.where(ga < 2.0 * (s0_c + speed * t_c), np.minimum(speed, v_lead), speed)
    want &= ga >= np.maximum(s0_c + speed * t_c, MIN_SPAWN_GAP_M)
    want &= gb >= 2.0 + 1.2 * v_foll + np.maximum(v_foll - speed, 0.0) ** 2 / 6.0 + MIN_SPAWN_GAP_M
    if not want.any():
        return
    ws = cand[want]
    wl = (~valid[ws]).argmax(axis=1)
    new_rows = {
        "valid": True, "x_m": xs[want], "y_m": params.lane_centre_m(lane[want]), "vx_mps": speed[want],
        "vy_mps": 0.0, "heading_rad": 0.0, "length_m": length[want], "width_m": width[want],
        "vehicle_id": new_id[want], "lane": lane[want], "traits": draw_traits(params, key[want], new_id[want]),
        "yield_state": 0,
        "brake_timer_s": 0.0, "brake_decel_mps2": 0.0, "cooldown_s": 0.0,
    }
    for name, value in new_rows.items():
        arr = np.array(out[name], copy=True)
        arr[ws, wl] = value
        out[name] = arr
    next_id = out["next_id"].copy()
    next_id[ws] += 1
    out["next_id"] = next_id


def traffic_collisions(state: TrafficState) -> np.ndarray:
    """(S,) number of overlapping pairs among traffic vehicles (the ego excluded); for invariant checks."""
    x, y, ln, wd, hd = state.x_m, state.y_m, state.length_m, state.width_m, state.heading_rad
    hit = boxes_overlap(x[:, :, None], y[:, :, None], ln[:, :, None], wd[:, :, None], hd[:, :, None],
                        x[:, None, :], y[:, None, :], ln[:, None, :], wd[:, None, :], hd[:, None, :])
    traffic = state.valid.copy()
    traffic[:, EGO] = False
    pair = traffic[:, :, None] & traffic[:, None, :]
    upper = np.triu(np.ones(hit.shape[1:], dtype=bool), k=1)
    return (hit & pair & upper).sum(axis=(1, 2))
