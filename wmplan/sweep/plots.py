"""Summary plots of a sweep: collision rate per planner against the swept values, with Wilson 95% intervals.

* One swept number: a line per planner, collision rate against the value, interval bars.
* Two or more swept numbers: a heatmap per planner over the first two (any further swept values pooled: their
  cells' counts are added), each square labelled with the rate and the interval.
* No swept number: collision rate per planner as points with interval bars.

Matplotlib's object interface with the Agg canvas only (no pyplot, no global state); files are written atomically.
Colours: planners get a palette that stays clear of the hues reserved for scenes (ego deep orange, traffic slate
grey, learned futures violet, oracle futures teal); the heatmap runs from white through amber to a dark red-brown.
"""

from __future__ import annotations

import io
import json
import math
import re
from collections import defaultdict
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure

from wmplan.caution import caution_footer
from wmplan.intervals import wilson_interval
from wmplan.io import atomic_write_bytes

PLANNER_COLOURS = ("#1f5fa8", "#2b8a3e", "#b8860b", "#a61e4d", "#343a40", "#5c940d")
"""Blue, green, dark gold, crimson, charcoal, olive: distinct from the scene colours and from each other."""
RATE_CMAP = LinearSegmentedColormap.from_list("wmplan_rate", ["#ffffff", "#f2b84b", "#b3261e", "#3d0c02"])
TEXT_COLOUR = "#222222"

# Unit of a field from the suffix of its name (longest suffix first).
_UNITS = (
    ("_veh_per_km", "veh/km"),
    ("_per_min", "1/min"),
    ("_mps2", "m/s²"),
    ("_mps", "m/s"),
    ("_radps", "rad/s"),
    ("_rad", "rad"),
    ("_prob", "probability"),
    ("_m", "m"),
    ("_s", "s"),
)


def axis_label(path: str) -> str:
    """``traffic.density_veh_per_km[1]`` -> ``traffic.density_veh_per_km[1] (veh/km)``: the path and its unit."""
    names = [n for n in re.split(r"[.\[\]]", path) if n and not n.isdigit()]
    for name in reversed(names):
        if name in ("mean", "std", "low", "high"):
            continue
        for suffix, unit in _UNITS:
            if name.endswith(suffix):
                return f"{path} ({unit})"
        break
    return path


def _is_number(v: object) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(float(v))


def _pooled(cells: list[dict], keys: tuple[str, ...]) -> dict[tuple, tuple[int, int]]:
    """(planner, values of ``keys``...) -> (collisions, episodes), adding up cells that differ elsewhere."""
    out: dict[tuple, list[int]] = defaultdict(lambda: [0, 0])
    for c in cells:
        key = (c["planner"], *[c["params"][k] for k in keys])
        out[key][0] += c["collisions"]
        out[key][1] += c["n"]
    return {k: (v[0], v[1]) for k, v in out.items()}


def _save(fig: Figure, path: Path) -> Path:
    """Write a standalone sweep figure (with the caution as its footer) atomically."""
    caution_footer(fig)
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    atomic_write_bytes(path, buf.getvalue())
    return path


def lines_figure(cells: list[dict], path_x: str, planners: list[str], title: str) -> Figure:
    """Collision rate against one swept value, a line per planner with Wilson 95% interval bars."""
    counts = _pooled(cells, (path_x,))
    fig = Figure(figsize=(6.4, 4.2))
    ax = fig.add_subplot()
    for i, planner in enumerate(planners):
        xs = sorted(x for (p, x) in counts if p == planner)
        if not xs:
            continue
        rate = np.array([counts[(planner, x)][0] / counts[(planner, x)][1] for x in xs])
        ci = np.array([wilson_interval(*counts[(planner, x)]) for x in xs])
        colour = PLANNER_COLOURS[i % len(PLANNER_COLOURS)]
        ax.errorbar(
            xs, rate, yerr=[rate - ci[:, 0], ci[:, 1] - rate], color=colour, marker="o", capsize=3, label=planner
        )
    xs_all = [k[1] for k in counts]
    if min(xs_all) > 0 and max(xs_all) >= 20 * min(xs_all):  # values over decades (e.g. loguniform draws)
        ax.set_xscale("log")
    ax.set_xlabel(axis_label(path_x))
    ax.set_ylabel("collision rate (Wilson 95% interval)")
    ax.set_ylim(bottom=0.0)
    ax.set_title(title, color=TEXT_COLOUR)
    ax.grid(alpha=0.3)
    ax.legend(title="planner")
    return fig


def heatmap_figure(cells: list[dict], path_x: str, path_y: str, planners: list[str], title: str) -> Figure:
    """Collision rate over two swept values, one heatmap per planner, squares labelled with rate and interval."""
    counts = _pooled(cells, (path_x, path_y))
    xs = sorted({k[1] for k in counts})
    ys = sorted({k[2] for k in counts})
    # at least about 3 x 2.2 inches of map per planner, so that a 2 x 2 grid still reads (labels, intervals)
    panel_w, panel_h = max(3.0, 1.05 * len(xs)), max(2.2, 0.7 * len(ys))
    fig = Figure(figsize=(1.4 + panel_w * len(planners) + 1.0, 1.5 + panel_h), layout="constrained")
    axes = fig.subplots(1, len(planners), squeeze=False)[0]
    vmax = max(max(k / n for k, n in counts.values() if n), 0.05)
    image = None
    for ax, planner in zip(axes, planners, strict=True):
        grid = np.full((len(ys), len(xs)), np.nan)
        for (p, x, y), (k, n) in counts.items():
            if p == planner and n:
                grid[ys.index(y), xs.index(x)] = k / n
                lo, hi = wilson_interval(k, n)
                rate = k / n
                ax.text(
                    xs.index(x),
                    ys.index(y),
                    f"{rate:.2f}\n[{lo:.2f}, {hi:.2f}]\nn = {n}",
                    ha="center",
                    va="center",
                    fontsize=8,
                    color="white" if rate > 0.55 * vmax else TEXT_COLOUR,
                )
        image = ax.imshow(grid, origin="lower", cmap=RATE_CMAP, vmin=0.0, vmax=vmax, aspect="auto")
        ax.set_xticks(range(len(xs)), [f"{x:.3g}" for x in xs])
        ax.set_yticks(range(len(ys)), [f"{y:.3g}" for y in ys])
        ax.set_xlabel(axis_label(path_x))
        y_label = axis_label(path_y)
        ax.set_ylabel(y_label.replace(" (", "\n(", 1) if len(y_label) > 26 else y_label)
        ax.set_title(f"planner {planner}", color=TEXT_COLOUR)
    assert image is not None
    fig.colorbar(image, ax=list(axes), label="collision rate")
    fig.suptitle(title, color=TEXT_COLOUR)
    return fig


def points_figure(cells: list[dict], planners: list[str], title: str) -> Figure:
    """Collision rate per planner with Wilson 95% interval bars (nothing numeric was swept)."""
    counts = _pooled(cells, ())
    fig = Figure(figsize=(1.5 + 1.0 * len(planners), 4.0))
    ax = fig.add_subplot()
    for i, planner in enumerate(planners):
        k, n = counts[(planner,)]
        lo, hi = wilson_interval(k, n)
        ax.errorbar(
            [i],
            [k / n],
            yerr=[[k / n - lo], [hi - k / n]],
            color=PLANNER_COLOURS[i % len(PLANNER_COLOURS)],
            marker="o",
            capsize=4,
        )
    ax.set_xticks(range(len(planners)), planners)
    ax.set_xlabel("planner")
    ax.set_ylabel("collision rate (Wilson 95% interval)")
    ax.set_ylim(bottom=0.0)
    ax.set_title(title, color=TEXT_COLOUR)
    ax.grid(alpha=0.3, axis="y")
    return fig


def write_summary_plots(summary: dict, out_dir: Path) -> list[Path]:
    """Draw the collision-rate plot that fits the sweep's swept values; returns the files written."""
    cells = summary["cells"]
    planners = [p for p in summary["planners"] if any(c["planner"] == p for c in cells)]
    numeric = [p for p in summary["parameters"] if all(_is_number(c["params"][p]) for c in cells)]
    title = f"sweep {summary['sweep']}: collision rate"
    shown = numeric[:2] if len(numeric) >= 2 else numeric
    pooled = [p for p in summary["parameters"] if p not in shown]
    if pooled and len({json.dumps(c["params"][p]) for c in cells for p in pooled}) > len(pooled):
        title += f" (pooled over {', '.join(pooled)})"
    if len(numeric) >= 2:
        fig = heatmap_figure(cells, numeric[0], numeric[1], planners, title)
    elif len(numeric) == 1:
        fig = lines_figure(cells, numeric[0], planners, title)
    else:
        fig = points_figure(cells, planners, title)
    return [_save(fig, Path(out_dir) / "collision_rate.png")]
