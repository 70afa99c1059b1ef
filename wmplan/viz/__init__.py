"""Figures and animations of wmplan (matplotlib only, never pyplot or torch): arrays in, Figures or images out."""

from wmplan.viz.futures import candidate_arrays, candidates_figure, futures_figure
from wmplan.viz.plots import closed_loop_figure, figure_png, reliability_figure, training_figure
from wmplan.viz.scene import SceneRenderer, draw_scene, render_rgb, scene_figure

__all__ = [
    "SceneRenderer",
    "candidate_arrays",
    "candidates_figure",
    "closed_loop_figure",
    "draw_scene",
    "figure_png",
    "futures_figure",
    "reliability_figure",
    "render_rgb",
    "scene_figure",
    "training_figure",
]
