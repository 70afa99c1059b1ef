"""Ego-centred object lists: the observation shared by the gymnasium env, the datasets and the forward model.

Feature layouts are defined in :mod:`wmplan.sim.features`. The numpy functions here work on plain arrays of
world-frame vehicle rows with any leading axes (``(..., V, F)``, slot 0 the ego), so the data layer can apply them
to stored trajectories without a simulator state. :func:`observe` (a simulator state's object list and road
context, what the environments return every step) runs the same rules compiled, one scene at a time
(:func:`_observe_scenes`); tests/sim/test_observe.py checks it against the numpy functions.
"""

from __future__ import annotations

import math

import numpy as np

from wmplan.sim._jit import jit
from wmplan.sim.features import (
    DEFAULT_NUM_OBJECTS,
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_WIDTH,
    F_X,
    F_Y,
    LANE_END_CAP_M,
    NUM_ROAD_FEATURES,
    NUM_VEHICLE_FEATURES,
)
from wmplan.sim.kernel import F_H as K_H
from wmplan.sim.kernel import F_LEN as K_LEN
from wmplan.sim.kernel import F_VX as K_VX
from wmplan.sim.kernel import F_VY as K_VY
from wmplan.sim.kernel import F_WID as K_WID
from wmplan.sim.kernel import F_X as K_X
from wmplan.sim.kernel import F_Y as K_Y
from wmplan.sim.kernel import P_NUM_LANES, _centre, _exists, _lane_of, _to_end
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState


def wrap_angle(a: np.ndarray) -> np.ndarray:
    """Wrap angles to (-pi, pi]."""
    return np.pi - (np.pi - a) % (2.0 * np.pi)


def to_frame(rows: np.ndarray, origin_xy: np.ndarray, origin_heading: np.ndarray) -> np.ndarray:
    """Express world-frame vehicle rows in a frame at ``origin_xy`` rotated by ``origin_heading``.

    Args:
        rows: (..., V, F) world-frame rows in ``VEHICLE_FEATURES`` order.
        origin_xy: (..., 2) frame origin.
        origin_heading: (...,) frame rotation in radians.

    Returns:
        (..., V, F) rows in that frame; invalid rows are zeroed.
    """
    c = np.cos(origin_heading)[..., None]
    s = np.sin(origin_heading)[..., None]
    dx = rows[..., F_X] - origin_xy[..., None, 0]
    dy = rows[..., F_Y] - origin_xy[..., None, 1]
    out = rows.copy()
    out[..., F_X] = c * dx + s * dy
    out[..., F_Y] = -s * dx + c * dy
    out[..., F_VX] = c * rows[..., F_VX] + s * rows[..., F_VY]
    out[..., F_VY] = -s * rows[..., F_VX] + c * rows[..., F_VY]
    out[..., F_HEADING] = wrap_angle(rows[..., F_HEADING] - origin_heading[..., None])
    return out * (rows[..., F_VALID : F_VALID + 1] > 0.5)


def nearest_slots(rows: np.ndarray, num_objects: int = DEFAULT_NUM_OBJECTS) -> np.ndarray:
    """Slots of the ego and its ``num_objects`` nearest valid vehicles, nearest first; -1 pads.

    Args:
        rows: (..., V, F) world-frame rows, slot 0 the ego.

    Returns:
        (..., 1 + num_objects) int64 slot indices.
    """
    dist2 = (rows[..., 1:, F_X] - rows[..., :1, F_X]) ** 2 + (rows[..., 1:, F_Y] - rows[..., :1, F_Y]) ** 2
    dist2 = np.where(rows[..., 1:, F_VALID] > 0.5, dist2, np.inf)
    order = np.argsort(dist2, axis=-1, kind="stable")
    n_other = rows.shape[-2] - 1
    take = min(num_objects, n_other)
    picked = order[..., :take] + 1
    ok = np.take_along_axis(np.isfinite(dist2), order[..., :take], axis=-1)
    picked = np.where(ok, picked, -1)
    if take < num_objects:
        pad = np.full(picked.shape[:-1] + (num_objects - take,), -1, dtype=np.int64)
        picked = np.concatenate([picked, pad], axis=-1)
    ego = np.zeros(picked.shape[:-1] + (1,), dtype=np.int64)
    return np.concatenate([ego, picked], axis=-1)


def gather_slots(rows: np.ndarray, slots: np.ndarray) -> np.ndarray:
    """Rows of the given slots, (..., K, F); slot -1 gives an all-zero row."""
    safe = np.where(slots >= 0, slots, 0)
    out = np.take_along_axis(rows, safe[..., None], axis=-2)
    return out * (slots >= 0)[..., None]


def object_list(rows: np.ndarray, num_objects: int = DEFAULT_NUM_OBJECTS) -> tuple[np.ndarray, np.ndarray]:
    """Ego-frame object list of the ego and its nearest vehicles.

    Args:
        rows: (..., V, F) world-frame rows, slot 0 the ego.
        num_objects: M, how many other vehicles to keep.

    Returns:
        objects (..., 1 + M, F) in the ego's frame, and the slots they came from (..., 1 + M) (-1 for padding).
    """
    slots = nearest_slots(rows, num_objects)
    ego = rows[..., EGO, :]
    frame = to_frame(gather_slots(rows, slots), ego[..., [F_X, F_Y]], ego[..., F_HEADING])
    return frame, slots


def road_features(params: SimParams, ego_x_m: np.ndarray, ego_y_m: np.ndarray) -> np.ndarray:
    """Road context of the ego (..., 6), in ``ROAD_FEATURES`` order."""
    ego_x_m = np.asarray(ego_x_m, dtype=np.float64)
    ego_y_m = np.asarray(ego_y_m, dtype=np.float64)
    lane = params.lane_of(ego_y_m)
    offset = ego_y_m - params.lane_centre_m(lane)
    lanes = np.arange(params.num_lanes)
    exists = params.lane_exists(lanes, ego_x_m[..., None])  # (..., L)
    left = (exists & (lanes > lane[..., None])).sum(-1)
    right = (exists & (lanes < lane[..., None])).sum(-1)

    def end_of(li: np.ndarray) -> np.ndarray:
        ok = params.lane_exists(li, ego_x_m)
        d = np.minimum(params.distance_to_lane_end(li, ego_x_m), LANE_END_CAP_M)
        return np.where(ok, np.clip(d, 0.0, LANE_END_CAP_M), 0.0)

    out = np.stack(
        [offset, end_of(lane), left.astype(np.float64), right.astype(np.float64), end_of(lane - 1), end_of(lane + 1)],
        axis=-1,
    )
    assert out.shape[-1] == NUM_ROAD_FEATURES
    return out


@jit
def _nearest(x, y, valid, slots):
    """Slots of the ego and its nearest valid vehicles by centre distance into ``slots`` (1 + M,), nearest first,
    -1 pads; a tie goes to the lower slot (the order of the stable sort of :func:`nearest_slots`)."""
    slots[0] = EGO
    last_d, last_j = -1.0, -1  # each pick is the least (distance^2, slot) after the previous pick's
    for k in range(1, slots.shape[0]):
        best, best_d = -1, np.inf
        for j in range(1, x.shape[0]):
            if not valid[j]:
                continue
            dx, dy = x[j] - x[EGO], y[j] - y[EGO]
            d = dx * dx + dy * dy
            if (d > last_d or (d == last_d and j > last_j)) and d < best_d:
                best, best_d = j, d
        slots[k] = best
        if best < 0:
            for r in range(k + 1, slots.shape[0]):
                slots[r] = -1
            return
        last_d, last_j = best_d, best


@jit
def _object_rows(x, y, vx, vy, heading, length, width, slots, out):
    """Rows of the given slots in the ego's frame (:func:`to_frame` of :func:`gather_slots`) into ``out``
    (1 + M, F); slot -1 gives a zero row."""
    ex, ey, eh = x[EGO], y[EGO], heading[EGO]
    c, s = math.cos(eh), math.sin(eh)
    for k in range(slots.shape[0]):
        j = slots[k]
        if j < 0:
            for f in range(out.shape[1]):
                out[k, f] = 0.0
            continue
        dx, dy = x[j] - ex, y[j] - ey
        out[k, F_X] = c * dx + s * dy
        out[k, F_Y] = -s * dx + c * dy
        out[k, F_VX] = c * vx[j] + s * vy[j]
        out[k, F_VY] = -s * vx[j] + c * vy[j]
        out[k, F_HEADING] = np.pi - (np.pi - (heading[j] - eh)) % (2.0 * np.pi)
        out[k, F_LENGTH], out[k, F_WIDTH], out[k, F_VALID] = length[j], width[j], 1.0


@jit
def _lane_end_feature(sc, ln, lane, x):
    """Distance to the end of ``lane`` clipped to [0, LANE_END_CAP_M]; 0 where the lane does not exist at x."""
    if not _exists(sc, ln, lane, x):
        return 0.0
    return min(max(_to_end(sc, ln, lane, x), 0.0), LANE_END_CAP_M)


@jit
def _road_row(sc, ln, x, y, out):
    """Road context of an ego at (x, y) into ``out`` (6,) (:func:`road_features`)."""
    lane = _lane_of(sc, y)
    left, right = 0, 0
    for other in range(int(sc[P_NUM_LANES])):
        if _exists(sc, ln, other, x):
            left += other > lane
            right += other < lane
    out[0] = y - _centre(sc, lane)
    out[1] = _lane_end_feature(sc, ln, lane, x)
    out[2], out[3] = left, right
    out[4] = _lane_end_feature(sc, ln, lane - 1, x)
    out[5] = _lane_end_feature(sc, ln, lane + 1, x)


@jit
def _observe_scenes(sc, ln, vf, valid, objects, road, slots):
    """:func:`observe` of every scene: the packed (NVF, S, V) float fields and (S, V) ``valid`` of
    :class:`~wmplan.sim.engine.Packed` in; objects (S, 1 + M, F), road (S, 6), slots (S, 1 + M) out. ``sc``,
    ``ln``: one row of the kernel's parameter tables."""
    x, y = vf[K_X], vf[K_Y]
    for s in range(x.shape[0]):
        _nearest(x[s], y[s], valid[s], slots[s])
        _object_rows(x[s], y[s], vf[K_VX, s], vf[K_VY, s], vf[K_H, s], vf[K_LEN, s], vf[K_WID, s], slots[s], objects[s])
        _road_row(sc, ln, x[s, EGO], y[s, EGO], road[s])


def observe(
    state: TrafficState, params: SimParams, num_objects: int = DEFAULT_NUM_OBJECTS, dtype=np.float64
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Object list (S, 1 + M, F), road context (S, 6) and source slots (S, 1 + M) of every scene: the values of
    :func:`object_list` and :func:`road_features` (compiled; float64, or as ``astype(dtype)`` rounds them)."""
    from wmplan.sim.engine import Packed, param_table  # the engine's layout and parameter table (made once)

    table, packed = param_table(params), Packed.of(state)
    s_n = state.num_scenes
    objects = np.empty((s_n, 1 + num_objects, NUM_VEHICLE_FEATURES))
    road = np.empty((s_n, NUM_ROAD_FEATURES))
    slots = np.empty((s_n, 1 + num_objects), dtype=np.int64)
    _observe_scenes(table.scalars[0], table.lanes[0], packed.vf, packed.valid, objects, road, slots)
    if dtype != np.float64:
        return objects.astype(dtype), road.astype(dtype), slots
    return objects, road, slots
