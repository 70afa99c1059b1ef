"""One moment of a scene, drawn with matplotlib: the road, the vehicles, the ego, a collision.

Arrays and :class:`~wmplan.sim.params.SimParams` in, a Figure or an RGB image out; no pyplot (every figure is a
``matplotlib.figure.Figure`` on its own Agg canvas), no global state, no torch.

* :func:`draw_scene` draws onto axes the caller owns (a notebook subplot, say) and returns the artists, which
  :meth:`SceneArtists.update` moves to another moment without drawing the road again.
* :func:`scene_figure` makes a new Figure of one moment, sized so that the road fills it at equal aspect.
* :class:`SceneRenderer` keeps one figure and redraws only what moves; :func:`render_rgb` is its one-shot form.
  The gymnasium env and the animations use a renderer (about 20 ms a frame at 1000 px wide).

Shapes: ``vehicles`` is (V, 8), world-frame rows in ``wmplan.sim.features.VEHICLE_FEATURES`` order, slot 0 the
ego; rows with ``valid`` = 0 are not drawn.

The road is drawn as the simulator models it: straight lanes numbered from the right (lane 0 lowest y), each
existing on ``[lane_start_m, lane_end_m]``. A white dashed marking runs where two lanes lie side by side, a solid
white edge where the drivable area ends (the outer edges, the side of a lane whose neighbour does not exist
there, and across a lane where it starts or ends inside the road). Lane ends are abrupt, as in the simulator's
off-road test; real roads taper.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import LineCollection, PatchCollection, PolyCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from matplotlib.patheffects import withStroke

from wmplan.errors import ConfigError
from wmplan.sim.collision import box_corners
from wmplan.sim.features import (
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_WIDTH,
    F_X,
    F_Y,
    NUM_VEHICLE_FEATURES,
)
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO
from wmplan.viz import style

VIEW_BEHIND_M = 60.0
"""Default view: this far behind the ego ..."""
VIEW_AHEAD_M = 140.0
"""... to this far ahead of it."""
Y_MARGIN_M = 2.5
"""Verge shown beside each outer edge of the road."""

# Figure margins in inches around the axes (tick labels, axis labels, title); fixed so that frames line up.
_LEFT_IN, _RIGHT_IN, _BOTTOM_IN, _TOP_IN = 0.62, 0.18, 0.46, 0.30


# --- inputs --------------------------------------------------------------------------------------------------------


def check_vehicles(vehicles: np.ndarray, name: str = "vehicles") -> np.ndarray:
    """Return ``vehicles`` as a float64 (V, 8) array, or raise a one-line :class:`ConfigError`."""
    arr = np.asarray(vehicles, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != NUM_VEHICLE_FEATURES or arr.shape[0] < 1:
        raise ConfigError(
            f"{name} must have shape (V, {NUM_VEHICLE_FEATURES}) with V >= 1 (world-frame rows in VEHICLE_FEATURES "
            f"order, slot 0 the ego), got shape {arr.shape}"
        )
    if not np.isfinite(arr[arr[:, F_VALID] > 0.5]).all():
        raise ConfigError(f"{name} holds NaN or inf in a valid row; every valid vehicle needs finite numbers")
    return arr


def default_x_range(vehicles: np.ndarray) -> tuple[float, float]:
    """The default view along the road: ``VIEW_BEHIND_M`` behind the ego to ``VIEW_AHEAD_M`` ahead of it."""
    ego_x = float(np.asarray(vehicles)[EGO, F_X])
    return ego_x - VIEW_BEHIND_M, ego_x + VIEW_AHEAD_M


def _check_x_range(x_range_m) -> tuple[float, float]:
    lo, hi = (float(v) for v in x_range_m)
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        raise ConfigError(f"x_range_m must be two finite numbers (low, high) with high > low, got {tuple(x_range_m)!r}")
    return lo, hi


# --- road geometry (pure functions of SimParams) --------------------------------------------------------------------


def _lane_intervals(params: SimParams) -> list[tuple[float, float]]:
    return [(float(s), float(e)) for s, e in zip(params.lane_start_m, params.lane_end_m, strict=True)]


def _subtract(span: tuple[float, float], cut: tuple[float, float] | None) -> list[tuple[float, float]]:
    """Parts of interval ``span`` outside interval ``cut`` (``None``: nothing cut)."""
    lo, hi = span
    if cut is None or cut[0] >= cut[1]:
        return [span]
    parts = [(lo, min(hi, cut[0])), (max(lo, cut[1]), hi)]
    return [(a, b) for a, b in parts if b > a]


def road_markings(params: SimParams) -> tuple[list[tuple[float, float, float]], np.ndarray]:
    """The markings of the road.

    Returns:
        dashed: ``(y_m, x_start_m, x_end_m)`` for each stretch where two lanes run side by side.
        solid: (N, 2, 2) segments ``[[x0, y0], [x1, y1]]`` of the solid edges of the drivable area.
    """
    w = params.lane_width_m
    lanes = _lane_intervals(params)
    dashed: list[tuple[float, float, float]] = []
    solid: list[list[list[float]]] = []

    def along(y: float, parts: list[tuple[float, float]]) -> None:
        solid.extend([[a, y], [b, y]] for a, b in parts)

    along(0.0, [lanes[0]])
    along(params.num_lanes * w, [lanes[-1]])
    for b in range(1, params.num_lanes):
        right, left = lanes[b - 1], lanes[b]
        both = (max(right[0], left[0]), min(right[1], left[1]))
        shared = both if both[1] > both[0] else None
        if shared is not None:
            dashed.append((b * w, shared[0], shared[1]))
        along(b * w, _subtract(right, shared) + _subtract(left, shared))
    for i, (start, end) in enumerate(lanes):
        for x in (start, end):
            if 0.0 < x < params.road_length_m:
                solid.append([[x, i * w], [x, (i + 1) * w]])
    return dashed, np.asarray(solid, dtype=np.float64).reshape(-1, 2, 2)


def dash_segments(dashed: list[tuple[float, float, float]], x_lo_m: float, x_hi_m: float) -> np.ndarray:
    """(N, 2, 2) segments of the painted dashes that touch [x_lo_m, x_hi_m].

    Dashes sit at fixed road positions (``k * (DASH_LENGTH_M + DASH_GAP_M)`` from x = 0), so they move past the
    viewer in an animation as real markings do.
    """
    period = style.DASH_LENGTH_M + style.DASH_GAP_M
    out = []
    for y, start, end in dashed:
        lo, hi = max(start, x_lo_m), min(end, x_hi_m)
        if hi <= lo:
            continue
        k = np.arange(np.floor(lo / period), np.ceil(hi / period) + 1)
        x0 = np.clip(k * period, start, end)
        x1 = np.clip(k * period + style.DASH_LENGTH_M, start, end)
        keep = x1 > x0
        seg = np.zeros((int(keep.sum()), 2, 2))
        seg[:, 0, 0], seg[:, 1, 0], seg[:, :, 1] = x0[keep], x1[keep], y
        out.append(seg)
    return np.concatenate(out) if out else np.zeros((0, 2, 2))


def goal_segments(params: SimParams) -> np.ndarray:
    """(N, 2, 2) segments across each goal lane at the goal position (where that lane exists)."""
    w, gx = params.lane_width_m, params.goal_x_m
    lanes = np.nonzero(params.goal_lane_mask)[0]
    lanes = lanes[params.lane_exists(lanes, np.full(lanes.shape, gx))]
    seg = np.zeros((lanes.size, 2, 2))
    seg[:, :, 0] = gx
    seg[:, 0, 1], seg[:, 1, 1] = lanes * w, (lanes + 1) * w
    return seg


# --- vehicles ---------------------------------------------------------------------------------------------------------


def vehicle_polygons(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Footprints (N, 4, 2) and heading marks (N, 3, 2) of the given (N, 8) rows.

    The heading mark is a triangle from 12 % of the length ahead of the centre to the front bumper, 60 % of the
    width at its base, so the centre of every vehicle keeps the vehicle's own colour.
    """
    x, y, hd = rows[:, F_X], rows[:, F_Y], rows[:, F_HEADING]
    ln, wd = rows[:, F_LENGTH], rows[:, F_WIDTH]
    corners = box_corners(x, y, ln, wd, hd)  # (N, 4, 2)
    c, s = np.cos(hd)[:, None], np.sin(hd)[:, None]
    lx = np.stack([0.5 * ln, 0.12 * ln, 0.12 * ln], axis=-1)  # (N, 3) along the body
    ly = np.stack([np.zeros_like(wd), 0.3 * wd, -0.3 * wd], axis=-1)  # (N, 3) across it
    marks = np.stack([x[:, None] + c * lx - s * ly, y[:, None] + s * lx + c * ly], axis=-1)  # (N, 3, 2)
    return corners, marks


def collision_point(vehicles: np.ndarray) -> tuple[float, float]:
    """Where to put the collision cross: midway between the ego and the nearest other valid vehicle (the ego's
    centre if there is none)."""
    ego = vehicles[EGO]
    others = np.nonzero(vehicles[:, F_VALID] > 0.5)[0]
    others = others[others != EGO]
    if others.size == 0:
        return float(ego[F_X]), float(ego[F_Y])
    d2 = (vehicles[others, F_X] - ego[F_X]) ** 2 + (vehicles[others, F_Y] - ego[F_Y]) ** 2
    j = others[np.argmin(d2)]
    return float(0.5 * (ego[F_X] + vehicles[j, F_X])), float(0.5 * (ego[F_Y] + vehicles[j, F_Y]))


# --- drawing ------------------------------------------------------------------------------------------------------


@dataclass(eq=False)
class SceneArtists:
    """The artists of one drawn scene; :meth:`update` moves them to another moment of the same road."""

    ax: Axes
    params: SimParams
    dashed: list[tuple[float, float, float]]
    dashes: LineCollection
    traffic: PolyCollection
    traffic_marks: PolyCollection
    ego: PolyCollection
    ego_mark: PolyCollection
    cross: Line2D
    _x_range: tuple[float, float] | None = field(default=None, repr=False)

    def update(
        self,
        vehicles: np.ndarray,
        *,
        x_range_m: tuple[float, float] | None = None,
        title: str | None = None,
        collided: bool = False,
    ) -> None:
        """Show another moment: vehicles (V, 8) world rows; the view, title and collision cross as in
        :func:`draw_scene`."""
        vehicles = check_vehicles(vehicles)
        x_lo, x_hi = _check_x_range(x_range_m if x_range_m is not None else default_x_range(vehicles))
        valid = vehicles[:, F_VALID] > 0.5
        valid[EGO] = True
        others = valid.copy()
        others[EGO] = False
        polys, marks = vehicle_polygons(vehicles[valid])
        is_ego = np.nonzero(valid)[0] == EGO
        self.traffic.set_verts(polys[~is_ego])
        self.traffic_marks.set_verts(marks[~is_ego])
        self.ego.set_verts(polys[is_ego])
        self.ego_mark.set_verts(marks[is_ego])
        if collided:
            self.cross.set_data(*([v] for v in collision_point(vehicles)))
        self.cross.set_visible(bool(collided))
        if self._x_range != (x_lo, x_hi):
            pad = 0.5 * (x_hi - x_lo)
            self.dashes.set_segments(dash_segments(self.dashed, x_lo - pad, x_hi + pad))
            self.ax.set_xlim(x_lo, x_hi)
            self._x_range = (x_lo, x_hi)
        y_lo, y_hi = -Y_MARGIN_M, self.params.road_width_m + Y_MARGIN_M
        ego_y = vehicles[EGO, F_Y]
        half = 0.5 * vehicles[EGO, F_LENGTH] + 1.0
        self.ax.set_ylim(min(y_lo, ego_y - half), max(y_hi, ego_y + half))  # an ego off the road stays in view
        self.ax.set_title(title or "", fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR, loc="left", pad=4.0)


def draw_scene(
    ax: Axes,
    vehicles: np.ndarray,
    params: SimParams,
    *,
    x_range_m: tuple[float, float] | None = None,
    title: str | None = None,
    collided: bool = False,
) -> SceneArtists:
    """Draw one moment of a scene onto ``ax``.

    Args:
        ax: matplotlib axes to draw on (its limits, aspect and labels are set here).
        vehicles: (V, 8) world-frame rows in ``VEHICLE_FEATURES`` order, slot 0 the ego.
        params: the scenario's :class:`SimParams` (road geometry and goal).
        x_range_m: (low, high) of the view along the road in metres; default ``VIEW_BEHIND_M`` behind the ego to
            ``VIEW_AHEAD_M`` ahead of it.
        title: text above the axes, or None.
        collided: draw a black cross where the ego meets the nearest other vehicle.

    Returns:
        The artists, for :meth:`SceneArtists.update`.
    """
    vehicles = check_vehicles(vehicles)
    dashed, solid = road_markings(params)
    ax.set_facecolor(style.VERGE_COLOUR)
    lanes = [
        Rectangle((s, i * params.lane_width_m), e - s, params.lane_width_m)
        for i, (s, e) in enumerate(_lane_intervals(params))
    ]
    ax.add_collection(PatchCollection(lanes, facecolor=style.ROAD_COLOUR, edgecolor="none", zorder=0.5))
    ax.add_collection(
        LineCollection(
            solid, colors=style.ROAD_OUTLINE_COLOUR, linewidths=style.EDGE_WIDTH_PT + 1.4, capstyle="butt", zorder=1.0
        )
    )
    ax.add_collection(
        LineCollection(solid, colors=style.MARKING_COLOUR, linewidths=style.EDGE_WIDTH_PT, capstyle="butt", zorder=1.1)
    )
    dashes = LineCollection(
        np.zeros((0, 2, 2)), colors=style.MARKING_COLOUR, linewidths=style.MARKING_WIDTH_PT, capstyle="butt", zorder=1.2
    )
    ax.add_collection(dashes)
    goal = goal_segments(params)
    if goal.size:
        ax.add_collection(
            LineCollection(goal, colors=style.GOAL_COLOUR, linewidths=1.2, linestyles=(0, (2.0, 1.5)), zorder=1.3)
        )
        ax.text(
            params.goal_x_m,
            params.road_width_m + 0.3,
            " goal",
            color=style.GOAL_COLOUR,
            fontsize=style.FONT_SIZE_PT - 1,
            va="bottom",
            ha="left",
            clip_on=True,
            zorder=1.3,
        )
    empty = np.zeros((0, 4, 2))
    traffic = PolyCollection(
        empty, facecolors=style.TRAFFIC_COLOUR, edgecolors=style.TRAFFIC_EDGE_COLOUR, linewidths=0.6, zorder=3.0
    )
    traffic_marks = PolyCollection(
        empty, facecolors=style.HEADING_MARK_COLOUR, edgecolors="none", alpha=style.HEADING_MARK_ALPHA, zorder=3.1
    )
    ego = PolyCollection(
        empty, facecolors=style.EGO_COLOUR, edgecolors=style.EGO_EDGE_COLOUR, linewidths=0.7, zorder=3.2
    )
    ego_mark = PolyCollection(
        empty, facecolors=style.HEADING_MARK_COLOUR, edgecolors="none", alpha=style.HEADING_MARK_ALPHA, zorder=3.3
    )
    for coll in (traffic, traffic_marks, ego, ego_mark):
        ax.add_collection(coll)
    (cross,) = ax.plot(
        [],
        [],
        linestyle="none",
        marker="x",
        color=style.COLLISION_COLOUR,
        markersize=style.COLLISION_MARKER_SIZE_PT,
        markeredgewidth=style.COLLISION_MARKER_WIDTH_PT,
        zorder=5.0,
        path_effects=[withStroke(linewidth=style.COLLISION_MARKER_WIDTH_PT + 2.5, foreground="white")],
    )
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("x along the road [m]", fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR, labelpad=2.0)
    ax.set_ylabel("y [m]", fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR, labelpad=2.0)
    ax.set_yticks([0.0, params.road_width_m])
    ax.yaxis.set_major_formatter("{x:.1f}")
    ax.tick_params(labelsize=style.FONT_SIZE_PT - 1, colors=style.TEXT_COLOUR, length=3.0, pad=2.0)
    for spine in ax.spines.values():
        spine.set_linewidth(0.6)
        spine.set_color(style.ROAD_OUTLINE_COLOUR)
    artists = SceneArtists(
        ax=ax,
        params=params,
        dashed=dashed,
        dashes=dashes,
        traffic=traffic,
        traffic_marks=traffic_marks,
        ego=ego,
        ego_mark=ego_mark,
        cross=cross,
    )
    artists.update(vehicles, x_range_m=x_range_m, title=title, collided=collided)
    return artists


def _new_figure(
    params: SimParams, x_span_m: float, width_in: float, dpi: float, even_pixels: bool = False
) -> tuple[Figure, Axes]:
    """A Figure on its own Agg canvas with one axes that fits the road at equal aspect; margins fixed in inches
    (tick labels, axis labels, title) so that frames line up."""
    y_span_m = params.road_width_m + 2.0 * Y_MARGIN_M
    axes_w = width_in - _LEFT_IN - _RIGHT_IN
    axes_h = axes_w * y_span_m / x_span_m
    height_in = axes_h + _BOTTOM_IN + _TOP_IN
    if even_pixels:  # video encoders want even frame sizes
        width_in = 2.0 * np.ceil(round(width_in * dpi, 6) / 2.0) / dpi
        height_in = 2.0 * np.ceil(round(height_in * dpi, 6) / 2.0) / dpi
    fig = Figure(figsize=(width_in, height_in), dpi=dpi, facecolor="white")
    FigureCanvasAgg(fig)
    ax = fig.add_axes((_LEFT_IN / width_in, _BOTTOM_IN / height_in, axes_w / width_in, axes_h / height_in))
    return fig, ax


def scene_figure(
    vehicles: np.ndarray,
    params: SimParams,
    *,
    x_range_m: tuple[float, float] | None = None,
    title: str | None = None,
    collided: bool = False,
    width_in: float = 10.0,
    dpi: float = 150.0,
) -> Figure:
    """A new Figure (on its own Agg canvas, no pyplot) showing one moment; arguments as :func:`draw_scene`.

    The figure is ``width_in`` wide and as tall as the road needs at equal aspect; save it with
    ``fig.savefig(path)``.
    """
    vehicles = check_vehicles(vehicles)
    lo, hi = _check_x_range(x_range_m if x_range_m is not None else default_x_range(vehicles))
    fig, ax = _new_figure(params, hi - lo, width_in, dpi)
    draw_scene(ax, vehicles, params, x_range_m=(lo, hi), title=title, collided=collided)
    return fig


class SceneRenderer:
    """Renders moments of one road to RGB images, reusing one figure (only the vehicles, the dashes in view and
    the text are updated between frames).

    Args:
        params: the scenario's arrays.
        width_px: image width in pixels; the height follows from the road's width at equal aspect (even, so that
            video encoders accept the frames).
        dpi: pixels per inch of the figure (sets the size of text and lines relative to the image).
        x_span_m: length of road shown in a frame whose ``x_range_m`` is left to the default.
    """

    def __init__(
        self,
        params: SimParams,
        *,
        width_px: int = 1000,
        dpi: float = 100.0,
        x_span_m: float = VIEW_BEHIND_M + VIEW_AHEAD_M,
    ):
        if width_px < 200:
            raise ConfigError(f"SceneRenderer width_px must be >= 200 pixels, got {width_px}")
        self.params = params
        self.figure, ax = _new_figure(params, x_span_m, width_px / dpi, dpi, even_pixels=True)
        self._canvas = self.figure.canvas
        ego_only = np.zeros((1, NUM_VEHICLE_FEATURES))
        ego_only[0, [F_LENGTH, F_WIDTH, F_VALID]] = params.ego_length_m, params.ego_width_m, 1.0
        self.artists = draw_scene(ax, ego_only, params)

    @property
    def ax(self) -> Axes:
        """The axes drawn into."""
        return self.artists.ax

    def render(
        self,
        vehicles: np.ndarray,
        *,
        x_range_m: tuple[float, float] | None = None,
        title: str | None = None,
        collided: bool = False,
    ) -> np.ndarray:
        """(H, W, 3) uint8 image of one moment; arguments as :func:`draw_scene`."""
        self.artists.update(vehicles, x_range_m=x_range_m, title=title, collided=collided)
        self._canvas.draw()
        return np.asarray(self._canvas.buffer_rgba())[..., :3].copy()

    def pixel_of(self, x_m: float, y_m: float) -> tuple[int, int]:
        """(row, column) of the image pixel that shows road position (x_m, y_m) in the last rendered frame."""
        px, py = self.ax.transData.transform((x_m, y_m))
        height = int(self._canvas.get_width_height()[1])
        return int(height - py), int(px)

    def close(self) -> None:
        """Drop the figure (a renderer holds no other resource)."""
        self.figure.clear()


def render_rgb(
    vehicles: np.ndarray,
    params: SimParams,
    *,
    x_range_m: tuple[float, float] | None = None,
    title: str | None = None,
    collided: bool = False,
    renderer: SceneRenderer | None = None,
) -> np.ndarray:
    """(H, W, 3) uint8 image of one moment; pass a :class:`SceneRenderer` of the same params to reuse its figure
    (much faster over many frames), otherwise a 1000 px wide one is made for this call."""
    if renderer is None:
        renderer = SceneRenderer(params)
    elif renderer.params is not params:
        raise ConfigError(
            "render_rgb: the renderer was made for another SimParams; make one SceneRenderer per scenario"
        )
    return renderer.render(vehicles, x_range_m=x_range_m, title=title, collided=collided)
