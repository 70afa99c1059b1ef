"""A tiny end-to-end training run, the checkpoint round trip, reproducibility, and checkpoint errors.

Sources: the checkpoint layout and messages are this project's contract (``wmplan/model/checkpoint.py`` module
docstring); "weights in safetensors, never pickle" is the safetensors format's stated purpose (a JSON header and
raw buffers; its documentation [S], docs/references.md#lib-safetensors); one-line errors naming the file are
project rules. Determinism under a seed (docs/references.md#practice-determinism) and the sample shapes are the
documented API of ``train`` and ``WorldModel.sample``. The tiny runs (2 epochs x 10 steps of 64 windows) check the
machinery, not prediction quality.
"""

from __future__ import annotations

import csv
import json
import math
import pathlib
import pickle
import re
import shutil

import pytest
import torch

from tests.model.model_helpers import tiny_model_config, tiny_train_config
from wmplan.data.windows import Windows, WindowSpec, anchor_index
from wmplan.errors import CheckpointError, ConfigError
from wmplan.model.checkpoint import FORMAT, SCHEMA_VERSION, load_model
from wmplan.model.train import to_torch, train
from wmplan.model.world_model import WorldModel

TIMING_KEYS = ("elapsed_s", "perf/samples_per_s")


def without_timing(history: list[dict]) -> list[dict]:
    """Epoch rows without the wall-clock entries (which differ between runs by nature)."""
    return [{k: v for k, v in row.items() if k not in TIMING_KEYS} for row in history]


def assert_same_weights(a: WorldModel, b: WorldModel) -> None:
    sa, sb = a.state_dict(), b.state_dict()
    assert sa.keys() == sb.keys()
    for k in sa:
        assert torch.equal(sa[k], sb[k]), k


def some_windows(dataset, model: WorldModel, num: int) -> dict[str, torch.Tensor]:
    cfg = model.cfg
    spec = WindowSpec(cfg.history, cfg.horizon, cfg.num_objects)
    idx = anchor_index(dataset, spec, stride=5)[:num]
    return to_torch(Windows(dataset, spec).batch(idx))


# --- end to end ------------------------------------------------------------------------------------------------------


def test_training_writes_checkpoints_and_metrics(latent_run):
    """After 2 epochs: ``latest`` names the newest checkpoint, one folder per epoch (the newest two kept), each
    with weights, optimiser state, training state and config; ``metrics.csv`` has one row per epoch with the
    logged losses; the returned history matches the CSV."""
    out = latent_run.out_dir
    assert (out / "latest").read_text().strip() == "ckpt-000001"
    assert sorted(p.name for p in out.glob("ckpt-*")) == ["ckpt-000000", "ckpt-000001"]
    for folder in out.glob("ckpt-*"):
        assert sorted(p.name for p in folder.iterdir()) == [
            "config.json",
            "model.safetensors",
            "optimizer.safetensors",
            "train_state.json",
        ]
    assert not list(out.glob(".ckpt-*"))  # no temporary folder left behind
    with open(out / "metrics.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [int(r["epoch"]) for r in rows] == [0, 1]
    for key in ("loss/nll", "loss/kl", "loss/total", "val/nll", "val/min_fde_k6_m", "sched/lr", "perf/samples_per_s"):
        assert key in rows[0], key
    assert len(latent_run.history) == 2
    assert float(rows[1]["loss/nll"]) == pytest.approx(latent_run.history[1]["loss/nll"], rel=1e-9)
    assert not latent_run.stopped_early
    cfg = json.loads((out / "ckpt-000001" / "config.json").read_text())
    assert (cfg["format"], cfg["schema_version"], cfg["kind"], cfg["epoch"]) == (FORMAT, SCHEMA_VERSION, "latent", 1)
    assert cfg["model"] == tiny_model_config().to_dict()
    assert cfg["num_parameters"] == latent_run.model.num_parameters() < 1_000_000


def test_load_model_round_trips_the_weights(latent_run):
    """``load_model`` returns a model whose state dict (parameters and buffers, the fitted noise scale included)
    equals the trained one exactly, in eval mode, with the stored configs."""
    model, cfg = load_model(latent_run.out_dir)
    assert_same_weights(model, latent_run.model)
    assert not model.training
    assert model.cfg == latent_run.model.cfg and model.ego == latent_run.model.ego
    assert float(model.noise_scale) != 1.0  # calibrated after the last epoch and stored with the weights
    assert cfg["metrics"]["epoch"] == 1


def test_sample_shapes_and_generator(latent_run, dataset):
    """``sample`` with B windows, C plans and K samples gives rows (B, C, K, H, N, F) and residual mean / logvar
    (B, C, K, N, H, 2); the same generator seed gives the same futures, another seed other futures."""
    model, _ = load_model(latent_run.out_dir)
    batch = some_windows(dataset, model, 3)
    b, c, k = 3, 2, 4
    g = torch.Generator().manual_seed(0)
    actions = batch["actions"][:, None].repeat(1, c, 1, 1) + torch.randn(b, c, model.cfg.horizon, 2, generator=g) * 0.1
    out = model.sample(batch, actions, k, generator=torch.Generator().manual_seed(1))
    n, hz = model.cfg.num_rows, model.cfg.horizon
    assert out["rows"].shape == (b, c, k, hz, n, 8)
    assert out["mean"].shape == out["logvar"].shape == (b, c, k, n, hz, 2)
    assert bool(torch.isfinite(out["rows"]).all())
    again = model.sample(batch, actions, k, generator=torch.Generator().manual_seed(1))
    assert torch.equal(out["rows"], again["rows"])
    other = model.sample(batch, actions, k, generator=torch.Generator().manual_seed(2))
    assert not torch.equal(out["rows"], other["rows"])


@pytest.mark.slow
def test_same_seed_same_result_other_seed_other_weights(latent_run, dataset_dir, tmp_path):
    """Training twice with seed 0 gives identical weights and per-epoch history (timings aside); seed 1 gives
    other weights."""
    again = train(dataset_dir, tmp_path / "again", model_cfg=tiny_model_config(), train_cfg=tiny_train_config())
    assert_same_weights(again.model, latent_run.model)
    assert without_timing(again.history) == without_timing(latent_run.history)
    other = train(dataset_dir, tmp_path / "other", model_cfg=tiny_model_config(), train_cfg=tiny_train_config(seed=1))
    diff = [k for k, v in other.model.state_dict().items() if not torch.equal(v, latent_run.model.state_dict()[k])]
    assert len(diff) > 0.5 * len(other.model.state_dict())


def test_deterministic_model_round_trip(deterministic_run):
    """The least-squares baseline is stored as kind "deterministic" with its fitted residual variance, and loads
    back equal; its K samples are all the same future."""
    model, cfg = load_model(deterministic_run.out_dir)
    assert cfg["kind"] == "deterministic" and model.zdim == 0
    assert_same_weights(model, deterministic_run.model)
    assert float(model.fitted_logvar.abs().sum()) > 0.0
    assert "loss/mse" in deterministic_run.history[-1]


def test_train_into_a_model_folder_without_resume(latent_run, dataset_dir, tmp_path):
    """Training into a folder that already holds a model, without resume, is a one-line ConfigError naming the
    folder (nothing is overwritten)."""
    out = tmp_path / "m"
    shutil.copytree(latent_run.out_dir, out)
    before = (out / "latest").read_text()
    msg = f"{out}: already holds a model; pass --resume to continue it or choose another --out"
    with pytest.raises(ConfigError, match=re.escape(msg)) as err:
        train(dataset_dir, out, model_cfg=tiny_model_config(), train_cfg=tiny_train_config())
    assert "\n" not in str(err.value)
    assert (out / "latest").read_text() == before


# --- checkpoint errors -----------------------------------------------------------------------------------------------


@pytest.fixture
def model_copy(latent_run, tmp_path) -> pathlib.Path:
    """A copy of the trained model folder that a test may damage."""
    out = tmp_path / "model"
    shutil.copytree(latent_run.out_dir, out)
    return out


def load_error(path) -> str:
    with pytest.raises(CheckpointError) as err:
        load_model(path)
    msg = str(err.value)
    assert "\n" not in msg, msg
    return msg


def test_missing_folder(tmp_path):
    missing = tmp_path / "nowhere"
    with pytest.raises(CheckpointError, match=re.escape(f"{missing}: no such model folder")):
        load_model(missing)
    assert load_error(missing) == f"{missing}: no such model folder"


def test_no_latest(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    msg = f"{empty}: no 'latest' file; is this a folder written by `wmplan train`?"
    with pytest.raises(CheckpointError, match=re.escape(msg)):
        load_model(empty)
    assert load_error(empty) == msg


def test_latest_names_a_missing_folder(model_copy):
    shutil.rmtree(model_copy / "ckpt-000001")
    msg = f"{model_copy / 'latest'}: names 'ckpt-000001', which is not a checkpoint folder here"
    assert load_error(model_copy) == msg


def test_truncated_weights(model_copy):
    """Cutting model.safetensors in half is caught by its sha256 in config.json."""
    path = model_copy / "ckpt-000001" / "model.safetensors"
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    msg = f"{path}: sha256 differs from config.json; the file is truncated or was changed"
    with pytest.raises(CheckpointError, match=re.escape(msg)):
        load_model(model_copy)
    assert load_error(model_copy) == msg


def _edit_config(folder: pathlib.Path, **changes) -> pathlib.Path:
    path = folder / "ckpt-000001" / "config.json"
    cfg = json.loads(path.read_text())
    cfg.update(changes)
    path.write_text(json.dumps(cfg))
    return path


def test_foreign_config(model_copy):
    """A config.json with another format tag is refused, naming the tag found."""
    path = _edit_config(model_copy, format="some-other-tool")
    msg = f"{path}: format: expected 'wmplan-model', got 'some-other-tool'; not a wmplan model checkpoint"
    assert load_error(model_copy) == msg


def test_config_not_json(model_copy):
    path = model_copy / "ckpt-000001" / "config.json"
    path.write_text("{not json")
    assert load_error(model_copy) == f"{path}: not valid JSON (JSONDecodeError); the checkpoint is corrupt"


def test_wrong_schema_version(model_copy):
    path = _edit_config(model_copy, schema_version=99)
    msg = f"{path}: schema_version: this wmplan reads 1, got 99"
    with pytest.raises(CheckpointError, match=re.escape(msg)):
        load_model(model_copy)
    assert load_error(model_copy) == msg


def test_weights_that_do_not_fit_the_stated_model(model_copy):
    """A config that states another model size than the stored weights is refused (no silent partial load)."""
    path = _edit_config(model_copy, model=tiny_model_config(hidden=48).to_dict())
    msg = load_error(model_copy)
    assert msg.startswith(f"{path.parent / 'model.safetensors'}: weights do not fit the stated model (")


class TouchOnUnpickle:
    """Unpickling this object creates the marker file: ``__reduce__`` names ``pathlib.Path.touch`` (harmless)."""

    def __init__(self, marker: pathlib.Path):
        self.marker = marker

    def __reduce__(self):
        return (pathlib.Path.touch, (pathlib.Path(self.marker),))


def test_pickle_in_place_of_weights_is_never_unpickled(model_copy, tmp_path):
    """A pickle written as model.safetensors: refused by its sha256; and with config.json's sha256 fixed up to
    match it, refused as an unreadable safetensors file, without ever unpickling it: the marker file the pickle
    would create does not appear. Control: unpickling the same kind of payload does create its marker, so the
    check can fail."""
    control = tmp_path / "control-marker"
    pickle.loads(pickle.dumps(TouchOnUnpickle(control)))
    assert control.exists()

    marker = tmp_path / "marker"
    path = model_copy / "ckpt-000001" / "model.safetensors"
    payload = pickle.dumps({"decoder.0.weight": TouchOnUnpickle(marker)})
    path.write_bytes(payload)
    msg = f"{path}: sha256 differs from config.json; the file is truncated or was changed"
    assert load_error(model_copy) == msg

    import hashlib

    cfg_path = model_copy / "ckpt-000001" / "config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["sha256"]["model.safetensors"] = hashlib.sha256(payload).hexdigest()
    cfg_path.write_text(json.dumps(cfg))
    with pytest.raises(CheckpointError, match=re.escape(f"{path}: not a readable safetensors file (")):
        load_model(model_copy)
    assert "\n" not in load_error(model_copy)
    assert not marker.exists()
    # The same holds when the pickle is torch's own zip format (what torch.save writes).
    torch.save({"decoder.0.weight": TouchOnUnpickle(marker)}, path)
    cfg["sha256"]["model.safetensors"] = hashlib.sha256(path.read_bytes()).hexdigest()
    cfg_path.write_text(json.dumps(cfg))
    assert load_error(model_copy).startswith(f"{path}: not a readable safetensors file (")
    assert not marker.exists()


def test_the_minutes_cap_stops_after_the_epoch_that_crosses_it(dataset_dir, tmp_path):
    """A cap far below one epoch's time: training finishes that first epoch (its checkpoint and metrics written),
    stops before the other two and says it was stopped early; the learning rate logged is the schedule's value
    after one third of its epochs (cosine from the peak to 10% of it over all of them), not its end."""
    cfg = tiny_train_config(max_epochs=3, minutes=1e-4)
    run = train(dataset_dir, tmp_path / "capped", model_cfg=tiny_model_config(), train_cfg=cfg)
    assert run.stopped_early and len(run.history) == 1
    assert (tmp_path / "capped" / "latest").exists()
    peak = cfg.peak_lr(False)
    last_step = cfg.steps_per_epoch - 1  # the rate of the epoch's last step
    expected = peak * (0.1 + 0.9 * 0.5 * (1 + math.cos(math.pi * last_step / (3 * cfg.steps_per_epoch))))
    assert run.history[0]["sched/lr"] == pytest.approx(expected, rel=1e-12)


def test_peak_learning_rate_by_model_kind():
    """Without an explicit rate the latent model starts at 4e-3 and the least-squares one at 2e-3 (the settings
    measured best for each, see TrainConfig.lr); a given rate is used for both; a rate of 0 is refused."""
    from wmplan.model.config import TrainConfig

    assert TrainConfig().peak_lr(False) == 4e-3 and TrainConfig().peak_lr(True) == 2e-3
    assert TrainConfig(lr=1e-3).peak_lr(False) == TrainConfig(lr=1e-3).peak_lr(True) == 1e-3
    with pytest.raises(ConfigError, match="lr must be > 0"):
        TrainConfig(lr=0.0)
