"""Tests of the figures of futures, plans and results (wmplan.viz.futures, wmplan.viz.plots).

Sources: the worked reliability example [D] of docs/references.md#naeini-2015-ece and docs/references.md#brier-1950
(bins [0, 0.5) and [0.5, 1]: mean p 0.24 vs frequency 0.20, mean p 0.78 vs 0.80, ECE 0.03, Brier 0.165); the Wilson
95% intervals [D] of docs/references.md#wilson-1927 (3/200 -> [0.005114, 0.043166], 7/50 -> [0.069508, 0.261862]);
shapely (a reference library, docs/references.md#lib-shapely) for the overlap of vehicle footprints; the best-of-6
labels of docs/references.md#practice-best-of-k; road geometry of onramp-merge worked by hand (lane width 3.6
m, lane 0 on [0, 320] m); PIL for reading written PNG files back. Futures come from the true simulator
(``wmplan.sim.oracle.oracle_futures``) on a seeded scene.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
import shapely
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure
from PIL import Image

from wmplan.errors import ConfigError
from wmplan.evaluate.stats import brier_score, expected_calibration_error, reliability_bins
from wmplan.model.train import write_metrics_csv
from wmplan.scenario import load_scenario
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.engine import step
from wmplan.sim.features import F_HEADING, F_LENGTH, F_VALID, F_WIDTH, F_X, F_Y
from wmplan.sim.observe import gather_slots, observe, to_frame
from wmplan.sim.oracle import oracle_futures
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO
from wmplan.viz import style
from wmplan.viz.futures import (
    RISK_CMAP,
    candidate_arrays,
    candidates_figure,
    future_collisions,
    futures_figure,
)
from wmplan.viz.plots import (
    closed_loop_figure,
    figure_png,
    paired_difference_figure,
    read_metrics_csv,
    reliability_figure,
    training_figure,
)

# p and y of the calibration example, docs/references.md#naeini-2015-ece.
P_93 = [0.1, 0.2, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9, 0.9]
Y_93 = [0, 0, 1, 0, 0, 1, 0, 1, 1, 1]


def _png_ok(fig: Figure, tmp_path, name: str) -> Image.Image:
    """Save through matplotlib to a file, read it back with PIL, check it is a real picture."""
    path = tmp_path / f"{name}.png"
    fig.savefig(path)
    with Image.open(path) as opened:
        assert opened.format == "PNG"
        img = opened.copy()
    assert img.width >= 400 and img.height >= 200
    assert len(np.unique(np.asarray(img.convert("RGB")).reshape(-1, 3), axis=0)) > 20  # not a blank canvas
    return img


def _has_colour(img: Image.Image, colour: str, tol: int = 3, min_pixels: int = 5) -> bool:
    px = np.asarray(img.convert("RGB")).astype(int)
    near = (np.abs(px - np.array(style.hex_to_rgb(colour))).max(axis=-1) <= tol).sum()
    return int(near) >= min_pixels


# --- a real decision: a seeded onramp-merge scene and the oracle's futures --------------------------------------------


def _decision(seed: int, steps: int = 60, history: int = 5, horizon: int = 15, k: int = 12):
    """History (W, N, 8), oracle futures in two modes (K, H, N, 8), the anchor pose and params of one scene.

    The ego follows the rule-based driver; the plan over the horizon keeps its last action. Object slots are those
    of the anchor's object list (8 nearest), and a slot whose vehicle changed is marked invalid, as the model's
    windows do.
    """
    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    state = initial_state(params, [seed])
    rows, ids = [], []
    for t in range(steps):
        if t % 2 == 0:
            rows.append(state.vehicles()[0])
            ids.append(state.vehicle_id[0].copy())
        action = rule_actions(state, params)
        state, _ = step(state, action, params)
    rows.append(state.vehicles()[0])
    ids.append(state.vehicle_id[0].copy())
    _, _, slots = observe(state, params)
    slots = slots[0]
    ego = state.vehicles()[0, EGO]
    pose = np.array([ego[F_X], ego[F_Y], ego[F_HEADING]])

    def frame(world: np.ndarray, world_ids: np.ndarray) -> np.ndarray:
        picked = gather_slots(world, np.broadcast_to(slots, world.shape[:-2] + slots.shape))
        same = np.take_along_axis(
            world_ids, np.broadcast_to(np.where(slots >= 0, slots, 0), world_ids.shape[:-1] + slots.shape), axis=-1
        )
        anchor_ids = state.vehicle_id[0][np.where(slots >= 0, slots, 0)]
        picked[..., F_VALID] *= (same == anchor_ids) & (slots >= 0)
        lead = world.shape[:-2]
        return to_frame(picked, np.broadcast_to(pose[:2], lead + (2,)), np.broadcast_to(pose[2], lead))

    hist = frame(np.stack(rows[-history:]), np.stack(ids[-history:]))
    plan = np.repeat(action[:, None, :], horizon, axis=1)  # (1, H, 2)
    futures = {}
    for mode in ("known", "resampled"):
        fut = oracle_futures(state, params, plan, k, mode=mode, seed=seed + 7)
        futures[mode] = frame(fut.vehicles[0], fut.vehicle_id[0])
    return hist, futures["resampled"], futures["known"], pose, params


@pytest.fixture(scope="module")
def decision():
    return _decision(seed=3)


def test_futures_figure_draws_every_valid_object_future(decision, tmp_path):
    """One violet line per (future, object) with at least two valid points, the same for teal; labelled axes in
    metres; the picture holds the palette's violet, teal, ego orange and slate grey."""
    hist, model_rows, oracle_rows, pose, params = decision
    det = model_rows.mean(axis=0)
    det[..., F_VALID] = (model_rows[..., F_VALID] > 0.5).all(axis=0)
    fig = futures_figure(hist, model_rows, oracle_rows, params, deterministic_rows=det, anchor_pose=pose)
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert ax.get_xlabel().endswith("[m]") and ax.get_ylabel().endswith("[m]")
    assert ax.get_aspect() == 1.0
    now = hist[-1]

    def expected_lines(rows: np.ndarray) -> int:
        ok = (rows[..., 1:, F_VALID] > 0.5).sum(axis=1) + (now[None, 1:, F_VALID] > 0.5)  # (K, N-1) valid points
        return int((ok >= 2).sum())

    fans = {}
    for coll in ax.collections:
        if isinstance(coll, LineCollection):
            colour = tuple(np.round(coll.get_colors()[0][:3], 3)) if len(coll.get_colors()) else None
            fans.setdefault(colour, []).append(len(coll.get_segments()))
    violet = tuple(np.round(np.array(style.hex_to_rgb(style.SAMPLED_FUTURE_COLOUR)) / 255.0, 3))
    teal = tuple(np.round(np.array(style.hex_to_rgb(style.ORACLE_FUTURE_COLOUR)) / 255.0, 3))
    assert fans[violet] == [expected_lines(model_rows)]
    assert fans[teal] == [expected_lines(oracle_rows)]
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert any("sampled futures" in t for t in labels) and any("oracle" in t for t in labels)
    assert any("least-squares" in t for t in labels)
    img = _png_ok(fig, tmp_path, "futures")
    for colour in (style.EGO_COLOUR, style.TRAFFIC_COLOUR, style.ROAD_COLOUR):
        assert _has_colour(img, colour), colour


def test_road_in_the_anchor_frame_worked_by_hand(decision):
    """onramp-merge, lanes 3.6 m wide from y = 0 (lane 0 on [0, 320] m): with the ego at world (x0, y0) and heading
    h, a solid edge along world y = Y crosses the anchor frame's x = 0 at y = (Y - y0) / cos h. Here x0 < 320, so
    the edges at x = 0 are the road's outer edges Y = 0 and Y = 10.8."""
    hist, model_rows, _, pose, params = decision
    assert pose[0] < 320.0
    fig = futures_figure(hist, model_rows, None, params, anchor_pose=pose, x_range_m=(-20.0, 20.0))
    ax = fig.axes[0]
    crossing = []
    for coll in ax.collections:
        if isinstance(coll, LineCollection) and coll.get_zorder() == 1.1:  # the solid white edges
            for seg in coll.get_segments():
                (xa, ya), (xb, yb) = seg[0], seg[-1]
                if min(xa, xb) < 0.0 < max(xa, xb) and abs(xb - xa) > 10.0:
                    crossing.append(ya + (yb - ya) * (0.0 - xa) / (xb - xa))
    expected = [(y_world - pose[1]) / np.cos(pose[2]) for y_world in (0.0, 10.8)]
    np.testing.assert_allclose(sorted(crossing), expected, atol=1e-9)


def test_future_collisions_agree_with_shapely():
    """A vehicle that drives into the ego's lane: the first step whose footprints overlap (shapely) gets the
    cross, midway between the two centres; a future without contact gets none."""
    h = 6
    rows = np.zeros((2, h, 2, 8))
    rows[..., F_VALID] = 1.0
    rows[..., F_LENGTH], rows[..., F_WIDTH] = 4.5, 1.8
    rows[:, :, 0, F_X] = np.arange(h) * 2.0
    rows[0, :, 1, F_X] = 12.0
    rows[0, :, 1, F_Y] = np.linspace(4.0, 0.0, h)  # cuts in
    rows[0, :, 1, F_HEADING] = -0.2
    rows[1, :, 1, F_X] = 40.0  # far ahead
    points = future_collisions(rows, 4.5, 1.8)

    def box(r):
        b = shapely.box(
            r[F_X] - r[F_LENGTH] / 2, r[F_Y] - r[F_WIDTH] / 2, r[F_X] + r[F_LENGTH] / 2, r[F_Y] + r[F_WIDTH] / 2
        )
        return shapely.affinity.rotate(b, r[F_HEADING], origin=(r[F_X], r[F_Y]), use_radians=True)

    touching = [t for t in range(h) if box(rows[0, t, 0]).intersects(box(rows[0, t, 1]))]
    assert touching, "the constructed cut-in must touch"
    t0 = touching[0]
    assert points.shape == (1, 2)
    np.testing.assert_allclose(points[0], 0.5 * (rows[0, t0, 0, :2] + rows[0, t0, 1, :2]))


def test_candidates_figure_colours_paths_by_risk(tmp_path):
    """Paths are coloured on [0, 1] by P(collision) with a colour bar labelled so; the chosen path is drawn on top
    with its own data; the cost panel plots (P(collision), cost) per candidate."""
    gen = np.random.default_rng(11)
    c, h = 12, 15
    t = np.arange(1, h + 1) * 0.2
    paths = np.zeros((c, h, 5))
    paths[..., 0] = t * gen.uniform(15, 30, (c, 1))
    paths[..., 1] = np.outer(gen.choice([-3.6, 0.0, 3.6], c), np.clip(t / 2.0, 0, 1))
    risk = gen.integers(0, 9, c) / 8.0
    cost = gen.normal(0.0, 1.0, c) + 5 * risk
    fut = np.zeros((8, h, 3, 8))
    fut[..., F_VALID], fut[..., F_LENGTH], fut[..., F_WIDTH] = 1.0, 4.6, 1.8
    fut[:, :, 0, F_X] = paths[4, :, 0]
    fut[:, :, 1, F_X] = 25.0 + t * gen.uniform(18, 24, (8, 1))
    fut[:, :, 2, F_X] = -20.0 + t * 28.0
    fut[:, :, 2, F_Y] = 3.6
    current = fut[0, 0].copy()
    current[:, F_X] = [0.0, 25.0, -20.0]
    fig = candidates_figure(paths, cost, risk, 4, fut, current=current)
    ax_map, ax_bar, ax_cost = fig.axes[:3]
    assert ax_bar.get_ylabel() == "P(collision)"
    assert ax_map.get_xlabel().endswith("[m]") and ax_cost.get_xlabel().endswith("[1]")
    assert "[1]" in ax_cost.get_ylabel()
    coloured = [col for col in ax_map.collections if isinstance(col, LineCollection) and col.get_array() is not None]
    assert len(coloured) == 1
    np.testing.assert_allclose(np.sort(coloured[0].get_array()), np.sort(risk))
    assert coloured[0].norm.vmin == 0.0 and coloured[0].norm.vmax == 1.0
    fig.canvas.draw()  # colours are mapped from the array when drawn
    np.testing.assert_allclose(coloured[0].get_colors()[:, :3], RISK_CMAP(np.sort(risk))[:, :3], atol=1e-6)
    chosen = [ln for ln in ax_map.lines if ln.get_gid() == "chosen-plan"]
    assert len(chosen) == 1
    np.testing.assert_allclose(chosen[0].get_xydata(), np.concatenate([[[0.0, 0.0]], paths[4, :, :2]]))
    offsets = ax_cost.collections[0].get_offsets()
    np.testing.assert_allclose(np.asarray(offsets), np.stack([risk, cost], axis=1))
    _png_ok(fig, tmp_path, "candidates")


def test_candidate_arrays_pick_the_chosen_plan():
    """From a PlanResult-like record (B = 2): the ego rows of each candidate, the scene's costs and risks, and the
    futures of the chosen candidate."""

    class Result:
        futures = np.arange(2 * 3 * 4 * 5 * 2 * 8, dtype=np.float64).reshape(2, 3, 4, 5, 2, 8)
        costs = np.array([[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]])
        chosen = np.array([2, 1])
        risk = {"p_collision": np.array([[0.0, 0.5, 1.0], [0.25, 0.5, 0.75]])}

    out = candidate_arrays(Result(), scene=1)
    np.testing.assert_array_equal(out["ego_paths"], Result.futures[1, :, 0, :, 0, :])
    np.testing.assert_array_equal(out["futures"], Result.futures[1, 1])
    assert out["chosen"] == 1
    np.testing.assert_array_equal(out["p_collision"], [0.25, 0.5, 0.75])

    class Bare:
        futures = costs = chosen = risk = None

    with pytest.raises(ConfigError, match="plan with keep=True"):
        candidate_arrays(Bare())


def test_reliability_figure_on_the_worked_example(tmp_path):
    """docs/references.md#naeini-2015-ece [D]: two bins; points at (0.24, 0.20) and (0.78, 0.80); 5 decisions
    per bin; the title carries Brier 0.1650 and ECE 0.0300 (computed by wmplan.evaluate.stats, matching the
    reference)."""
    bins = reliability_bins(P_93, Y_93, 2)
    brier = brier_score(P_93, Y_93)
    ece = expected_calibration_error(P_93, Y_93, 2)
    assert brier == pytest.approx(0.165) and ece == pytest.approx(0.03)
    fig = reliability_figure(bins, brier=brier, ece=ece, title="worked example")
    ax, ax_n = fig.axes[:2]
    line = [ln for ln in ax.lines if ln.get_marker() == "o"][0]
    np.testing.assert_allclose(line.get_xdata(), [0.24, 0.78])
    np.testing.assert_allclose(line.get_ydata(), [0.20, 0.80])
    assert [p.get_height() for p in ax_n.patches] == [5, 5]
    assert ax.get_title(loc="left") == "worked example\nBrier 0.1650, ECE 0.0300"
    assert ax_n.get_xlabel() == "predicted collision probability [1]"
    assert "[1]" in ax.get_ylabel() and "[count]" in ax_n.get_ylabel()
    _png_ok(fig, tmp_path, "reliability")


def test_reliability_interval_bars_are_wilson():
    """A bin of 50 decisions with 7 collisions: the bar spans the Wilson 95% interval [0.069508, 0.261862]
    ([D], docs/references.md#wilson-1927)."""
    bins = [{"low": 0.1, "high": 0.2, "count": 50, "mean_pred": 0.15, "freq": 0.14}]
    fig = reliability_figure(bins)
    ax = fig.axes[0]
    segs = [c for c in ax.collections if isinstance(c, LineCollection)][0].get_segments()
    np.testing.assert_allclose(sorted(segs[0][:, 1]), [0.069508, 0.261862], atol=1e-6)


def test_reliability_overlays_planners_from_summary_json(tmp_path):
    """The calibration dict of summary.json: one curve per planner that has bins, Brier and ECE in the legend;
    a planner with no decisions is left out."""
    gen = np.random.default_rng(5)
    calib = {}
    for name, scale in (("mpc+latent", 1.0), ("mpc+oracle", 0.5)):
        p = gen.beta(0.5, 4.0, 400)
        y = (gen.random(400) < p * scale).astype(int)
        bins = reliability_bins(p, y, 10)
        calib[name] = {
            "decisions": 400,
            "brier": brier_score(p, y),
            "ece": expected_calibration_error(p, y),
            "bins": [{k: (None if isinstance(v, float) and np.isnan(v) else v) for k, v in b.items()} for b in bins],
        }
    calib["mpc+constant-velocity"] = {"decisions": 0}
    fig = reliability_figure(calib)
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert sum("Brier" in t for t in labels) == 2
    assert not any("constant-velocity" in t for t in labels)
    _png_ok(fig, tmp_path, "reliability_overlay")


def test_training_figure_reads_metrics_csv(tmp_path):
    """A metrics.csv written by the training code's own writer: panels for the logged keys, epochs counted from 1,
    values as written; the y axes carry units."""
    rows = [
        {
            "epoch": e,
            "step": 10 * (e + 1),
            "loss/nll": 20.0 / (e + 1),
            "loss/kl": 1.0 + 0.1 * e,
            "val/nll": 21.0 / (e + 1),
            "val/kl": 1.05 + 0.1 * e,
            "val/min_fde_k6_m": 3.0 - 0.2 * e,
            "sched/kl_weight": min(1.0, (e + 1) / 4),
        }
        for e in range(6)
    ]
    path = tmp_path / "metrics.csv"
    write_metrics_csv(path, rows)
    assert read_metrics_csv(path)[2]["loss/nll"] == pytest.approx(20.0 / 3)
    fig = training_figure(path)
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left") for ax in visible] == [
        "Gaussian NLL of the future",
        "KL(posterior || prior)",
        "best-of-6 final displacement (validation)",
        "KL weight (warm-up schedule)",
    ]
    for ax in visible:
        assert ax.get_xlabel() == "epochs done [count]" and "[" in ax.get_ylabel()
    fde = visible[2].lines[0]
    np.testing.assert_allclose(fde.get_xdata(), np.arange(1, 7))
    np.testing.assert_allclose(fde.get_ydata(), [r["val/min_fde_k6_m"] for r in rows])
    assert visible[2].get_ylabel() == "minFDE, K = 6 [m]"
    _png_ok(fig, tmp_path, "training")


def test_training_figure_overlays_two_models(tmp_path):
    latent = [{"epoch": e, "loss/nll": 5.0 - e, "val/min_fde_k6_m": 2.0 - 0.1 * e} for e in range(4)]
    det = [{"epoch": e, "loss/mse": 1.0 / (e + 1), "val/mse": 1.1 / (e + 1), "val/min_fde_k6_m": 2.5} for e in range(3)]
    fig = training_figure({"latent": latent, "deterministic": det})
    titles = [ax.get_title(loc="left") for ax in fig.axes if ax.get_visible()]
    assert "squared error (least squares)" in titles and "Gaussian NLL of the future" in titles
    fde_ax = [ax for ax in fig.axes if ax.get_title(loc="left").startswith("best-of-6")][0]
    assert [ln.get_label() for ln in fde_ax.lines] == ["latent", "deterministic"]
    _png_ok(fig, tmp_path, "training_two")


def test_closed_loop_figure_bars_and_wilson_intervals(tmp_path):
    """Bars at the rates and whiskers at the Wilson ends: 3/200 collisions -> [0.005114, 0.043166] and 7/50 ->
    [0.069508, 0.261862] ([D], docs/references.md#wilson-1927), labelled on the bars."""
    results = {
        "rules": {
            "episodes": 200,
            "collision_rate": 0.015,
            "collision_ci95": [0.005114, 0.043166],
            "success_rate": 0.9,
            "success_ci95": [0.85, 0.935],
        },
        "mpc+latent": {
            "episodes": 50,
            "collision_rate": 0.14,
            "collision_ci95": [0.069508, 0.261862],
            "success_rate": 0.8,
            "success_ci95": [0.67, 0.89],
        },
    }
    fig = closed_loop_figure({"results": results, "scenario": "onramp-merge"})
    ax_c, ax_s = fig.axes[:2]
    assert ax_c.get_xlabel() == "collision rate, share of episodes [1]"
    assert ax_s.get_xlabel() == "success rate, share of episodes [1]"
    np.testing.assert_allclose([p.get_width() for p in ax_c.patches], [0.015, 0.14])
    whiskers = [c for c in ax_c.collections if isinstance(c, LineCollection)][0].get_segments()
    np.testing.assert_allclose(
        [sorted(s[:, 0]) for s in whiskers], [[0.005114, 0.043166], [0.069508, 0.261862]], atol=1e-9
    )
    texts = [t.get_text() for t in ax_c.texts]
    assert "0.015 [0.005, 0.043]" in texts and "0.140 [0.070, 0.262]" in texts
    assert [t.get_text() for t in ax_c.get_yticklabels()] == ["rules\n(n = 200)", "mpc+latent\n(n = 50)"]
    _png_ok(fig, tmp_path, "closed_loop")


def test_figure_png_is_a_png():
    fig = reliability_figure(reliability_bins(P_93, Y_93, 2))
    data = figure_png(fig)
    with Image.open(io.BytesIO(data)) as img:
        assert img.format == "PNG" and img.width > 300


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (
            lambda: futures_figure(np.zeros((5, 3, 7)), np.zeros((2, 4, 3, 8))),
            "history must have shape (W, N, 8) with F = 8 features and no empty axis, got (5, 3, 7)",
        ),
        (
            lambda: futures_figure(np.zeros((5, 3, 8)), np.zeros((2, 4, 4, 8))),
            "model_rows has 4 object rows but history has 3; both must hold the same objects (row 0 the ego)",
        ),
        (
            lambda: futures_figure(
                np.zeros((5, 3, 8)),
                np.zeros((2, 4, 3, 8)),
                params=SimParams.from_scenario(load_scenario("onramp-merge")),
            ),
            "params was given without anchor_pose; pass the ego's world (x_m, y_m, heading_rad) at the decision to "
            "draw the road in the anchor frame, or leave params out",
        ),
        (
            lambda: candidates_figure(np.zeros((3, 4, 2)), [1, 2, 3], [0.0, 0.5, 1.5], 0),
            "p_collision must lie in [0, 1] for every candidate (no NaN)",
        ),
        (
            lambda: candidates_figure(np.zeros((3, 4, 2)), [1, 2, 3], [0.0, 0.5, 1.0], 3),
            "chosen must be a candidate index (an integer) in 0..2, got 3",
        ),
        (
            lambda: reliability_figure({"mpc+latent": {"decisions": 0}}),
            "reliability_figure: no bins to draw; pass reliability_bins(...) or a calibration dict",
        ),
        (lambda: closed_loop_figure({}), "closed_loop_figure: results must be a non-empty dict {planner: summary}"),
        (
            lambda: training_figure([{"epoch": 0, "perf/samples_per_s": 10.0}]),
            "training_figure: none of the keys ['loss/nll', 'loss/kl', 'loss/mse', 'val/min_fde_k6_m', "
            "'sched/kl_weight'] was logged",
        ),
    ],
)
def test_bad_input_gives_one_line_errors(call, message):
    with pytest.raises(ConfigError) as err:
        call()
    assert str(err.value) == message and "\n" not in str(err.value)


def test_no_pyplot_state():
    """The figures live on their own Agg canvases: building them leaves pyplot unimported (checked in a fresh
    interpreter, where nothing else imported it)."""
    import subprocess
    import sys

    code = (
        "import sys, numpy as np\n"
        "from wmplan.viz.plots import reliability_figure\n"
        "from wmplan.viz.futures import candidates_figure\n"
        "reliability_figure([{'low': 0.0, 'high': 1.0, 'count': 3, 'mean_pred': 0.5, 'freq': 0.3333}])\n"
        "candidates_figure(np.zeros((2, 3, 2)) + 1.0, [1.0, 2.0], [0.0, 0.5], 1)\n"
        "print('matplotlib.pyplot' in sys.modules, 'torch' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120)
    assert out.stdout.split() == ["False", "False"]


def test_paired_difference_figure_marks_intervals_off_zero_and_carries_the_caution():
    """One row per compared planner and four panels; the point is filled where the interval excludes zero (a
    collision rate 10 of 40 against 0 of 40) and hollow where it does not; an outcome without discordant pairs is
    written "no power"; the caution is the footer. Invented rows (demo data)."""
    from wmplan.caution import CAUTION
    from wmplan.evaluate.paired import paired_comparison

    def rows(collide: int, near: int) -> list[dict]:
        return [
            {
                "seed": s,
                "collision": s < collide,
                "success": s >= collide,
                "near_miss": 20 <= s < 20 + near,
                "mean_speed_mps": 20.0 + 0.2 * (s % 3),
                "progress_m": 150.0 + (s % 5),
            }
            for s in range(40)
        ]

    ref = rows(0, 1)
    summary = {
        "planners": ["rules", "mpc+constant-velocity", "mpc+oracle"],
        "reference": "mpc+oracle",
        "comparisons": {
            "rules": paired_comparison(ref, rows(0, 3), reference="mpc+oracle"),
            "mpc+constant-velocity": paired_comparison(ref, rows(10, 1), reference="mpc+oracle"),
        },
    }
    fig = paired_difference_figure(summary)
    axes = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left").split("\n")[0] for ax in axes] == [
        "collision rate",
        "near-miss rate",
        "success rate",
        "mean speed",
    ]
    collision = axes[0]
    points = [ln for ln in collision.get_lines() if ln.get_marker() == "o"]
    assert len(points) == 1  # rules never collided: no point, the words instead
    assert points[0].get_markerfacecolor() != "white"  # filled: +0.25 with an interval above zero
    assert points[0].get_color() == style.PLANNER_COLOURS[1]  # the colour of closed_loop_figure for that planner
    assert any(t.get_text().strip() == "no power" for t in collision.texts)
    near = [ln for ln in axes[1].get_lines() if ln.get_marker() == "o"]
    assert len(near) == 1 and near[0].get_markerfacecolor() == "white"  # 3 vs 1 near misses: could be chance
    assert any(t.get_text() == CAUTION for t in fig.texts)
    with pytest.raises(ConfigError, match="paired_difference_figure: comparisons must be a non-empty dict"):
        paired_difference_figure({})
    with pytest.raises(ConfigError, match=r"comparisons\['x'\] lacks the differences"):
        paired_difference_figure({"x": {"collision_rate_diff": 0.1}})
