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

import math

import numpy as np

from wmplan.sim._jit import jit
from wmplan.sim.ego_rules import _ego_lane_end_gap_k
from wmplan.sim.engine import Packed, param_table
from wmplan.sim.kernel import F_H, F_LEN, F_VX, F_WID, F_X, F_Y, P_MAX_BRAKE, S_EGO_SPEED
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState

THREAT_CAP = 10.0


@jit
def _threat_scene(sc, ln, x, y, vx, heading, length, width, valid, speed):
    """The brake threat of one scene (module docstring), before the cap."""
    v_ego = speed * math.cos(heading[EGO])
    a_leader = 0.0
    for j in range(1, x.shape[0]):
        dx = x[j] - x[EGO]
        if not (valid[j] and dx > 0 and abs(y[j] - y[EGO]) <= 0.5 * (width[j] + width[EGO])):
            continue
        gap = dx - 0.5 * (length[j] + length[EGO])
        closing = v_ego - vx[j]
        if closing > 0:
            need = closing * closing / (2.0 * gap) if gap > 0 else np.inf
            a_leader = max(a_leader, need)
    d_end = _ego_lane_end_gap_k(sc, ln, x[EGO], y[EGO], length[EGO], width[EGO], heading[EGO])
    a_end = 0.0
    if math.isfinite(d_end):
        a_end = v_ego * v_ego / (2.0 * d_end) if d_end > 0 else np.inf
    return max(a_leader, a_end) / sc[P_MAX_BRAKE]


@jit
def _threats(sc, ln, vf, valid, sf, out):
    for s in range(out.shape[0]):
        out[s] = min(
            _threat_scene(
                sc,
                ln,
                vf[F_X, s],
                vf[F_Y, s],
                vf[F_VX, s],
                vf[F_H, s],
                vf[F_LEN, s],
                vf[F_WID, s],
                valid[s],
                sf[S_EGO_SPEED, s],
            ),
            THREAT_CAP,
        )


def brake_threat(state: TrafficState, params: SimParams) -> np.ndarray:
    """(S,) deceleration needed to avoid the obstacle ahead over the ego's braking limit (module docstring).
    Compiled, one scene at a time."""
    table, p = param_table(params), Packed.of(state)
    out = np.empty(state.num_scenes)
    _threats(table.scalars[0], table.lanes[0], p.vf, p.valid, p.sf, out)
    return out
