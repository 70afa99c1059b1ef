"""Figures and animations of wmplan (matplotlib only, never pyplot or torch): arrays in, Figures or images out."""

from wmplan.viz.scene import SceneRenderer, draw_scene, render_rgb, scene_figure

__all__ = ["SceneRenderer", "draw_scene", "render_rgb", "scene_figure"]
