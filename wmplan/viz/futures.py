"""Figures of predicted futures: fans of sampled futures against the oracle's, and the risk over candidate plans.

Arrays in, a ``matplotlib.figure.Figure`` on its own Agg canvas out (no pyplot, no global state, no torch).
Everything is drawn in one decision's *anchor frame*: the ego at the origin at the decision, x along its heading
(metres ahead), y to its left (metres), as the forward model and the predictors of :mod:`wmplan.plan.predictors`
produce them.

Letters in shapes: W history steps, K futures, H horizon steps, N object rows (row 0 the ego), C candidate plans,
F = 8 features in ``wmplan.sim.features.VEHICLE_FEATURES`` order.

Colours follow :mod:`wmplan.viz.style`: ego deep orange, other vehicles slate grey, futures sampled from the
learned model translucent violet, the oracle's futures teal, the least-squares prediction dark grey and dashed, a
collision in a future a black cross, the road light grey with white markings.
"""

from __future__ import annotations

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import LineCollection, PolyCollection
from matplotlib.colors import LinearSegmentedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.patheffects import Normal, Stroke, withStroke

from wmplan.errors import ConfigError
from wmplan.sim.collision import boxes_overlap
from wmplan.sim.features import F_HEADING, F_LENGTH, F_VALID, F_WIDTH, F_X, F_Y, NUM_VEHICLE_FEATURES
from wmplan.sim.params import SimParams
from wmplan.viz import style
from wmplan.viz.scene import dash_segments, goal_segments, road_markings, vehicle_polygons

RISK_CMAP = LinearSegmentedColormap.from_list("wmplan_risk", list(style.RISK_COLOURS))
"""Colour scale of P(collision) on [0, 1]."""
FUTURE_LINE_PT = 0.9
"""Line width of one sampled future."""
MARGIN_M = 6.0
"""Space left around the drawn objects, metres."""
VIEW_BEHIND_M = 45.0
"""Default view: at most this far behind the ego ..."""
VIEW_AHEAD_M = 45.0
"""... to at most this far beyond the end of the ego's own path."""
_LEFT_IN, _RIGHT_IN, _TOP_IN, _XLABEL_IN = 0.7, 0.25, 0.42, 0.5  # fixed margins (tick labels, axis labels, title)


# --- inputs -------------------------------------------------------------------------------------------------------


def _rows(arr: object, name: str, ndim: int, what: str) -> np.ndarray:
    """``arr`` as float64 with ``ndim`` axes and 8 features last, or a one-line ConfigError."""
    a = np.asarray(arr, dtype=np.float64)
    if a.ndim != ndim or a.shape[-1] != NUM_VEHICLE_FEATURES or 0 in a.shape:
        raise ConfigError(
            f"{name} must have shape {what} with F = {NUM_VEHICLE_FEATURES} features and no empty axis, got {a.shape}"
        )
    return a


def _valid(rows: np.ndarray) -> np.ndarray:
    """(...) True where a row holds a vehicle with finite position."""
    return (rows[..., F_VALID] > 0.5) & np.isfinite(rows[..., F_X]) & np.isfinite(rows[..., F_Y])


def _pose(anchor_pose: object) -> tuple[float, float, float]:
    p = np.asarray(anchor_pose, dtype=np.float64).ravel()
    if p.shape != (3,) or not np.isfinite(p).all():
        raise ConfigError(
            f"anchor_pose must be three finite numbers (x_m, y_m, heading_rad) of the ego in the world "
            f"at the decision, got {np.asarray(anchor_pose).tolist()!r}"
        )
    return float(p[0]), float(p[1]), float(p[2])


# --- pieces drawn on axes the caller owns -------------------------------------------------------------------------


def _to_anchor(xy: np.ndarray, pose: tuple[float, float, float]) -> np.ndarray:
    """World points (..., 2) -> anchor frame (..., 2)."""
    c, s = np.cos(pose[2]), np.sin(pose[2])
    dx, dy = xy[..., 0] - pose[0], xy[..., 1] - pose[1]
    return np.stack([c * dx + s * dy, -s * dx + c * dy], axis=-1)


def draw_road_anchor(ax: Axes, params: SimParams, anchor_pose: object, x_range_m: tuple[float, float]) -> None:
    """Draw the road (lanes light grey, markings white, goal line) in the anchor frame of ``anchor_pose``.

    Args:
        ax: axes to draw on.
        params: the scenario's arrays (road geometry).
        anchor_pose: (x_m, y_m, heading_rad) of the ego in the world at the decision.
        x_range_m: (low, high) of the view in the anchor frame, metres ahead of the ego.
    """
    pose = _pose(anchor_pose)
    lo, hi = pose[0] + x_range_m[0] - 50.0, pose[0] + x_range_m[1] + 50.0  # world x, with room for a rotated view
    ax.set_facecolor(style.VERGE_COLOUR)
    w = params.lane_width_m
    quads = []
    for i, (start, end) in enumerate(zip(params.lane_start_m, params.lane_end_m, strict=True)):
        a, b = max(float(start), lo), min(float(end), hi)
        if b > a:
            quads.append([[a, i * w], [b, i * w], [b, (i + 1) * w], [a, (i + 1) * w]])
    if quads:
        ax.add_collection(
            PolyCollection(
                _to_anchor(np.asarray(quads), pose), facecolors=style.ROAD_COLOUR, edgecolors="none", zorder=0.5
            )
        )
    dashed, solid = road_markings(params)
    if solid.size:
        seg = _to_anchor(solid, pose)
        ax.add_collection(
            LineCollection(
                seg, colors=style.ROAD_OUTLINE_COLOUR, linewidths=style.EDGE_WIDTH_PT + 1.4, capstyle="butt", zorder=1.0
            )
        )
        ax.add_collection(
            LineCollection(
                seg, colors=style.MARKING_COLOUR, linewidths=style.EDGE_WIDTH_PT, capstyle="butt", zorder=1.1
            )
        )
    dashes = dash_segments(dashed, lo, hi)
    if dashes.size:
        ax.add_collection(
            LineCollection(
                _to_anchor(dashes, pose),
                colors=style.MARKING_COLOUR,
                linewidths=style.MARKING_WIDTH_PT,
                capstyle="butt",
                zorder=1.2,
            )
        )
    goal = goal_segments(params)
    if goal.size:
        ax.add_collection(
            LineCollection(
                _to_anchor(goal, pose), colors=style.GOAL_COLOUR, linewidths=1.2, linestyles=(0, (2.0, 1.5)), zorder=1.3
            )
        )


def draw_vehicles(ax: Axes, rows: np.ndarray, *, zorder: float = 4.0) -> None:
    """Boxes of the valid rows (N, 8): row 0 (the ego) deep orange, the others slate grey, with heading marks."""
    ok = _valid(rows)
    idx = np.nonzero(ok)[0]
    if idx.size == 0:
        return
    polys, marks = vehicle_polygons(rows[idx])
    ego = idx == 0
    for sel, face, edge in (
        (~ego, style.TRAFFIC_COLOUR, style.TRAFFIC_EDGE_COLOUR),
        (ego, style.EGO_COLOUR, style.EGO_EDGE_COLOUR),
    ):
        if sel.any():
            ax.add_collection(
                PolyCollection(
                    polys[sel],
                    facecolors=face,
                    edgecolors=edge,
                    linewidths=0.7,
                    zorder=zorder + (0.2 if face == style.EGO_COLOUR else 0.0),
                )
            )
            ax.add_collection(
                PolyCollection(
                    marks[sel],
                    facecolors=style.HEADING_MARK_COLOUR,
                    edgecolors="none",
                    alpha=style.HEADING_MARK_ALPHA,
                    zorder=zorder + 0.3,
                )
            )


def _tracks(start: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Polylines (M, 1 + H, 2) from each object's current position through its future, NaN where not valid.

    start: (N, 8) current rows; rows: (K, H, N, 8) futures -> M = K x (N - 1) tracks of the objects 1..N-1.
    """
    k, h, n, _ = rows.shape
    xy = np.where(_valid(rows)[..., None], rows[..., [F_X, F_Y]], np.nan)  # (K, H, N, 2)
    first = np.where(_valid(start)[:, None], start[:, [F_X, F_Y]], np.nan)  # (N, 2)
    lines = np.concatenate([np.broadcast_to(first[None, None], (k, 1, n, 2)), xy], axis=1)  # (K, 1+H, N, 2)
    return lines[:, :, 1:].transpose(0, 2, 1, 3).reshape(k * (n - 1), h + 1, 2)


def _add_fan(
    ax: Axes,
    start: np.ndarray,
    rows: np.ndarray,
    colour: str,
    alpha: float,
    zorder: float,
    width: float = FUTURE_LINE_PT,
    linestyle: object = "solid",
) -> int:
    """Draw K futures of objects 1..N-1 as lines from their current position, and their end points; returns the
    number of lines drawn."""
    if rows.shape[2] < 2:
        return 0
    lines = _tracks(start, rows)
    keep = np.isfinite(lines).all(axis=-1).sum(axis=1) >= 2
    lines = lines[keep]
    if len(lines) == 0:
        return 0
    ax.add_collection(
        LineCollection(
            list(lines),
            colors=colour,
            alpha=alpha,
            linewidths=width,
            zorder=zorder,
            linestyles=linestyle,
            capstyle="round",
            joinstyle="round",
        )
    )
    ends = rows[:, -1, 1:][_valid(rows[:, -1, 1:])]
    if len(ends):
        ax.plot(
            ends[:, F_X],
            ends[:, F_Y],
            linestyle="none",
            marker="o",
            markersize=2.2,
            color=colour,
            alpha=min(1.0, 2.0 * alpha),
            zorder=zorder + 0.05,
        )
    return len(lines)


def future_collisions(rows: np.ndarray, ego_length_m: float, ego_width_m: float) -> np.ndarray:
    """Where each future first brings the ego (row 0) into contact with another valid row.

    Args:
        rows: (K, H, N, 8) futures in one frame, row 0 the ego.
        ego_length_m, ego_width_m: the ego's footprint.

    Returns:
        (M, 2) points midway between the ego and the vehicle it touches at the first step of contact, one per
        future with a collision (separating-axis overlap test of :func:`wmplan.sim.collision.boxes_overlap`).
    """
    ego, oth = rows[:, :, :1], rows[:, :, 1:]
    hit = boxes_overlap(
        ego[..., F_X],
        ego[..., F_Y],
        ego_length_m,
        ego_width_m,
        ego[..., F_HEADING],
        oth[..., F_X],
        oth[..., F_Y],
        oth[..., F_LENGTH],
        oth[..., F_WIDTH],
        oth[..., F_HEADING],
    )
    hit &= _valid(oth) & _valid(ego)  # (K, H, N-1)
    any_step = hit.any(axis=2)  # (K, H)
    k_idx = np.nonzero(any_step.any(axis=1))[0]
    if k_idx.size == 0:
        return np.zeros((0, 2))
    h_idx = any_step[k_idx].argmax(axis=1)
    n_idx = hit[k_idx, h_idx].argmax(axis=1) + 1
    a = rows[k_idx, h_idx, 0, :2]
    b = rows[k_idx, h_idx, n_idx, :2]
    return 0.5 * (a + b)


def _mark_collisions(ax: Axes, points: np.ndarray) -> None:
    if len(points):
        ax.plot(
            points[:, 0],
            points[:, 1],
            linestyle="none",
            marker="x",
            color=style.COLLISION_COLOUR,
            markersize=0.6 * style.COLLISION_MARKER_SIZE_PT,
            markeredgewidth=0.7 * style.COLLISION_MARKER_WIDTH_PT,
            zorder=6.0,
            path_effects=[withStroke(linewidth=style.COLLISION_MARKER_WIDTH_PT + 1.5, foreground="white")],
        )


def _extent(*arrays: np.ndarray | None) -> tuple[float, float, float, float]:
    """(x_lo, x_hi, y_lo, y_hi) of every valid row in the given arrays (..., 8)."""
    xs, ys = [], []
    for a in arrays:
        if a is None:
            continue
        ok = _valid(a)
        xs.append(a[..., F_X][ok])
        ys.append(a[..., F_Y][ok])
    x = np.concatenate(xs) if xs else np.zeros(1)
    y = np.concatenate(ys) if ys else np.zeros(1)
    if x.size == 0:
        x, y = np.zeros(1), np.zeros(1)
    return float(x.min()), float(x.max()), float(y.min()), float(y.max())


def _view(
    extent: tuple[float, float, float, float],
    ego_end_x_m: float,
    params: SimParams | None,
    anchor_pose: object | None,
    x_range_m: tuple[float, float] | None,
) -> tuple[float, float, float, float]:
    """(x_lo, x_hi, y_lo, y_hi) to show, anchor frame.

    Default x range: everything drawn plus a margin, but no more than ``VIEW_BEHIND_M`` behind the ego and
    ``VIEW_AHEAD_M`` beyond the end of its own path, so that the lanes stay readable at equal aspect.
    """
    x_lo, x_hi, y_lo, y_hi = extent
    if x_range_m is not None:
        x_lo, x_hi = (float(v) for v in x_range_m)
        if not (np.isfinite(x_lo) and np.isfinite(x_hi) and x_hi > x_lo):
            raise ConfigError(f"x_range_m must be two finite numbers (low, high) with high > low, got {x_range_m!r}")
    else:
        x_lo = max(x_lo - MARGIN_M, -VIEW_BEHIND_M)
        x_hi = min(x_hi + MARGIN_M, max(ego_end_x_m, 0.0) + VIEW_AHEAD_M)
    y_lo, y_hi = y_lo - 2.5, y_hi + 2.5
    if params is not None:
        if anchor_pose is None:
            raise ConfigError(
                "params was given without anchor_pose; pass the ego's world (x_m, y_m, heading_rad) at "
                "the decision to draw the road in the anchor frame, or leave params out"
            )
        pose = _pose(anchor_pose)
        road_y = _to_anchor(np.array([[pose[0], 0.0], [pose[0], params.road_width_m]]), pose)[:, 1]
        y_lo, y_hi = float(road_y.min()) - 1.5, float(road_y.max()) + 1.5
    return x_lo, x_hi, y_lo, y_hi


def _frame_axes(
    ax: Axes,
    view: tuple[float, float, float, float],
    params: SimParams | None,
    anchor_pose: object | None,
    box_ratio: float,
) -> None:
    """Limits, road, labels and equal aspect of an anchor-frame plot.

    ``box_ratio`` is the axes' height over its width; the shorter side of ``view`` grows about its centre so that
    one metre is as long across the road as along it.
    """
    x_lo, x_hi, y_lo, y_hi = view
    if (y_hi - y_lo) < box_ratio * (x_hi - x_lo):
        mid, half = 0.5 * (y_lo + y_hi), 0.5 * box_ratio * (x_hi - x_lo)
        y_lo, y_hi = mid - half, mid + half
    else:
        mid, half = 0.5 * (x_lo + x_hi), 0.5 * (y_hi - y_lo) / box_ratio
        x_lo, x_hi = mid - half, mid + half
    if params is not None:
        draw_road_anchor(ax, params, _pose(anchor_pose), (x_lo, x_hi))
    else:
        ax.grid(color="#e3e5e8", linewidth=0.6, zorder=0.0)
    ax.set_xlim(x_lo, x_hi)
    ax.set_ylim(y_lo, y_hi)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("x ahead of the ego at the decision [m]", fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR)
    ax.set_ylabel("y to its left [m]", fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR)
    ax.tick_params(labelsize=style.FONT_SIZE_PT - 1, colors=style.TEXT_COLOUR, length=3.0)
    for spine in ax.spines.values():
        spine.set_linewidth(0.6)
        spine.set_color(style.ROAD_OUTLINE_COLOUR)


def _map_height_in(view: tuple[float, float, float, float], axes_w_in: float) -> float:
    """Height of axes ``axes_w_in`` wide that show ``view`` at equal aspect, between 1.2 and 6 inches."""
    x_span, y_span = view[1] - view[0], view[3] - view[2]
    return float(np.clip(axes_w_in * y_span / max(x_span, 1.0), 1.2, 6.0))


# --- fans of futures ----------------------------------------------------------------------------------------------


def futures_figure(
    history: np.ndarray,
    model_rows: np.ndarray,
    oracle_rows: np.ndarray | None = None,
    params: SimParams | None = None,
    *,
    deterministic_rows: np.ndarray | None = None,
    anchor_pose: object | None = None,
    x_range_m: tuple[float, float] | None = None,
    title: str | None = None,
    model_label: str = "learned model",
    width_in: float = 11.0,
    dpi: float = 110.0,
) -> Figure:
    """Fans of the futures a learned model samples, against the oracle's and the least-squares prediction.

    Args:
        history: (W, N, 8) object rows over the last W decision steps, anchor frame; the last step is now.
        model_rows: (K, H, N, 8) futures sampled from the learned model, anchor frame (row 0 the ego's own path).
        oracle_rows: (K2, H, N, 8) the oracle's futures (the true simulator) of the same objects, or None.
        params: the scenario's arrays, to draw the road; needs ``anchor_pose``. None: no road, a light grid.
        deterministic_rows: (H, N, 8) the least-squares model's one prediction, or None.
        anchor_pose: (x_m, y_m, heading_rad) of the ego in the world at the decision.
        x_range_m: (low, high) of the view, metres ahead of the ego; default: everything drawn plus a margin.
        title: text above the plot; default names the counts of futures.
        model_label: the name of the sampled futures in the legend.
        width_in, dpi: figure width in inches and resolution.

    Returns:
        A Figure: the road, past tracks (thin), the current vehicles as boxes (ego deep orange), the ego's planned
        path (orange dashed), every object's K sampled futures (translucent violet), the oracle's (teal), the
        least-squares prediction (dark grey dashed) and a black cross wherever a future brings the ego into
        contact with another vehicle.
    """
    hist = _rows(history, "history", 3, "(W, N, 8)")
    model = _rows(model_rows, "model_rows", 4, "(K, H, N, 8)")
    n = hist.shape[1]
    if model.shape[2] != n:
        raise ConfigError(
            f"model_rows has {model.shape[2]} object rows but history has {n}; both must hold the same "
            "objects (row 0 the ego)"
        )
    oracle = None if oracle_rows is None else _rows(oracle_rows, "oracle_rows", 4, "(K, H, N, 8)")
    det = None if deterministic_rows is None else _rows(deterministic_rows, "deterministic_rows", 3, "(H, N, 8)")
    for name, arr in (("oracle_rows", oracle), ("deterministic_rows", det)):
        if arr is not None and arr.shape[-2] != n:
            raise ConfigError(f"{name} has {arr.shape[-2]} object rows but history has {n}; pass the same objects")
    now = hist[-1]
    ego_end = float(model[0, -1, 0, F_X]) if _valid(model[0, -1, 0]) else 0.0
    view = _view(_extent(hist, model, oracle, det), ego_end, params, anchor_pose, x_range_m)
    axes_w = width_in - _LEFT_IN - _RIGHT_IN
    axes_h = _map_height_in(view, axes_w)
    legend_in = 0.1 + 0.24 * 2  # two rows of legend entries
    height_in = _TOP_IN + axes_h + _XLABEL_IN + legend_in
    fig = Figure(figsize=(width_in, height_in), dpi=dpi, facecolor="white")
    FigureCanvasAgg(fig)
    ax = fig.add_axes(
        (_LEFT_IN / width_in, (_XLABEL_IN + legend_in) / height_in, axes_w / width_in, axes_h / height_in)
    )
    _frame_axes(ax, view, params, anchor_pose, axes_h / axes_w)

    # past tracks of everyone, thin
    past = np.where(_valid(hist)[..., None], hist[..., [F_X, F_Y]], np.nan).transpose(1, 0, 2)  # (N, W, 2)
    ax.add_collection(
        LineCollection(list(past[1:]), colors=style.TRAFFIC_COLOUR, linewidths=0.8, alpha=0.7, zorder=2.0)
    )
    ax.add_collection(LineCollection([past[0]], colors=style.EGO_COLOUR, linewidths=0.8, alpha=0.8, zorder=2.0))

    handles = []
    count = _add_fan(ax, now, model, style.SAMPLED_FUTURE_COLOUR, style.SAMPLED_FUTURE_ALPHA, 3.0)
    handles.append(
        Line2D(
            [],
            [],
            color=style.SAMPLED_FUTURE_COLOUR,
            alpha=0.7,
            lw=1.6,
            label=f"{model_label}: {model.shape[0]} sampled futures",
        )
    )
    if oracle is not None:
        _add_fan(ax, now, oracle, style.ORACLE_FUTURE_COLOUR, style.ORACLE_FUTURE_ALPHA, 3.1)
        handles.append(
            Line2D(
                [],
                [],
                color=style.ORACLE_FUTURE_COLOUR,
                alpha=0.8,
                lw=1.6,
                label=f"oracle (true simulator): {oracle.shape[0]} futures",
            )
        )
    if det is not None:
        _add_fan(ax, now, det[None], style.DETERMINISTIC_COLOUR, 0.95, 3.4, width=1.3, linestyle=(0, (4.0, 2.0)))
        handles.append(
            Line2D(
                [],
                [],
                color=style.DETERMINISTIC_COLOUR,
                lw=1.3,
                linestyle=(0, (4.0, 2.0)),
                label="least-squares model (one blurred prediction)",
            )
        )
    # the ego's own path over the horizon (the same in every future of one plan)
    ego_path = np.concatenate([now[:1, [F_X, F_Y]], model[0, :, 0][:, [F_X, F_Y]]])  # (1 + H, 2)
    if _valid(model[0, :, 0]).all():
        ax.plot(
            ego_path[:, 0],
            ego_path[:, 1],
            color=style.EGO_PLAN_COLOUR,
            lw=1.6,
            linestyle=(0, (3.0, 1.5)),
            zorder=3.5,
            path_effects=[withStroke(linewidth=3.0, foreground="white")],
        )
        handles.append(
            Line2D([], [], color=style.EGO_PLAN_COLOUR, lw=1.6, linestyle=(0, (3.0, 1.5)), label="ego: planned path")
        )
    draw_vehicles(ax, now)
    ego_len, ego_wid = float(now[0, F_LENGTH]), float(now[0, F_WIDTH])
    hits = [future_collisions(a, ego_len, ego_wid) for a in (model, oracle) if a is not None]
    points = np.concatenate(hits) if hits else np.zeros((0, 2))
    _mark_collisions(ax, points)
    handles.append(Patch(facecolor=style.EGO_COLOUR, edgecolor=style.EGO_EDGE_COLOUR, label="ego now"))
    handles.append(
        Patch(facecolor=style.TRAFFIC_COLOUR, edgecolor=style.TRAFFIC_EDGE_COLOUR, label="other vehicles now")
    )
    if len(points):
        handles.append(
            Line2D(
                [],
                [],
                color=style.COLLISION_COLOUR,
                marker="x",
                linestyle="none",
                markersize=7,
                markeredgewidth=2.0,
                label="contact in a future",
            )
        )
    horizon_steps = model.shape[1]
    ax.set_title(
        title
        or f"Futures over the next {horizon_steps} steps: {count} sampled tracks of "
        f"{int(_valid(now[1:]).sum())} vehicles",
        fontsize=style.FONT_SIZE_PT + 1,
        color=style.TEXT_COLOUR,
        loc="left",
    )
    fig.legend(
        handles=handles,
        loc="lower center",
        bbox_to_anchor=(0.5, 0.0),
        ncol=(len(handles) + 1) // 2,
        fontsize=style.FONT_SIZE_PT - 0.5,
        frameon=False,
    )
    return fig


# --- candidate plans and their risk -------------------------------------------------------------------------------


def _paths(ego_paths: object) -> np.ndarray:
    a = np.asarray(ego_paths, dtype=np.float64)
    if a.ndim != 3 or a.shape[-1] < 2 or 0 in a.shape:
        raise ConfigError(
            f"ego_paths must have shape (C, H, D) with D >= 2 (columns x_m, y_m first, anchor frame), got {a.shape}"
        )
    return a


def candidates_figure(
    ego_paths: object,
    costs: object,
    p_collision: object,
    chosen: int,
    futures: np.ndarray | None = None,
    *,
    current: np.ndarray | None = None,
    params: SimParams | None = None,
    anchor_pose: object | None = None,
    x_range_m: tuple[float, float] | None = None,
    title: str | None = None,
    width_in: float = 11.0,
    dpi: float = 110.0,
) -> Figure:
    """The candidate plans of one decision, coloured by their predicted collision probability.

    Args:
        ego_paths: (C, H, D) the ego's path under each candidate, anchor frame; columns 0 and 1 are x_m and y_m
            (D = 2, 5 for the model's ego rows, or 8 for full rows). From a planner's ``PlanResult`` kept with
            ``keep=True``, :func:`candidate_arrays` extracts them.
        costs: (C,) total cost of each candidate (lower is better; dimensionless).
        p_collision: (C,) predicted probability of a collision within the horizon (share of the K futures).
        chosen: index of the candidate the planner chose.
        futures: (K, H, N, 8) the predictor's futures under the chosen plan (drawn as violet fans), or None.
        current: (N, 8) the object rows now, drawn as boxes (the fans start from them); None: only a dot marks the
            ego and the fans start at the first future step.
        params, anchor_pose: draw the road (see :func:`futures_figure`).
        x_range_m: (low, high) of the view, metres ahead of the ego.
        title: text above the figure.
        width_in, dpi: figure width in inches and resolution.

    Returns:
        A Figure with two panels: the paths in the anchor frame with a colour bar "P(collision)" and the chosen
        one outlined, and the cost of every candidate against its P(collision).
    """
    paths = _paths(ego_paths)
    c = paths.shape[0]
    cost = np.asarray(costs, dtype=np.float64).ravel()
    risk = np.asarray(p_collision, dtype=np.float64).ravel()
    if cost.shape != (c,) or risk.shape != (c,):
        raise ConfigError(
            f"costs and p_collision must hold one value per candidate ({c}), got {cost.shape} and {risk.shape}"
        )
    if not (np.isfinite(risk).all() and (risk >= 0).all() and (risk <= 1).all()):
        raise ConfigError("p_collision must lie in [0, 1] for every candidate (no NaN)")
    if not np.isfinite(cost).all() or not np.isfinite(paths[..., :2]).all():
        raise ConfigError("costs and the x, y columns of ego_paths must be finite numbers (no NaN or inf)")
    pick = np.asarray(chosen)
    if isinstance(chosen, bool) or pick.ndim != 0 or pick.dtype.kind not in "iu" or not 0 <= int(pick) < c:
        raise ConfigError(f"chosen must be a candidate index (an integer) in 0..{c - 1}, got {chosen!r}")
    chosen = int(pick)
    fut = None if futures is None else _rows(futures, "futures", 4, "(K, H, N, 8)")
    now = None if current is None else _rows(current, "current", 2, "(N, 8)")
    if fut is not None and now is not None and fut.shape[2] != now.shape[0]:
        raise ConfigError(f"futures has {fut.shape[2]} object rows but current has {now.shape[0]}")

    xy = paths[..., :2]
    pts = [np.concatenate([xy.reshape(-1, 2), np.zeros((1, 2))])]
    if now is not None:
        pts.append(now[_valid(now)][:, :2])
    if fut is not None:
        pts.append(fut[_valid(fut)][:, :2])
    allp = np.concatenate(pts)
    extent = (float(allp[:, 0].min()), float(allp[:, 0].max()), float(allp[:, 1].min()), float(allp[:, 1].max()))
    view = _view(extent, float(xy[..., 0].max()), params, anchor_pose, x_range_m)
    colourbar_in = 1.0
    axes_w = width_in - _LEFT_IN - _RIGHT_IN - colourbar_in
    map_h = _map_height_in(view, axes_w)
    cost_h, gap_in = 2.6, 1.1
    height_in = _TOP_IN + map_h + gap_in + cost_h + _XLABEL_IN
    fig = Figure(figsize=(width_in, height_in), dpi=dpi, facecolor="white")
    FigureCanvasAgg(fig)
    ax_map = fig.add_axes(
        (_LEFT_IN / width_in, (_XLABEL_IN + cost_h + gap_in) / height_in, axes_w / width_in, map_h / height_in)
    )
    ax_bar = fig.add_axes(
        (
            (_LEFT_IN + axes_w + 0.15) / width_in,
            (_XLABEL_IN + cost_h + gap_in) / height_in,
            0.14 / width_in,
            map_h / height_in,
        )
    )
    ax_cost = fig.add_axes((_LEFT_IN / width_in, _XLABEL_IN / height_in, axes_w / width_in, cost_h / height_in))
    _frame_axes(ax_map, view, params, anchor_pose, map_h / axes_w)
    norm = Normalize(0.0, 1.0)

    start = np.zeros((c, 1, 2))
    lines = np.concatenate([start, xy], axis=1)  # every path starts at the ego's position now
    order = np.argsort(risk, kind="stable")  # riskiest drawn last, on top
    path_lines = LineCollection(
        list(lines[order]), cmap=RISK_CMAP, norm=norm, array=risk[order], linewidths=1.1, alpha=0.85, zorder=3.0
    )
    ax_map.add_collection(path_lines)
    handles = []
    if fut is not None:
        start_rows = now if now is not None else fut[0, 0]
        _add_fan(ax_map, start_rows, fut, style.SAMPLED_FUTURE_COLOUR, style.SAMPLED_FUTURE_ALPHA, 2.8)
        handles.append(
            Line2D(
                [],
                [],
                color=style.SAMPLED_FUTURE_COLOUR,
                alpha=0.7,
                lw=1.6,
                label=f"{fut.shape[0]} predicted futures under the chosen plan",
            )
        )
        ego_dims = (now if now is not None else fut[0, 0])[0]
        _mark_collisions(ax_map, future_collisions(fut, float(ego_dims[F_LENGTH]), float(ego_dims[F_WIDTH])))
    best = lines[chosen]
    outline = [Stroke(linewidth=3.6, foreground="black"), Normal()]
    ax_map.plot(
        best[:, 0],
        best[:, 1],
        color=RISK_CMAP(norm(risk[chosen])),
        lw=1.8,
        zorder=3.5,
        path_effects=outline,
        gid="chosen-plan",
    )
    handles.append(
        Line2D(
            [],
            [],
            color=RISK_CMAP(norm(risk[chosen])),
            lw=1.8,
            path_effects=outline,
            label=f"chosen plan (P(collision) {risk[chosen]:.2f}, cost {cost[chosen]:.3g})",
        )
    )
    if now is not None:
        draw_vehicles(ax_map, now)
    else:
        ax_map.plot([0.0], [0.0], marker="o", color=style.EGO_COLOUR, markersize=6, zorder=5.0)
    bar = fig.colorbar(path_lines, cax=ax_bar)
    bar.set_label("P(collision)", fontsize=style.FONT_SIZE_PT)
    bar.ax.tick_params(labelsize=style.FONT_SIZE_PT - 1)
    fig.legend(
        handles=handles,
        loc="upper center",
        ncol=len(handles),
        fontsize=style.FONT_SIZE_PT - 0.5,
        frameon=False,
        bbox_to_anchor=((_LEFT_IN + 0.5 * axes_w) / width_in, (_XLABEL_IN + cost_h + gap_in - 0.42) / height_in),
    )
    ax_map.set_title(
        title or f"{c} candidate plans of the ego, coloured by predicted collision probability",
        fontsize=style.FONT_SIZE_PT + 1,
        color=style.TEXT_COLOUR,
        loc="left",
    )

    # cost against risk
    ax_cost.scatter(
        risk, cost, c=risk, cmap=RISK_CMAP, norm=norm, s=22, edgecolors="white", linewidths=0.4, alpha=0.9, zorder=3.0
    )
    ax_cost.scatter(
        [risk[chosen]],
        [cost[chosen]],
        s=120,
        facecolors="none",
        edgecolors="black",
        linewidths=1.8,
        zorder=4.0,
        label="chosen plan",
    )
    if np.ptp(cost) > 0 and cost.max() > 1e3 and cost.min() < 1e2:  # chance-constraint penalties of infeasible plans
        ax_cost.set_yscale("symlog", linthresh=10.0)
    top = float(min(1.0, max(0.1, np.ceil(11.0 * risk.max()) / 10.0)))  # zoom on the risks that occur
    ax_cost.set_xlim(-0.02 * top, 1.02 * top)
    ax_cost.set_xlabel("P(collision) of the candidate, share of its futures [1]", fontsize=style.FONT_SIZE_PT)
    ax_cost.set_ylabel("total cost [1] (lower is better)", fontsize=style.FONT_SIZE_PT)
    ax_cost.tick_params(labelsize=style.FONT_SIZE_PT - 1)
    ax_cost.grid(alpha=0.3)
    ax_cost.legend(loc="best", fontsize=style.FONT_SIZE_PT - 1)
    ax_cost.set_title(
        "Cost against predicted collision probability, one point per candidate",
        fontsize=style.FONT_SIZE_PT,
        color=style.TEXT_COLOUR,
        loc="left",
    )
    return fig


def candidate_arrays(result: object, scene: int = 0) -> dict[str, np.ndarray]:
    """The arrays :func:`candidates_figure` needs, from a planner's ``PlanResult`` made with ``keep=True``.

    Args:
        result: a :class:`wmplan.plan.mpc.PlanResult` with ``plans``, ``costs``, ``futures``, ``chosen`` and
            ``risk`` filled (the planner's ``plan(..., keep=True)``).
        scene: which of its B scenes.

    Returns:
        ``ego_paths`` (C, H, 8) the ego rows of each candidate's first future (the ego's path is the same in every
        future of a plan), ``costs`` (C,), ``p_collision`` (C,), ``chosen`` (int) and ``futures`` (K, H, N, 8) of
        the chosen plan, all numpy, anchor frame.
    """
    missing = [k for k in ("futures", "costs", "chosen", "risk") if getattr(result, k, None) is None]
    if missing:
        raise ConfigError(f"the plan result has no {', '.join(missing)}; plan with keep=True to keep the candidates")
    futures = np.asarray(result.futures)  # (B, C, K, H, N, F); np.asarray reads a CPU tensor without torch here
    if not 0 <= scene < futures.shape[0]:
        raise ConfigError(f"scene must be in 0..{futures.shape[0] - 1}, got {scene}")
    chosen = int(np.asarray(result.chosen)[scene])
    return {
        "ego_paths": futures[scene, :, 0, :, 0, :].astype(np.float64),
        "costs": np.asarray(result.costs)[scene].astype(np.float64),
        "p_collision": np.asarray(result.risk["p_collision"])[scene].astype(np.float64),
        "chosen": chosen,
        "futures": futures[scene, chosen].astype(np.float64),
    }
