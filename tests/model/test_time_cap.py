"""The training curve at a finer grain than the epoch, and the run report's note when the time cap cut training
short.

Contract (issue "Scenarios where prediction decides the outcome", item 7; common practice, no source:
docs/references.md#practice-smoke-test): ``curve.csv`` holds ten points per epoch, so a run that the time cap stops
after its first epoch still draws a curve of ten points; the training losses of those points average to the
epoch's value in ``metrics.csv`` (the same steps, summed in two ways); and the run report says at its top which
model stopped early, with the epochs and steps done and planned.
"""

from __future__ import annotations

import csv
import json
import shutil

import pytest

from tests.model.model_helpers import tiny_model_config, tiny_train_config
from wmplan.model.train import CURVE_POINTS_PER_EPOCH, train
from wmplan.report import build_report, training_cut_notes
from wmplan.viz.plots import read_metrics_csv, training_figure


@pytest.fixture(scope="module")
def capped(dataset_dir, tmp_path_factory):
    """A tiny latent model planned for 5 epochs of 20 steps with a cap of 6 ms: the cap stops it after epoch 1."""
    run = tmp_path_factory.mktemp("capped")
    res = train(
        dataset_dir,
        run / "latent",
        model_cfg=tiny_model_config(),
        train_cfg=tiny_train_config(max_epochs=5, steps_per_epoch=20, minutes=1e-4),
    )
    return run, res


def test_capped_run_keeps_a_curve_of_ten_points(capped):
    """One epoch done of five; the curve has ten rows (every second step), epochs done 0.1 ... 1.0, each with a
    training and a validation NLL, and the file matches the returned rows."""
    run, res = capped
    assert res.stopped_early and len(res.history) == 1
    config = json.loads((run / "latent" / "ckpt-000000" / "config.json").read_text())
    assert config["stopped_by_time_cap"] is True
    assert config["metrics"]["calib/noise_scale"] > 0  # calibrated as the last epoch
    assert len(res.curve) == CURVE_POINTS_PER_EPOCH == 10
    assert [r["step"] for r in res.curve] == list(range(2, 21, 2))
    assert [r["epochs_done"] for r in res.curve] == pytest.approx([0.1 * i for i in range(1, 11)])
    with open(run / "latent" / "curve.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 10
    for row, mine in zip(rows, res.curve, strict=True):
        for key in ("loss/nll", "val/nll", "sched/lr"):
            assert float(row[key]) == pytest.approx(mine[key], rel=1e-12), key


def test_curve_points_average_to_the_epoch_value(latent_run):
    """Each point averages the training losses of the steps since the one before (here 10 steps per epoch: one
    step per point), so the mean of an epoch's points is the epoch's mean in metrics.csv."""
    assert len(latent_run.curve) == 2 * CURVE_POINTS_PER_EPOCH
    for epoch, row in enumerate(latent_run.history):
        points = [r for r in latent_run.curve if r["epoch"] == epoch]
        assert len(points) == CURVE_POINTS_PER_EPOCH
        for key in ("loss/nll", "loss/kl", "loss/total"):
            assert sum(p[key] for p in points) / len(points) == pytest.approx(row[key], rel=1e-9), key
        assert points[-1]["step"] == row["step"]


def test_figure_draws_the_fine_curve(capped):
    """The training figure draws the losses from curve.csv's ten points and the per-epoch best-of-6 error from
    metrics.csv's single row."""
    run, _ = capped
    rows = read_metrics_csv(run / "latent" / "metrics.csv") + read_metrics_csv(run / "latent" / "curve.csv")
    fig = training_figure({"latent": rows})
    lines = {ax.get_title(loc="left"): ax.get_lines() for ax in fig.axes if ax.get_visible()}
    nll = lines["Gaussian NLL of the future"]
    assert [len(line.get_xdata()) for line in nll] == [10, 10]  # training and validation
    assert list(nll[0].get_xdata()) == pytest.approx([0.1 * i for i in range(1, 11)])
    assert [len(line.get_xdata()) for line in lines["best-of-6 final displacement (validation)"]] == [1]


def test_report_says_at_the_top_that_the_cap_cut_training_short(capped, latent_run, tmp_path):
    """The capped model gets one sentence naming the cap, 1 of 5 epochs and 20 of 100 steps, before the first
    section of both reports; a model that ran all its epochs gets none."""
    run, _ = capped
    notes = training_cut_notes(run)
    assert len(notes) == 1
    assert "latent model" in notes[0] and "time cap" in notes[0]
    assert "1 of 5 planned epochs (20 of 100 optimiser steps)" in notes[0]
    _, md_path = build_report(run)
    md = md_path.read_text()
    assert md.index("1 of 5 planned epochs") < md.index("## Forward model")
    assert "## Scenario" not in md or md.index("1 of 5 planned epochs") < md.index("## Scenario")

    full = tmp_path / "full"
    shutil.copytree(latent_run.out_dir, full / "latent")
    assert json.loads((full / "latent" / "ckpt-000001" / "config.json").read_text())["stopped_by_time_cap"] is False
    assert training_cut_notes(full) == []
    assert "planned epochs" not in build_report(full)[1].read_text()
