"""Resuming an interrupted training run continues from the last checkpoint and ends where an uninterrupted run
ends.

Contract (issue "Latent-variable forward model", item 3; common practice, no source:
docs/references.md#practice-determinism): checkpoints every epoch, written atomically; an interrupted run
(Ctrl-C or kill) resumes with ``resume=True`` and loses at most one epoch; same seed, same result. Here an
uninterrupted 3-epoch run is the reference; the interrupted runs use the same configuration (the stored one is
used on resume) on one thread, so their final weights and per-epoch history (wall-clock entries aside) must be
identical to it, not merely close.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
import torch

from tests.model.model_helpers import tiny_model_config, tiny_train_config
from wmplan.data import simulate_dataset
from wmplan.errors import CheckpointError
from wmplan.model.checkpoint import load_model
from wmplan.model.train import train
from wmplan.scenario import load_scenario

STEPS_PER_EPOCH = 10
TIMING_KEYS = ("elapsed_s", "perf/samples_per_s")


def three_epochs():
    return tiny_train_config(max_epochs=3, steps_per_epoch=STEPS_PER_EPOCH)


def without_timing(history: list[dict]) -> list[dict]:
    return [{k: v for k, v in row.items() if k not in TIMING_KEYS} for row in history]


def assert_same_weights(a, b) -> None:
    sa, sb = a.state_dict(), b.state_dict()
    assert sa.keys() == sb.keys()
    for k in sa:
        assert torch.equal(sa[k], sb[k]), k


@pytest.fixture(scope="module")
def straight(dataset_dir, tmp_path_factory):
    """The reference: 3 epochs without interruption."""
    return train(
        dataset_dir,
        tmp_path_factory.mktemp("resume") / "straight",
        model_cfg=tiny_model_config(),
        train_cfg=three_epochs(),
    )


class Counter:
    """A progress callback that counts optimiser steps and raises KeyboardInterrupt (what Ctrl-C raises) once
    ``stop_after`` steps are done."""

    def __init__(self, stop_after: int | None = None):
        self.steps = 0
        self.stop_after = stop_after

    def __call__(self, steps: int, metrics: dict) -> None:
        self.steps += steps
        if self.stop_after is not None and self.steps >= self.stop_after:
            raise KeyboardInterrupt


def test_resume_after_ctrl_c_equals_the_uninterrupted_run(straight, dataset_dir, tmp_path):
    """Ctrl-C in the middle of epoch 3 leaves the checkpoint of epoch 2 as ``latest``; resuming runs only epoch 3
    (10 optimiser steps: the partial epoch is the only work lost) and ends with the uninterrupted run's weights
    and history."""
    out = tmp_path / "cut"
    with pytest.raises(KeyboardInterrupt):
        train(
            dataset_dir,
            out,
            model_cfg=tiny_model_config(),
            train_cfg=three_epochs(),
            progress=Counter(stop_after=2 * STEPS_PER_EPOCH + 4),
        )
    assert (out / "latest").read_text().strip() == "ckpt-000001"
    assert len((out / "metrics.csv").read_text().strip().splitlines()) == 1 + 2
    assert not list(out.glob(".ckpt-*"))  # the interrupted epoch never started writing

    counter = Counter()
    # Configurations passed on resume are ignored in favour of the stored ones: pass different ones to show it.
    resumed = train(
        dataset_dir,
        out,
        model_cfg=tiny_model_config(hidden=48),
        train_cfg=tiny_train_config(seed=5),
        resume=True,
        progress=counter,
    )
    assert counter.steps == STEPS_PER_EPOCH
    assert len(resumed.history) == 3
    assert without_timing(resumed.history) == without_timing(straight.history)
    assert without_timing(resumed.curve) == without_timing(straight.curve)  # the finer curve too
    assert_same_weights(resumed.model, straight.model)
    assert_same_weights(load_model(out)[0], straight.model)
    assert (out / "latest").read_text().strip() == "ckpt-000002"


def test_resume_on_another_dataset(straight, tmp_path):
    """Resuming on a dataset of another scenario is a one-line CheckpointError naming both folders."""
    other = tmp_path / "other-data"
    simulate_dataset(load_scenario("open-road"), other, episodes=2, seed=3)
    out = straight.out_dir
    msg = f"{out}: was trained on another dataset (scenario or data differ); cannot resume on {other}"
    with pytest.raises(CheckpointError, match=re.escape(msg)) as err:
        train(other, out, resume=True)
    assert "\n" not in str(err.value)


def test_resume_without_a_checkpoint(dataset_dir, tmp_path):
    """``resume`` on a folder with no model is a one-line CheckpointError (nothing to continue)."""
    empty = tmp_path / "none"
    with pytest.raises(CheckpointError, match=re.escape(f"{empty}: no such model folder")):
        train(dataset_dir, empty, resume=True)


KILL_SCRIPT = textwrap.dedent(
    """
    import json, os, signal, sys
    from pathlib import Path
    from tests.model.model_helpers import tiny_model_config, tiny_train_config
    from wmplan.model.train import train

    target, count = {target!r}, {count!r}
    seen = [0]
    real_replace = os.replace

    def replace_or_die(src, dst):
        if Path(dst).name == target:
            seen[0] += 1
            if seen[0] == count:
                os.kill(os.getpid(), signal.SIGKILL)  # dies here: the rename never happens
        return real_replace(src, dst)

    os.replace = replace_or_die
    train({data!r}, {out!r}, model_cfg=tiny_model_config(),
          train_cfg=tiny_train_config(max_epochs=3, steps_per_epoch={spe}))
    """
)


@pytest.mark.slow
@pytest.mark.parametrize(
    ("target", "count", "latest_after_kill"),
    [
        ("ckpt-000002", 1, "ckpt-000001"),  # killed with epoch 3's folder complete but not yet renamed into place
        ("latest", 3, "ckpt-000001"),  # killed after epoch 3's folder is in place, before `latest` points at it
    ],
)
def test_resume_after_sigkill_while_writing_a_checkpoint(
    straight, dataset_dir, tmp_path, target, count, latest_after_kill
):
    """A training process killed (SIGKILL, no chance to clean up) in the middle of writing the third checkpoint
    leaves the second one readable as ``latest``; resuming ends with the uninterrupted run's weights and
    history."""
    out = tmp_path / "killed"
    script = KILL_SCRIPT.format(target=target, count=count, data=str(dataset_dir), out=str(out), spe=STEPS_PER_EPOCH)
    repo = Path(__file__).resolve().parents[2]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(repo), os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=600, cwd=repo, env=env
    )
    assert proc.returncode == -9, proc.stderr[-2000:]
    assert (out / "latest").read_text().strip() == latest_after_kill
    model, cfg = load_model(out)  # the previous checkpoint is complete and verifies
    assert cfg["epoch"] == 1
    resumed = train(dataset_dir, out, resume=True)
    assert without_timing(resumed.history) == without_timing(straight.history)
    assert_same_weights(resumed.model, straight.model)
    assert json.loads((out / "ckpt-000002" / "config.json").read_text())["epoch"] == 2
