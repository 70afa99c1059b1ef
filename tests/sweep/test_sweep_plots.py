"""Sweep summary plots: axis labels carry the path and its unit, and the right kind of plot is drawn.

The summaries below are made up for the drawing checks only (no result is claimed from them). Pixel checks look
for the planner colours of wmplan.sweep.plots in the rendered PNG (common practice, no source); the Wilson bars
come from wmplan.intervals (docs/references.md#wilson-1927).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from wmplan.sweep.plots import PLANNER_COLOURS, RATE_CMAP, axis_label, write_summary_plots


@pytest.mark.parametrize(
    ("path", "label"),
    [
        ("traffic.density_veh_per_km[1]", "traffic.density_veh_per_km[1] (veh/km)"),
        ("drivers.yield_prob.mean", "drivers.yield_prob.mean (probability)"),
        ("drivers.hard_brake_rate_per_min", "drivers.hard_brake_rate_per_min (1/min)"),
        ("drivers.desired_speed_mps.std", "drivers.desired_speed_mps.std (m/s)"),
        ("limits.max_accel_mps2", "limits.max_accel_mps2 (m/s²)"),
        ("ego.x_m", "ego.x_m (m)"),
        ("duration_s", "duration_s (s)"),
        ("traffic.max_vehicles", "traffic.max_vehicles"),
    ],
)
def test_axis_label_units(path: str, label: str) -> None:
    assert axis_label(path) == label


def _cell(planner: str, params: dict, k: int, n: int = 20) -> dict:
    return {"planner": planner, "params": params, "collisions": k, "n": n}


def _has_colour(png: Path, colour: str, tol: int = 12) -> bool:
    img = np.asarray(Image.open(png).convert("RGB")).astype(int)
    rgb = np.array([int(colour[i : i + 2], 16) for i in (1, 3, 5)])
    return bool((np.abs(img - rgb).max(axis=-1) <= tol).any())


def test_one_swept_value_draws_a_line_per_planner(tmp_path: Path) -> None:
    cells = [
        _cell(p, {"drivers.yield_prob.mean": y}, k)
        for p, ks in (("rules", (0, 2, 5)), ("mpc", (1, 1, 2)))
        for y, k in zip((0.2, 0.5, 0.8), ks, strict=True)
    ]
    summary = {"sweep": "t", "planners": ["rules", "mpc"], "parameters": ["drivers.yield_prob.mean"], "cells": cells}
    (png,) = write_summary_plots(summary, tmp_path)
    assert png.name == "collision_rate.png"
    assert _has_colour(png, PLANNER_COLOURS[0]) and _has_colour(png, PLANNER_COLOURS[1])


def test_two_swept_values_draw_heatmaps(tmp_path: Path) -> None:
    cells = [
        _cell(p, {"a_m": a, "b_s": b}, k)
        for p in ("rules", "mpc")
        for a in (1.0, 2.0)
        for b, k in ((3.0, 0), (4.0, 20))
    ]
    summary = {"sweep": "t", "planners": ["rules", "mpc"], "parameters": ["a_m", "b_s"], "cells": cells}
    (png,) = write_summary_plots(summary, tmp_path)
    top = RATE_CMAP(1.0)
    hexcol = "#" + "".join(f"{int(round(255 * c)):02x}" for c in top[:3])
    assert _has_colour(png, hexcol)  # the cells with rate 1.0 wear the top of the colour scale
    assert not _has_colour(png, PLANNER_COLOURS[0], tol=4)


def test_nothing_numeric_draws_points_per_planner(tmp_path: Path) -> None:
    cells = [
        _cell("rules", {"traffic.density_veh_per_km": [1.0, 2.0]}, 3),
        _cell("mpc", {"traffic.density_veh_per_km": [1.0, 2.0]}, 1),
    ]
    summary = {"sweep": "t", "planners": ["rules", "mpc"], "parameters": ["traffic.density_veh_per_km"], "cells": cells}
    (png,) = write_summary_plots(summary, tmp_path)
    assert _has_colour(png, PLANNER_COLOURS[0]) and _has_colour(png, PLANNER_COLOURS[1])
