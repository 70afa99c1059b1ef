"""Initial states and the traffic that enters the simulated stretch of road.

All randomness comes from the counter-based generator in :mod:`wmplan.rng`, keyed by the scene key and the
vehicle's identity, so a scene starts the same whatever batch it is in.
"""

from __future__ import annotations

import numpy as np

from wmplan import rng
from wmplan.sim._jit import jit, kernel_array
from wmplan.sim.behaviour import idm_equilibrium_gap
from wmplan.sim.draws import combine5, to_unit
from wmplan.sim.params import NUM_TRAITS, T_T, T_V0, SimParams
from wmplan.sim.state import EGO, TrafficState

STREAM_INIT = rng.STREAM_INIT  # a compile-time constant of _grid_uniforms


def draw_traits(
    params: SimParams, key: np.ndarray, vehicle_id: np.ndarray, salt: int = 0, which: np.ndarray | None = None
) -> np.ndarray:
    """Hidden traits for vehicles with the given identities, (..., NT); ``key`` broadcasts against ``vehicle_id``.

    Each trait follows the scenario's normal distribution truncated to [low, high]. ``which`` (trait indices)
    draws only those traits, (..., len(which)), with the same values as the full draw has in those columns.
    """
    idx = np.arange(NUM_TRAITS) if which is None else np.asarray(which)
    return rng.truncated_normal(
        params.trait_mean[idx],
        params.trait_std[idx],
        params.trait_lo[idx],
        params.trait_hi[idx],
        key[..., None],
        rng.STREAM_TRAITS,
        vehicle_id[..., None],
        idx,
        salt,
    )


def draw_size(params: SimParams, key: np.ndarray, vehicle_id: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Length and width of vehicles with the given identities (truncated normals)."""
    # one call for both (elementwise the same draws as two calls with the last counter 101 and 102)
    dist = np.array([params.length_dist, params.width_dist])  # (2, 4): mean, std, low, high
    both = rng.truncated_normal(
        dist[:, 0],
        dist[:, 1],
        dist[:, 2],
        dist[:, 3],
        np.asarray(key)[..., None],
        rng.STREAM_TRAITS,
        np.asarray(vehicle_id)[..., None],
        np.array([101, 102]),
    )
    return both[..., 0], both[..., 1]


@jit
def _grid_uniforms(keys, lane, out):
    """``out[k, s, i]`` = ``rng.uniform(keys[s], rng.STREAM_INIT, lane, i, k + 1)`` (the same numbers, compiled)."""
    for s in range(keys.shape[0]):
        for i in range(out.shape[2]):
            for k in range(out.shape[0]):
                out[k, s, i] = to_unit(combine5(keys[s], STREAM_INIT, lane, i, k + 1))


@jit
def _thin(order, c_lane, c_x, c_len, need, c_placed, c_speed, ok, last):
    """Thin each scene's candidates (S, C) lane by lane, front to back (``order``: candidates by decreasing x): a
    candidate survives if its gap to the last survivor ahead in its lane is at least ``need`` (its equilibrium
    gap), or it is hand-placed; one that does not fit but is more than 8 m behind slows to that survivor's speed.
    Writes ``ok`` and ``c_speed`` in place; ``last`` (3, L) is work space."""
    for r in range(order.shape[0]):
        for ln in range(last.shape[1]):
            last[0, ln], last[1, ln], last[2, ln] = np.inf, 0.0, 0.0  # position, length, speed
        for j in range(order.shape[1]):
            ci = order[r, j]
            ln = min(max(c_lane[r, ci], 0), last.shape[1] - 1)
            gap = last[0, ln] - last[1, ln] / 2 - c_x[r, ci] - c_len[r, ci] / 2
            fits = gap >= need[r, ci] or c_placed[r, ci] >= 0
            alive = ok[r, ci] and (fits or gap > 8.0)
            if alive and not fits:
                c_speed[r, ci] = min(c_speed[r, ci], last[2, ln])
            ok[r, ci] = alive
            if alive:
                last[0, ln], last[1, ln], last[2, ln] = c_x[r, ci], c_len[r, ci], c_speed[r, ci]


def empty_state(params: SimParams, keys: np.ndarray) -> TrafficState:
    """A state whose slots are all empty except for the ego at its start position."""
    s, v = len(keys), params.num_vehicles
    scn = params.scenario
    z = np.zeros((s, v))
    valid = np.zeros((s, v), dtype=bool)
    valid[:, EGO] = True
    x = z.copy()
    y = z.copy()
    vx = z.copy()
    x[:, EGO] = scn.ego.x_m
    y[:, EGO] = params.lane_centre_m(scn.ego.lane)
    vx[:, EGO] = scn.ego.speed_mps
    length = np.full((s, v), 4.7)
    width = np.full((s, v), 1.85)
    length[:, EGO] = params.ego_length_m
    width[:, EGO] = params.ego_width_m
    lane = np.zeros((s, v), dtype=np.int64)
    lane[:, EGO] = scn.ego.lane
    vid = np.full((s, v), -1, dtype=np.int64)
    vid[:, EGO] = 0
    return TrafficState(
        key=np.asarray(keys, dtype=np.uint64).copy(),
        step=np.zeros(s, dtype=np.int64),
        next_id=np.ones(s, dtype=np.int64),
        x_m=x,
        y_m=y,
        vx_mps=vx,
        vy_mps=z.copy(),
        heading_rad=z.copy(),
        length_m=length,
        width_m=width,
        valid=valid,
        vehicle_id=vid,
        lane=lane,
        traits=np.broadcast_to(params.trait_mean, (s, v, NUM_TRAITS)).copy(),
        yield_state=np.zeros((s, v), dtype=np.int8),
        brake_timer_s=z.copy(),
        brake_decel_mps2=z.copy(),
        cooldown_s=z.copy(),
        ego_speed_mps=np.full(s, float(scn.ego.speed_mps)),
        ego_steer_rad=np.zeros(s),
        collided=np.zeros(s, dtype=bool),
        offroad=np.zeros(s, dtype=bool),
        reached_goal=np.zeros(s, dtype=bool),
    )


def initial_state(params: SimParams, seeds: np.ndarray | list[int] | int) -> TrafficState:
    """Start one scene per seed: the ego, the hand-placed vehicles, then random traffic at each lane's density.

    Random traffic is laid out lane by lane along the simulated stretch: candidate positions on a grid with
    jitter, each kept with probability density x spacing, then thinned so that every gap is at least the
    equilibrium gap of the follower at its starting speed. Vehicles fill free slots nearest the ego first.
    """
    keys = rng.scene_keys(seeds)
    st = empty_state(params, keys)
    s, v = st.num_scenes, st.num_vehicles
    scn = params.scenario
    ego_x = scn.ego.x_m
    arrays = {k: np.array(val) for k, val in st.to_arrays().items()}

    # --- candidates: hand-placed vehicles first, then a jittered grid per lane ---
    placed = scn.traffic.placed
    spacing = 12.0
    lo_x, hi_x = ego_x - params.window_behind_m, ego_x + params.window_ahead_m
    grid = np.arange(lo_x + spacing / 2, hi_x, spacing)
    cand_lane, cand_x, cand_placed = [], [], []
    for i, pv in enumerate(placed):
        cand_lane.append(np.full((s, 1), pv.lane))
        cand_x.append(np.full((s, 1), ego_x + pv.offset_m))
        cand_placed.append(np.full((s, 1), i))
    for lane in range(params.num_lanes):
        n = len(grid)
        u = np.empty((2, s, n))
        _grid_uniforms(kernel_array(keys, np.uint64), lane, u)
        jitter = (u[0] - 0.5) * spacing * 0.6
        keep_u = u[1]
        xs = grid[None, :] + jitter
        keep = keep_u < params.density_veh_per_m[lane] * spacing
        keep &= params.lane_exists(np.full_like(xs, lane, dtype=np.int64), xs)
        cand_lane.append(np.where(keep, lane, -1))
        cand_x.append(xs)
        cand_placed.append(np.full((s, n), -1))
    c_lane = np.concatenate(cand_lane, axis=1)  # (S, C)
    c_x = np.concatenate(cand_x, axis=1)
    c_placed = np.concatenate(cand_placed, axis=1)
    num_c = c_lane.shape[1]
    c_id = np.broadcast_to(np.arange(1, num_c + 1), (s, num_c))
    c_traits = draw_traits(params, keys[:, None], c_id)
    c_len, c_wid = draw_size(params, keys[:, None], c_id)
    for i, pv in enumerate(placed):
        sel = c_placed == i
        c_len = np.where(sel, pv.length_m, c_len)
        c_wid = np.where(sel, pv.width_m, c_wid)
        for name, tidx in (
            ("desired_speed_mps", T_V0),
            ("time_headway_s", T_T),
            ("politeness", 5),
            ("change_threshold_mps2", 6),
        ):
            val = getattr(pv, name)
            if val is not None:
                c_traits[..., tidx] = np.where(sel, val, c_traits[..., tidx])
    c_speed = np.minimum(c_traits[..., T_V0] * params.initial_speed_fraction, params.speed_limit_mps * 1.15)
    for i, pv in enumerate(placed):
        c_speed = np.where(c_placed == i, pv.speed_mps, c_speed)

    # --- drop candidates that overlap the ego or leave too small a gap in their lane (placed ones always stay) ---
    ok = c_lane >= 0
    ego_lane = scn.ego.lane
    dx_ego = c_x - ego_x
    ok &= ~((c_lane == ego_lane) & (np.abs(dx_ego) < 25.0) & (c_placed < 0))
    for pv in placed:
        ok &= ~((c_lane == pv.lane) & (np.abs(c_x - ego_x - pv.offset_m) < 30.0) & (c_placed < 0))
    # Thin each lane front to back: a candidate survives if the gap to the last survivor ahead suffices.
    order = np.argsort(-c_x, axis=1, kind="stable")
    need = idm_equilibrium_gap(
        np.minimum(c_speed, 0.97 * c_traits[..., T_V0]), c_traits[..., T_V0], c_traits[..., T_T], 2.0
    )
    c_speed = np.ascontiguousarray(c_speed, dtype=np.float64)
    ok = np.ascontiguousarray(ok)
    _thin(
        order,
        np.ascontiguousarray(c_lane, dtype=np.int64),
        np.ascontiguousarray(c_x, dtype=np.float64),
        np.ascontiguousarray(c_len, dtype=np.float64),
        np.ascontiguousarray(need, dtype=np.float64),
        np.ascontiguousarray(c_placed, dtype=np.int64),
        c_speed,
        ok,
        np.empty((3, params.num_lanes)),
    )

    # --- fill slots: placed first, then nearest to the ego ---
    prio = np.where(ok, np.abs(dx_ego) + np.where(c_placed >= 0, -1e6, 0.0), np.inf)
    pick = np.argsort(prio, axis=1, kind="stable")[:, : v - 1]  # (S, V-1)
    picked_ok = np.take_along_axis(ok, pick, axis=1)
    take = lambda a: np.take_along_axis(a, pick, axis=1)  # noqa: E731
    sl = slice(1, None)
    arrays["valid"][:, sl] = picked_ok
    arrays["x_m"][:, sl] = np.where(picked_ok, take(c_x), 0.0)
    lane_p = np.clip(take(c_lane), 0, params.num_lanes - 1)
    arrays["lane"][:, sl] = np.where(picked_ok, lane_p, 0)
    arrays["y_m"][:, sl] = np.where(picked_ok, params.lane_centre_m(lane_p), 0.0)
    arrays["vx_mps"][:, sl] = np.where(picked_ok, take(c_speed), 0.0)
    arrays["length_m"][:, sl] = np.where(picked_ok, take(c_len), 4.7)
    arrays["width_m"][:, sl] = np.where(picked_ok, take(c_wid), 1.85)
    arrays["vehicle_id"][:, sl] = np.where(picked_ok, take(c_id), -1)
    arrays["traits"][:, sl] = np.where(
        picked_ok[..., None], np.take_along_axis(c_traits, pick[..., None], axis=1), params.trait_mean
    )
    arrays["next_id"][:] = num_c + 1
    return TrafficState.from_arrays(arrays)
