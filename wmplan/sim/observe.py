"""Ego-centred object lists: the observation shared by the gymnasium env, the datasets and the forward model.

Feature layouts are defined in :mod:`wmplan.sim.features`. Functions here work on plain arrays of world-frame
vehicle rows with any leading axes (``(..., V, F)``, slot 0 the ego), so the data layer can apply them to stored
trajectories without a simulator state.
"""

from __future__ import annotations

import numpy as np

from wmplan.sim.features import (
    DEFAULT_NUM_OBJECTS,
    F_HEADING,
    F_VALID,
    F_VX,
    F_VY,
    F_X,
    F_Y,
    LANE_END_CAP_M,
    NUM_ROAD_FEATURES,
    NUM_VEHICLE_FEATURES,
)
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


def observe(state: TrafficState, params: SimParams, num_objects: int = DEFAULT_NUM_OBJECTS):
    """Object list (S, 1 + M, F), road context (S, 6) and source slots (S, 1 + M) of every scene."""
    rows = state.vehicles()
    objects, slots = object_list(rows, num_objects)
    road = road_features(params, state.x_m[:, EGO], state.y_m[:, EGO])
    assert objects.shape[-1] == NUM_VEHICLE_FEATURES
    return objects, road, slots
