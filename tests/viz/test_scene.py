"""Tests of scene drawing, rendering and episode files (wmplan.viz.scene, wmplan.viz.anim).

Sources: road geometry worked by hand from the built-in scenario files (onramp-merge: lane 0 on [0, 320] m,
lanes 1-2 on [0, 1200] m, width 3.6 m; lane-drop: lane 2 ends at 400 m); shapely (a reference library,
docs/references.md#lib-shapely) for the vehicle footprints; PIL for reading the written PNG and GIF files
back; the palette of wmplan.viz.style for pixel colours.
"""

from __future__ import annotations

import re
import subprocess
import sys

import numpy as np
import pytest
import shapely
from matplotlib.figure import Figure
from PIL import Image

from wmplan.errors import ConfigError
from wmplan.scenario import load_scenario
from wmplan.sim.ego_rules import RULE_DECISION_PERIOD_S, rule_actions
from wmplan.sim.env import LaneEnv
from wmplan.sim.features import F_VALID, F_X, F_Y
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO
from wmplan.viz import style
from wmplan.viz.anim import episode_frames, render_to_file, save_episode_animation
from wmplan.viz.scene import (
    SceneRenderer,
    collision_point,
    dash_segments,
    draw_scene,
    render_rgb,
    road_markings,
    scene_figure,
    vehicle_polygons,
)


def _params(name: str) -> SimParams:
    return SimParams.from_scenario(load_scenario(name))


def _near(pixel: np.ndarray, colour: str, tol: int = 2) -> bool:
    return bool(np.abs(pixel.astype(int) - np.array(style.hex_to_rgb(colour))).max() <= tol)


# --- road geometry ------------------------------------------------------------------------------------------------


def test_onramp_markings_worked_by_hand():
    """onramp-merge: dashes between lanes 0|1 on [0, 320] and 1|2 on [0, 1200]; solid edges along y = 0 on
    [0, 320], along y = 3.6 on [320, 1200] (lane 1 has no neighbour there), along y = 10.8 on [0, 1200], and
    across lane 0 at x = 320 where it ends."""
    dashed, solid = road_markings(_params("onramp-merge"))
    assert dashed == [(3.6, 0.0, 320.0), (7.2, 0.0, 1200.0)]
    expected = {
        ((0.0, 0.0), (320.0, 0.0)),
        ((0.0, 10.8), (1200.0, 10.8)),
        ((320.0, 3.6), (1200.0, 3.6)),
        ((320.0, 0.0), (320.0, 3.6)),
    }
    got = {tuple(tuple(round(float(v), 9) for v in p) for p in seg) for seg in solid}
    assert got == expected


def test_lane_drop_markings_worked_by_hand():
    """lane-drop: lane 2 (leftmost) ends at 400 m of 1500 m, lane width 3.6 m."""
    dashed, solid = road_markings(_params("lane-drop"))
    w = _params("lane-drop").lane_width_m
    assert dashed == [(w, 0.0, 1500.0), (2 * w, 0.0, 400.0)]
    got = {tuple(tuple(round(float(v), 9) for v in p) for p in seg) for seg in solid}
    assert got == {
        ((0.0, 0.0), (1500.0, 0.0)),
        ((0.0, round(3 * w, 9)), (400.0, round(3 * w, 9))),
        ((400.0, round(2 * w, 9)), (1500.0, round(2 * w, 9))),
        ((400.0, round(2 * w, 9)), (400.0, round(3 * w, 9))),
    }


def test_dashes_sit_at_fixed_road_positions():
    """Dashes are DASH_LENGTH_M long, start every DASH_LENGTH_M + DASH_GAP_M metres from x = 0, are clipped to
    the shared stretch, and cover the asked range."""
    period = style.DASH_LENGTH_M + style.DASH_GAP_M
    seg = dash_segments([(3.6, 0.0, 320.0)], 10.0, 100.0)
    starts, ends = seg[:, 0, 0], seg[:, 1, 0]
    np.testing.assert_allclose(np.mod(starts, period), 0.0, atol=1e-9)
    np.testing.assert_allclose(ends - starts, style.DASH_LENGTH_M)
    assert starts.min() <= 10.0 and ends.max() >= 100.0 - style.DASH_GAP_M
    np.testing.assert_array_equal(seg[:, :, 1], 3.6)
    clipped = dash_segments([(3.6, 0.0, 316.5)], 300.0, 400.0)  # the dash [315, 318] is cut at 316.5
    assert clipped[:, 1, 0].max() == 316.5 and clipped[:, 0, 0].max() == 315.0
    assert dash_segments([(3.6, 0.0, 320.0)], 500.0, 600.0).shape == (0, 2, 2)


@pytest.mark.parametrize("seed", [0, 1])
def test_vehicle_polygons_match_shapely_boxes(seed):
    """Footprints equal shapely boxes rotated about their centres (shapely.affinity); heading marks lie inside."""
    gen = np.random.default_rng(seed)
    rows = np.zeros((6, 8))
    rows[:, F_X], rows[:, F_Y] = gen.uniform(0, 100, 6), gen.uniform(0, 10, 6)
    rows[:, 4], rows[:, 5], rows[:, 6], rows[:, F_VALID] = (
        gen.uniform(-3, 3, 6),
        gen.uniform(3, 12, 6),
        gen.uniform(1.5, 2.6, 6),
        1.0,
    )
    polys, marks = vehicle_polygons(rows)
    for r, p, m in zip(rows, polys, marks, strict=True):
        ref = shapely.affinity.rotate(
            shapely.box(r[0] - r[5] / 2, r[1] - r[6] / 2, r[0] + r[5] / 2, r[1] + r[6] / 2),
            r[4],
            origin=(r[0], r[1]),
            use_radians=True,
        )
        ours = shapely.Polygon(p)
        assert ours.is_valid and ours.area == pytest.approx(r[5] * r[6], rel=1e-9)
        assert ours.symmetric_difference(ref).area < 1e-9
        assert ours.buffer(1e-9).contains(shapely.Polygon(m))
        assert not shapely.Polygon(m).contains(shapely.Point(r[0], r[1]))  # the centre keeps the body colour


def test_collision_point_is_midway_to_the_nearest_vehicle():
    rows = np.zeros((3, 8))
    rows[:, F_VALID] = 1.0
    rows[:, F_X] = [10.0, 14.0, 40.0]
    rows[:, F_Y] = [2.0, 3.0, 2.0]
    assert collision_point(rows) == (12.0, 2.5)
    rows[1:, F_VALID] = 0.0
    assert collision_point(rows) == (10.0, 2.0)


# --- figures and images ----------------------------------------------------------------------------------------------


def test_scene_figure_has_metre_axes_equal_aspect_and_the_default_view():
    """The default view runs from 60 m behind the ego to 140 m ahead; axes in metres at equal aspect."""
    params = _params("onramp-merge")
    rows = initial_state(params, [0]).vehicles()[0]
    fig = scene_figure(rows, params, title="t = 0")
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert ax.get_xlim() == pytest.approx((rows[EGO, F_X] - 60.0, rows[EGO, F_X] + 140.0))
    assert "[m]" in ax.get_xlabel() and "[m]" in ax.get_ylabel()
    assert ax.get_aspect() == 1.0
    assert ax.get_title(loc="left") == "t = 0"


def test_render_rgb_colours_ego_traffic_and_road():
    """The pixel at each vehicle's centre has its colour (ego deep orange, others slate grey), and a point of
    an empty lane has the road colour."""
    params = _params("open-road")
    rows = np.zeros((3, 8))
    rows[:, F_VALID] = 1.0
    rows[:, 5], rows[:, 6] = 4.7, 1.85
    rows[:, F_X] = [100.0, 130.0, 160.0]
    rows[:, F_Y] = [params.lane_centre_m(1), params.lane_centre_m(0), params.lane_centre_m(2)]
    rnd = SceneRenderer(params, width_px=1000)
    img = render_rgb(rows, params, renderer=rnd)
    assert img.shape[1] == 1000 and img.shape[0] % 2 == 0 and img.dtype == np.uint8
    assert _near(img[rnd.pixel_of(100.0, rows[0, F_Y])], style.EGO_COLOUR)
    assert _near(img[rnd.pixel_of(130.0, rows[1, F_Y])], style.TRAFFIC_COLOUR)
    assert _near(img[rnd.pixel_of(160.0, rows[2, F_Y])], style.TRAFFIC_COLOUR)
    assert _near(img[rnd.pixel_of(80.0, params.lane_centre_m(0))], style.ROAD_COLOUR)
    assert _near(img[rnd.pixel_of(80.0, -2.0)], style.VERGE_COLOUR)


def test_collision_cross_is_drawn_only_on_collision():
    """A black cross appears where the ego meets its neighbour when collided=True, and nowhere otherwise."""
    params = _params("open-road")
    rows = np.zeros((2, 8))
    rows[:, F_VALID], rows[:, 5], rows[:, 6] = 1.0, 4.7, 1.85
    rows[:, F_X], rows[:, F_Y] = [100.0, 104.0], params.lane_centre_m(1)
    rnd = SceneRenderer(params)
    calm = rnd.render(rows)
    crash = rnd.render(rows, collided=True)
    black = [np.abs(im.astype(int)).max(axis=-1) <= 10 for im in (calm, crash)]
    assert black[0].sum() == 0 and black[1].sum() > 20
    r, c = rnd.pixel_of(102.0, rows[0, F_Y])
    assert black[1][r - 3 : r + 4, c - 3 : c + 4].any()


def test_draw_scene_on_a_callers_axes_and_bad_rows():
    params = _params("cut-in")
    fig = Figure()
    ax = fig.add_subplot()
    rows = initial_state(params, [2]).vehicles()[0]
    artists = draw_scene(ax, rows, params, x_range_m=(0.0, 300.0))
    assert ax.get_xlim() == (0.0, 300.0)
    artists.update(rows, x_range_m=(50.0, 150.0))
    assert ax.get_xlim() == (50.0, 150.0)
    msg = (
        "vehicles must have shape (V, 8) with V >= 1 (world-frame rows in VEHICLE_FEATURES order, slot 0 the "
        "ego), got shape (3, 5)"
    )
    with pytest.raises(ConfigError, match=re.escape(msg)):
        draw_scene(ax, np.zeros((3, 5)), params)
    with pytest.raises(
        ConfigError, match=re.escape("x_range_m must be two finite numbers (low, high) with high > low")
    ):
        draw_scene(ax, rows, params, x_range_m=(10.0, 10.0))


def test_viz_imports_neither_pyplot_nor_torch():
    """viz draws on Agg canvases of matplotlib.figure.Figure (no pyplot global state) and never needs torch."""
    code = (
        "import sys; from wmplan.viz.anim import render_to_file; import wmplan.viz, wmplan.sim.env; "
        "from wmplan.sim.env import LaneEnv; e = LaneEnv('cut-in', render_mode='rgb_array'); e.reset(seed=0); "
        "e.render(); bad = [m for m in ('matplotlib.pyplot', 'torch') if m in sys.modules]; print(bad)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


# --- episodes and files ----------------------------------------------------------------------------------------------


def test_episode_frames_follow_the_env_under_the_rules():
    """episode_frames gives the same world rows as a LaneEnv driven by the same rule-based actions (decided every
    ``RULE_DECISION_PERIOD_S``, held in between), frame 0 being the initial state, and outcome flags that match
    the env's."""
    params = _params("cut-in")
    frames, oc = episode_frames(params, seed=4)
    assert frames.shape == (oc.num_steps + 1, params.num_vehicles, 8)
    env = LaneEnv("cut-in")
    env.reset(options={"scene_seed": 4})
    np.testing.assert_array_equal(frames[0], env.state.vehicles()[0])
    info = {}
    hold = round(RULE_DECISION_PERIOD_S / params.dt_s)
    for t in range(1, oc.num_steps + 1):
        if (t - 1) % hold == 0:
            action = rule_actions(env.state, env.params)[0]
        _, _, term, trunc, info = env.step(action)
        np.testing.assert_array_equal(frames[t], env.state.vehicles()[0])
    assert term or trunc
    assert (info["collision"], info["offroad"], info["goal"]) == (oc.collided, oc.offroad, oc.reached_goal)
    if oc.reached_goal:
        assert oc.goal_at == oc.num_steps


def test_render_to_file_png(tmp_path):
    """A PNG of one moment that PIL reads back, wider than tall (the road at equal aspect), nothing else left in
    the folder (atomic write)."""
    out = render_to_file("onramp-merge", tmp_path / "scene.png", seed=0, step=30)
    assert out == tmp_path / "scene.png"
    with Image.open(out) as im:
        assert im.format == "PNG" and im.size[0] > 4 * im.size[1] > 0
        rgb = np.asarray(im.convert("RGB"))
    assert (np.abs(rgb.astype(int) - style.hex_to_rgb(style.EGO_COLOUR)).max(axis=-1) <= 2).sum() > 50
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scene.png"]


def test_render_to_file_gif_frames(tmp_path):
    """A GIF of steps 0..20 holds 21 frames whose ego pixels keep the ego colour after palette quantisation."""
    out = render_to_file("lane-drop", tmp_path / "episode.gif", seed=1, step=20)
    with Image.open(out) as im:
        assert im.format == "GIF" and im.n_frames == 21
        im.seek(10)
        rgb = np.asarray(im.convert("RGB"))
    assert (np.abs(rgb.astype(int) - style.hex_to_rgb(style.EGO_COLOUR)).max(axis=-1) <= 6).sum() > 30
    assert sorted(p.name for p in tmp_path.iterdir()) == ["episode.gif"]


def test_render_to_file_whole_episode_gif(tmp_path):
    """Without a step the GIF holds every frame of the episode (episode_frames with the same seed)."""
    frames, _ = episode_frames(_params("cut-in"), seed=0)
    with Image.open(render_to_file("cut-in", tmp_path / "all.gif", seed=0)) as im:
        assert im.n_frames == len(frames)


def test_save_episode_animation_marks_the_collision(tmp_path):
    """Frames from collided_at on carry the black cross; earlier frames do not."""
    params = _params("open-road")
    rows = np.zeros((3, 2, 8))
    rows[..., F_VALID], rows[..., 5], rows[..., 6] = 1.0, 4.7, 1.85
    rows[:, :, F_Y] = params.lane_centre_m(1)
    rows[:, 0, F_X] = [100.0, 101.0, 102.0]
    rows[:, 1, F_X] = [106.0, 106.0, 106.0]
    out = save_episode_animation(rows, params, tmp_path / "crash.gif", fps=5, collided_at=2)
    with Image.open(out) as im:
        dark = []
        for t in range(im.n_frames):
            im.seek(t)
            dark.append(int((np.asarray(im.convert("RGB")).max(axis=-1) <= 10).sum()))
    assert dark[0] == dark[1] == 0 and dark[2] > 20


def test_unsupported_suffix_and_other_bad_requests(tmp_path, monkeypatch):
    """One-line errors naming the file, the value and the rule; nothing is written."""
    msg = (
        f"{tmp_path / 'x.jpg'}: unsupported output suffix '.jpg'; use .png for one moment, .gif or .mp4 for the "
        "whole episode"
    )
    with pytest.raises(ConfigError, match=re.escape(msg)) as err:
        render_to_file("open-road", tmp_path / "x.jpg")
    assert "\n" not in str(err.value)
    frames, oc = episode_frames(_params("open-road"), seed=0)
    with pytest.raises(
        ConfigError, match=re.escape(f"step 999 is beyond this episode, which has steps 0..{oc.num_steps}")
    ):
        render_to_file("open-road", tmp_path / "x.png", step=999)
    monkeypatch.setattr("wmplan.viz.anim.shutil.which", lambda name: None)
    msg = f"{tmp_path / 'x.mp4'}: writing .mp4 needs the ffmpeg program on PATH, which was not found"
    with pytest.raises(ConfigError, match=re.escape(msg)):
        save_episode_animation(frames[:3], _params("open-road"), tmp_path / "x.mp4")
    with pytest.raises(ConfigError, match=re.escape("policy must be 'rules' or a callable")):
        episode_frames(_params("open-road"), seed=0, policy="fast")
    assert list(tmp_path.iterdir()) == []
