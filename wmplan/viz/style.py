"""The colours and sizes of wmplan's visual language, in one place.

Every plot, animation and report draws with these values, so a reader who has learnt them once reads every
figure: the ego in deep orange, other vehicles in slate grey, sampled futures of the learned model as translucent
violet fans, the oracle's futures in teal, a collision as a black cross, the road in light grey with white lane
markings. The hex values are our own choice.
"""

from __future__ import annotations

# --- vehicles -----------------------------------------------------------------------------------------------------
EGO_COLOUR = "#c8460c"
"""Deep orange: the ego vehicle."""
EGO_EDGE_COLOUR = "#7a2806"
TRAFFIC_COLOUR = "#56677a"
"""Slate grey: every other vehicle."""
TRAFFIC_EDGE_COLOUR = "#2e3946"
HEADING_MARK_COLOUR = "#ffffff"
"""The small triangle at the front of each vehicle that shows which way it points."""
HEADING_MARK_ALPHA = 0.85

# --- futures ------------------------------------------------------------------------------------------------------
SAMPLED_FUTURE_COLOUR = "#7546c9"
"""Violet: futures sampled from the learned forward model."""
SAMPLED_FUTURE_ALPHA = 0.22
ORACLE_FUTURE_COLOUR = "#0f9186"
"""Teal: futures rolled out by the true simulator (the oracle)."""
ORACLE_FUTURE_ALPHA = 0.35

# --- events -------------------------------------------------------------------------------------------------------
COLLISION_COLOUR = "#000000"
"""A black cross marks a collision."""
COLLISION_MARKER_SIZE_PT = 15.0
COLLISION_MARKER_WIDTH_PT = 3.0

# --- road ---------------------------------------------------------------------------------------------------------
ROAD_COLOUR = "#cdd1d6"
"""Light grey: the drivable lanes."""
MARKING_COLOUR = "#ffffff"
"""White: lane markings (dashed between two lanes, solid at the road's edges and where a lane starts or ends)."""
VERGE_COLOUR = "#eceee4"
"""Pale background beside the road (off-road)."""
ROAD_OUTLINE_COLOUR = "#8e959e"
"""A thin darker line just outside the solid edges, so that the white edge reads against the pale verge."""
GOAL_COLOUR = "#2f3540"
"""The line across the goal lanes at the goal position."""
TEXT_COLOUR = "#222222"

DASH_LENGTH_M = 3.0
"""Length of one painted dash of a lane marking, metres (a drawing choice, not a rule of any road authority)."""
DASH_GAP_M = 6.0
MARKING_WIDTH_PT = 1.1
EDGE_WIDTH_PT = 1.6

FONT_SIZE_PT = 9.0


def hex_to_rgb(colour: str) -> tuple[int, int, int]:
    """``"#rrggbb"`` -> (r, g, b) in 0..255, for comparing rendered pixels with the palette."""
    text = colour.lstrip("#")
    if len(text) != 6:
        raise ValueError(f"colour must be '#rrggbb', got {colour!r}")
    return int(text[0:2], 16), int(text[2:4], 16), int(text[4:6], 16)


# --- predictions and statistics (figures of futures, plans and results) -----------------------------------------------
DETERMINISTIC_COLOUR = "#3a3a3a"
"""Dark grey, drawn dashed: the least-squares (deterministic) model's single prediction, the blurry mean."""
EGO_PLAN_COLOUR = EGO_COLOUR
"""The ego's own planned path is drawn in the ego's colour."""
RISK_COLOURS = ("#2b8a3e", "#c9b800", "#e8590c", "#a61e1e", "#3d0c02")
"""Green through yellow and red to near black: a colour scale of collision probability from 0 to 1 (kept clear of
violet and teal, which belong to futures)."""
PLANNER_COLOURS = ("#1f5fa8", "#2b8a3e", "#b8860b", "#a61e4d", "#343a40", "#5c940d")
"""Blue, green, dark gold, crimson, charcoal, olive: one per planner in result plots, distinct from the scene
colours (the same values as the sweep plots use)."""
DIAGONAL_COLOUR = "#9aa0a6"
"""The identity line of a reliability diagram."""
