"""The episode row: one schema, versioned, for every closed-loop episode of ``evaluate``, sweeps and stress tests.

:data:`COLUMNS` is the one definition of each column (name, unit, definition); ``docs/episode-rows.md`` is
written from it (:func:`columns_markdown`, checked by a test). An episode ends at the first of: collision,
leaving the road, reaching the goal (the engine's ``state.done``), or the scenario's duration; the metrics below
are taken at every simulator step while it runs (the state at the start included).

Rows certify nothing about a real vehicle: the traffic model is simplified.
"""

from __future__ import annotations

import numpy as np

from wmplan.sim.state import EGO, TrafficState

ROWS_VERSION = 3
"""Bumped whenever a column is added, removed or redefined (sweep cells of another version are not reused)."""

NEAR_MISS_TTC_S = 1.5
"""Time-to-collision below which an episode counts as a near miss
(docs/references.md#van-der-horst-1990-ttc-threshold)."""
NEAR_MISS_BRAKE_THREAT = 1.0
"""Brake threat above which an episode counts as a near miss: the ego's brakes alone could no longer avoid it."""

COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("planner", "", "the planner spec that drove the ego (a name or an import path)"),
    ("episode", "", "index of the episode in its run: evaluate 0..N-1, a sweep cell's episodes 0..n-1"),
    ("seed", "", "the scene seed: wmplan.sim.spawn.initial_state(params, [seed]) is the episode's start"),
    ("collision", "bool", "the ego's footprint overlapped another vehicle's before the episode ended"),
    ("contact_side", "", "side of the ego touched in a collision (front, rear, left, right); empty without one"),
    ("offroad", "bool", "a corner of the ego left the lanes before the episode ended"),
    ("success", "bool", "the ego reached its goal (goal x in a goal lane) without a collision or leaving the road"),
    (
        "outcome",
        "",
        "how the episode ended: collision, offroad, goal or timeout (a collision outranks leaving "
        "the road in the same step)",
    ),
    ("final_lane", "", "the lane holding the ego's centre when the episode ended"),
    ("in_goal_lane", "bool", "whether that lane is one of the goal's lanes (a timeout outside them is a stall)"),
    ("progress_m", "m", "ego x at the end of the episode minus ego x at the start"),
    ("mean_speed_mps", "m/s", "mean ego speed over the simulator steps of the episode"),
    (
        "min_clearance_m",
        "m",
        "smallest distance between the ego's and another vehicle's footprint taken as "
        "axis-aligned boxes (negative: overlap depth); inf if no other vehicle was present",
    ),
    (
        "min_ttc_s",
        "s",
        "smallest time-to-collision to a vehicle ahead in the ego's path (lateral overlap of the "
        "boxes): bumper gap over closing speed at constant speeds (docs/references.md#hayward-1972-ttc); inf if the "
        "ego never closed in on anyone",
    ),
    (
        "max_brake_threat",
        "",
        "largest deceleration the ego needed to avoid the vehicle or lane end ahead, over its "
        "braking limit (wmplan.sim.threat; >= 1: its brakes alone could not), capped at 10",
    ),
    ("near_miss", "bool", f"min_ttc_s < {NEAR_MISS_TTC_S} s or max_brake_threat > 1, without a collision"),
    ("rms_jerk_mps3", "m/s^3", "root mean square of the ego's longitudinal jerk over the steps of the episode"),
    ("decisions", "", "planner decisions made while the episode ran"),
    ("time_s", "s", "simulated time until the episode ended (steps x the scenario's time step)"),
    (
        "decision_ms",
        "ms",
        "planner wall time per decision, shared equally among the episodes of the batch (a "
        "timing: differs between runs)",
    ),
    (
        "log_weight",
        "",
        "only with an event tilt (importance sampling): log of nominal over tilted likelihood of "
        "the episode's random draws (wmplan.sim.tilt)",
    ),
)
COLUMN_NAMES = tuple(c[0] for c in COLUMNS)
TIMING_COLUMNS = ("decision_ms",)
"""Columns that measure the machine, not the episode: excluded when rows of two runs are compared."""
BOOL_COLUMNS = tuple(c[0] for c in COLUMNS if c[1] == "bool")


def columns_markdown() -> str:
    """The column table as markdown (what ``docs/episode-rows.md`` holds below its heading)."""
    lines = ["| column | unit | definition |", "|---|---|---|"]
    lines += [f"| `{name}` | {unit if unit != 'bool' else 'true/false'} | {text} |" for name, unit, text in COLUMNS]
    return "\n".join(lines) + "\n"


def is_near_miss(
    min_ttc_s: np.ndarray | float,
    max_brake_threat: np.ndarray | float,
    collision: np.ndarray | bool,
    ttc_threshold_s: float = NEAR_MISS_TTC_S,
    brake_threat_threshold: float = NEAR_MISS_BRAKE_THREAT,
) -> np.ndarray:
    """The ``near_miss`` column from its three inputs (arrays of one shape, or scalars): no collision, and the
    smallest TTC below ``ttc_threshold_s`` or the brake threat above ``brake_threat_threshold`` (NaN meets
    neither). The one definition: ``wmplan.evaluate.stats.is_near_miss`` applies it to a row."""
    close = (np.asarray(min_ttc_s) < ttc_threshold_s) | (np.asarray(max_brake_threat) > brake_threat_threshold)
    return close & ~np.asarray(collision, dtype=bool)


def clearance_and_ttc(state: TrafficState) -> tuple[np.ndarray, np.ndarray]:
    """Per scene: footprint clearance to the nearest other vehicle and time-to-collision to the one ahead, (S,).

    Footprints are taken as axis-aligned boxes (headings on a straight road stay small); the clearance is the
    Euclidean distance between the boxes, or minus the smaller overlap depth if they overlap. A vehicle is ahead
    in the ego's path when the boxes overlap laterally and its centre is ahead; its TTC is the gap between the
    boxes over the closing speed, if it is closing.
    """
    dx = state.x_m - state.x_m[:, :1]  # (S, V)
    dy = state.y_m - state.y_m[:, :1]
    gap_x = np.abs(dx) - 0.5 * (state.length_m + state.length_m[:, :1])  # (S, V)
    gap_y = np.abs(dy) - 0.5 * (state.width_m + state.width_m[:, :1])
    apart = np.hypot(np.maximum(gap_x, 0.0), np.maximum(gap_y, 0.0))
    clearance = np.where((gap_x < 0) & (gap_y < 0), np.maximum(gap_x, gap_y), apart)
    other = state.valid.copy()
    other[:, EGO] = False
    clearance = np.where(other, clearance, np.inf).min(axis=1)
    ahead = other & (gap_y < 0) & (dx > 0)
    closing = state.vx_mps[:, :1] - state.vx_mps  # (S, V)
    with np.errstate(divide="ignore", invalid="ignore"):
        ttc = np.where(ahead & (closing > 0) & (gap_x > 0), gap_x / closing, np.inf)
    return clearance, ttc.min(axis=1)


def rows_table(rows: list[dict]):
    """A pyarrow table of rows with the caution and the row version in its schema metadata."""
    import pyarrow as pa

    from wmplan.caution import CAUTION

    table = pa.Table.from_pylist(rows)
    meta = dict(table.schema.metadata or {})
    meta.update({b"wmplan_rows_version": str(ROWS_VERSION).encode(), b"caution": CAUTION.encode()})
    return table.replace_schema_metadata(meta)
