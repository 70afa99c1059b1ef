"""How hard the ego would have to brake to avoid what is ahead of it, as a share of the braking it has.

``brake_threat(state, params)`` per scene (S,)::

    threat = max(a_leader, a_lane_end) / max_brake
    a_leader   = closing^2 / (2 gap)     the nearest vehicle ahead in the ego's path (lateral overlap), if closing
    a_lane_end = v^2 / (2 d_end)         the end of any lane the ego's body reaches into, if it ends ahead

the constant deceleration that just avoids the obstacle (the leader keeping its speed; common practice of
constant-acceleration kinematics, no source), over the ego's braking limit ``params.max_brake_mps2``: below 1 the
brakes alone can still avoid it; at or above 1 they cannot (steering might). This is the brake threat number of
the automotive threat-assessment literature (from memory). Stress tests rank near misses by it: unlike a
time-to-collision, it knows how well the ego can brake. Capped at ``THREAT_CAP`` (a gap of zero or less).
"""

from __future__ import annotations

import numpy as np

from wmplan.sim.ego_rules import ego_lane_end_gap
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState

THREAT_CAP = 10.0


def brake_threat(state: TrafficState, params: SimParams) -> np.ndarray:
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
