"""Oriented-rectangle overlap by the separating-axis theorem, vectorised.

Two convex polygons are disjoint iff an edge normal of one of them separates their projections; for two
rectangles the four edge directions suffice (Gottschalk, Lin, Manocha, "OBBTree", SIGGRAPH 1996; Ericson,
*Real-Time Collision Detection*, 2005, ch. 4). Touching boxes count as overlapping (strict separation needed).
"""

from __future__ import annotations

import numpy as np


def box_corners(cx_m, cy_m, length_m, width_m, heading_rad):
    """Corners of oriented boxes, shape (..., 4, 2), counter-clockwise from front-left."""
    c, s = np.cos(heading_rad), np.sin(heading_rad)
    hl, hw = 0.5 * np.asarray(length_m), 0.5 * np.asarray(width_m)
    sx = np.array([1.0, -1.0, -1.0, 1.0])
    sy = np.array([1.0, 1.0, -1.0, -1.0])
    lx = hl[..., None] * sx  # (..., 4)
    ly = hw[..., None] * sy
    x = cx_m[..., None] + c[..., None] * lx - s[..., None] * ly
    y = cy_m[..., None] + s[..., None] * lx + c[..., None] * ly
    return np.stack([x, y], axis=-1)


def boxes_overlap(a_cx, a_cy, a_len, a_wid, a_head, b_cx, b_cy, b_len, b_wid, b_head):
    """True where box a and box b overlap or touch; all inputs broadcast together.

    Uses the projection radius form of the separating-axis test: along a unit axis n, a box of half extents
    (hl, hw) and axes (u, v) projects to radius hl |u.n| + hw |v.n| around its centre.
    """
    dx = np.asarray(b_cx) - a_cx
    dy = np.asarray(b_cy) - a_cy
    ca, sa = np.cos(a_head), np.sin(a_head)
    cb, sb = np.cos(b_head), np.sin(b_head)
    ahl, ahw = 0.5 * np.asarray(a_len), 0.5 * np.asarray(a_wid)
    bhl, bhw = 0.5 * np.asarray(b_len), 0.5 * np.asarray(b_wid)
    # Cosines between the box axes: u_a.u_b, u_a.v_b, v_a.u_b, v_a.v_b.
    c_uu = np.abs(ca * cb + sa * sb)
    c_uv = np.abs(-ca * sb + sa * cb)
    c_vu = np.abs(-sa * cb + ca * sb)
    c_vv = np.abs(sa * sb + ca * cb)
    separated = np.abs(dx * ca + dy * sa) > ahl + bhl * c_uu + bhw * c_uv  # axis u_a
    separated |= np.abs(-dx * sa + dy * ca) > ahw + bhl * c_vu + bhw * c_vv  # axis v_a
    separated |= np.abs(dx * cb + dy * sb) > bhl + ahl * c_uu + ahw * c_vu  # axis u_b
    separated |= np.abs(-dx * sb + dy * cb) > bhw + ahl * c_uv + ahw * c_vv  # axis v_b
    return ~separated
