"""Model checkpoints: safetensors weights plus JSON, written atomically, loaded without unpickling anything.

Layout of a model folder::

    MODEL_DIR/latest               name of the newest complete checkpoint folder (written last, atomically)
    MODEL_DIR/ckpt-000007/         one folder per epoch; built under a temporary name, then renamed
        config.json                format tag, schema version, model/train/ego configs, epoch, metrics, sha256s
        model.safetensors          weights and buffers
        optimizer.safetensors      optimiser tensors (for --resume)
        train_state.json           epoch, step, random-generator states, elapsed time
    MODEL_DIR/metrics.csv          one row per epoch

A checkpoint folder appears only complete (rename of a finished folder), and ``latest`` changes only after it, so
an interrupted run always leaves the previous checkpoint readable.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import asdict
from pathlib import Path

import torch
from safetensors import SafetensorError
from safetensors.torch import load_file, save_file

from wmplan.errors import CheckpointError
from wmplan.io import atomic_write_text
from wmplan.model.config import ModelConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.world_model import WorldModel

FORMAT = "wmplan-model"
SCHEMA_VERSION = 1
KEEP_LAST = 2


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def save_checkpoint(out_dir: Path, model: WorldModel, *, epoch: int, meta: dict, optimizer_state: dict[str, torch.Tensor],
                    train_state: dict) -> Path:
    """Write checkpoint ``epoch`` into ``out_dir`` and point ``latest`` at it; prune older folders."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    name = f"ckpt-{epoch:06d}"
    final = out_dir / name
    tmp = out_dir / f".{name}.tmp-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    state = {k: v.detach().contiguous().clone() for k, v in model.state_dict().items()}
    save_file(state, str(tmp / "model.safetensors"))
    save_file({k: v.contiguous() for k, v in optimizer_state.items()}, str(tmp / "optimizer.safetensors"))
    (tmp / "train_state.json").write_text(json.dumps(train_state, indent=1))
    config = {
        "format": FORMAT,
        "schema_version": SCHEMA_VERSION,
        "kind": "deterministic" if model.cfg.deterministic else "latent",
        "model": model.cfg.to_dict(),
        "ego": asdict(model.ego),
        "epoch": epoch,
        **meta,
        "sha256": {f: _sha256(tmp / f) for f in ("model.safetensors", "optimizer.safetensors", "train_state.json")},
    }
    (tmp / "config.json").write_text(json.dumps(config, indent=2))
    for f in tmp.iterdir():  # make the files durable before the rename publishes them
        with open(f, "rb") as fh:
            os.fsync(fh.fileno())
    if final.exists():
        shutil.rmtree(final)
    os.replace(tmp, final)
    atomic_write_text(out_dir / "latest", name + "\n")
    folders = sorted(p for p in out_dir.glob("ckpt-*") if p.is_dir())
    for old in folders[:-KEEP_LAST]:
        shutil.rmtree(old, ignore_errors=True)
    return final


def checkpoint_folder(model_dir: Path | str) -> Path:
    """The newest complete checkpoint folder of a model folder (or the folder itself if it is one)."""
    model_dir = Path(model_dir)
    if not model_dir.exists():
        raise CheckpointError(f"{model_dir}: no such model folder")
    if (model_dir / "config.json").is_file():
        return model_dir
    latest = model_dir / "latest"
    if not latest.is_file():
        raise CheckpointError(f"{model_dir}: no 'latest' file; is this a folder written by `wmplan train`?")
    name = latest.read_text(encoding="utf-8", errors="replace").strip()
    folder = model_dir / name
    if not name.startswith("ckpt-") or not folder.is_dir():
        raise CheckpointError(f"{latest}: names {name!r}, which is not a checkpoint folder here")
    return folder


def read_config(folder: Path) -> dict:
    path = folder / "config.json"
    if not path.is_file():
        raise CheckpointError(f"{path}: missing")
    try:
        cfg = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise CheckpointError(f"{path}: not valid JSON ({err.__class__.__name__}); the checkpoint is corrupt") from None
    if not isinstance(cfg, dict) or cfg.get("format") != FORMAT:
        got = cfg.get("format") if isinstance(cfg, dict) else type(cfg).__name__
        raise CheckpointError(f"{path}: format: expected {FORMAT!r}, got {got!r}; not a wmplan model checkpoint")
    if cfg.get("schema_version") != SCHEMA_VERSION:
        raise CheckpointError(f"{path}: schema_version: this wmplan reads {SCHEMA_VERSION}, got {cfg.get('schema_version')!r}")
    for key in ("model", "ego", "sha256", "epoch"):
        if key not in cfg:
            raise CheckpointError(f"{path}: {key}: missing")
    return cfg


def _load_tensors(path: Path, expected_sha: str | None) -> dict[str, torch.Tensor]:
    if not path.is_file():
        raise CheckpointError(f"{path}: missing")
    if expected_sha is not None and _sha256(path) != expected_sha:
        raise CheckpointError(f"{path}: sha256 differs from config.json; the file is truncated or was changed")
    try:
        return load_file(str(path))  # safetensors: a JSON header and raw buffers, never pickle
    except (SafetensorError, OSError, ValueError) as err:
        raise CheckpointError(f"{path}: not a readable safetensors file ({str(err).splitlines()[0][:80]})") from None


def load_model(model_dir: Path | str) -> tuple[WorldModel, dict]:
    """Load the newest checkpoint of a model folder: (model in eval mode, its config.json as a dict)."""
    folder = checkpoint_folder(model_dir)
    cfg = read_config(folder)
    try:
        mcfg = ModelConfig.from_dict(cfg["model"])
        ego = EgoKinematics(**cfg["ego"])
    except (TypeError, ValueError) as err:
        raise CheckpointError(f"{folder / 'config.json'}: model/ego: {err}") from None
    state = _load_tensors(folder / "model.safetensors", cfg["sha256"].get("model.safetensors"))
    model = WorldModel(mcfg, ego)
    try:
        model.load_state_dict(state, strict=True)
    except RuntimeError as err:
        first = str(err).splitlines()[0][:120]
        raise CheckpointError(f"{folder / 'model.safetensors'}: weights do not fit the stated model ({first})") from None
    model.eval()
    return model, cfg


def load_training_state(model_dir: Path | str) -> tuple[dict, dict[str, torch.Tensor], dict]:
    """(config.json, optimiser tensors, train_state.json) of the newest checkpoint, for --resume."""
    folder = checkpoint_folder(model_dir)
    cfg = read_config(folder)
    opt = _load_tensors(folder / "optimizer.safetensors", cfg["sha256"].get("optimizer.safetensors"))
    ts_path = folder / "train_state.json"
    if not ts_path.is_file() or _sha256(ts_path) != cfg["sha256"].get("train_state.json"):
        raise CheckpointError(f"{ts_path}: missing or changed since the checkpoint was written")
    return cfg, opt, json.loads(ts_path.read_text())


def optimizer_to_tensors(opt: torch.optim.Optimizer) -> tuple[dict[str, torch.Tensor], dict]:
    """Flatten an optimiser's state into named tensors plus a JSON-able description (no pickle)."""
    sd = opt.state_dict()
    tensors: dict[str, torch.Tensor] = {}
    scalars: dict[str, dict] = {}
    for pid, st in sd["state"].items():
        for key, val in st.items():
            if torch.is_tensor(val):
                tensors[f"{pid}.{key}"] = val.detach().clone().reshape(val.shape)
            else:
                scalars.setdefault(str(pid), {})[key] = val
    return tensors, {"param_groups": sd["param_groups"], "scalars": scalars}


def optimizer_from_tensors(opt: torch.optim.Optimizer, tensors: dict[str, torch.Tensor], desc: dict) -> None:
    """Inverse of :func:`optimizer_to_tensors`."""
    state: dict[int, dict] = {}
    for name, val in tensors.items():
        pid, key = name.split(".", 1)
        state.setdefault(int(pid), {})[key] = val
    for pid, sc in desc.get("scalars", {}).items():
        state.setdefault(int(pid), {}).update(sc)
    opt.load_state_dict({"state": state, "param_groups": desc["param_groups"]})
