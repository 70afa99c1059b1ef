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
import math
import os
import shutil
from dataclasses import asdict
from pathlib import Path
from typing import Annotated, Literal

import torch
from pydantic import BaseModel, ConfigDict, Field, ValidationError
from safetensors import SafetensorError, safe_open
from safetensors.torch import load_file, save_file

from wmplan.errors import CheckpointError, ConfigError, format_validation_error
from wmplan.io import atomic_write_text
from wmplan.model.config import ModelConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.world_model import WorldModel

FORMAT = "wmplan-model"
SCHEMA_VERSION = 1
KEEP_LAST = 2


def _sha256(path: Path) -> str:
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


# --- config.json, parsed by frozen models: types and ranges before anything is built from it ------------------------

Sha256 = Annotated[str, Field(pattern=r"^[0-9a-f]{64}$")]
PosFloat = Annotated[float, Field(gt=0.0, allow_inf_nan=False)]
MAX_JSON_BYTES = 64 * 2**20
"""Largest config.json or train_state.json read (a long run's history is well under 1 MB)."""


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, allow_inf_nan=False)


class ModelFields(_Frozen):
    """``config.json`` ``model``: the fields of :class:`ModelConfig`, each within what this wmplan builds."""

    history: int = Field(ge=1, le=64)
    horizon: int = Field(ge=1, le=200)
    num_objects: int = Field(ge=1, le=64)
    plan_dt_s: float = Field(gt=0.0, le=10.0)
    d_model: int = Field(ge=1, le=1024)
    num_heads: int = Field(ge=1, le=64)
    num_layers: int = Field(ge=1, le=16)
    hidden: int = Field(ge=1, le=2048)
    latent_dim: int = Field(ge=0, le=64)
    deterministic: bool


class EgoFields(_Frozen):
    """``config.json`` ``ego``: the fields of :class:`EgoKinematics` (SI units), within the scenario schema's ranges."""

    wheelbase_m: float = Field(gt=0.0, le=10.0)
    l_r_m: float = Field(gt=0.0, le=10.0)
    max_accel_mps2: float = Field(gt=0.0, le=10.0)
    max_brake_mps2: float = Field(gt=0.0, le=12.0)
    max_steer_rad: float = Field(gt=0.0, le=1.2)
    max_steer_rate_radps: float = Field(gt=0.0, le=5.0)
    sim_dt_s: float = Field(ge=0.01, le=0.5)
    substeps: int = Field(ge=1, le=1000)


class TrainFields(_Frozen):
    """``config.json`` ``train``: the fields of :class:`wmplan.model.config.TrainConfig` (absent ones default)."""

    minutes: PosFloat | None = None
    max_epochs: int | None = Field(None, ge=1, le=100_000)
    batch_size: int | None = Field(None, ge=1, le=65_536)
    lr: PosFloat | None = None
    weight_decay: float | None = Field(None, ge=0.0)
    grad_clip: PosFloat | None = None
    free_bits: float | None = Field(None, ge=0.0)
    prior_weight: float | None = Field(None, ge=0.0)
    nll_beta: float | None = Field(None, ge=0.0, le=1.0)
    kl_warmup_epochs: int | None = Field(None, ge=0)
    val_fraction: float | None = Field(None, gt=0.0, lt=0.9)
    anchor_stride: int | None = Field(None, ge=1, le=10_000)
    steps_per_epoch: int | None = Field(None, ge=1, le=10_000_000)
    seed: int | None = Field(None, ge=0, le=2**63 - 1)
    threads: int | None = Field(None, ge=1, le=1024)


class Sha256Fields(_Frozen):
    """The SHA-256 digests of a checkpoint's files, by file name."""

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, populate_by_name=True)

    model: Sha256 = Field(alias="model.safetensors")
    optimizer: Sha256 = Field(alias="optimizer.safetensors")
    train_state: Sha256 = Field(alias="train_state.json")


class CheckpointConfig(_Frozen):
    """``config.json`` of a checkpoint folder. Keys this wmplan does not read (metrics, window, ...) pass through."""

    model_config = ConfigDict(frozen=True, extra="allow", strict=True, allow_inf_nan=True)

    format: Literal["wmplan-model"]
    schema_version: Literal[1]
    kind: Literal["latent", "deterministic"]
    model: ModelFields
    ego: EgoFields
    epoch: int = Field(ge=0, le=10_000_000)
    sha256: Sha256Fields
    train: TrainFields | None = None
    dataset: dict | None = None


class TrainState(_Frozen):
    """``train_state.json``: where a training run stopped (read for --resume)."""

    model_config = ConfigDict(frozen=True, extra="allow", strict=True, allow_inf_nan=False)

    epoch: int = Field(ge=0, le=10_000_000)
    step: int = Field(ge=0)
    elapsed_s: float = Field(ge=0.0)
    data_rng: dict
    noise_gen: list[Annotated[int, Field(ge=0, le=255)]] = Field(max_length=100_000)
    optimizer: dict
    history: list[dict]


def save_checkpoint(
    out_dir: Path,
    model: WorldModel,
    *,
    epoch: int,
    meta: dict,
    optimizer_state: dict[str, torch.Tensor],
    train_state: dict,
) -> Path:
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


def _read_json(path: Path) -> object:
    """Parse a JSON file of at most :data:`MAX_JSON_BYTES` bytes; one-line CheckpointError otherwise."""
    if not path.is_file():
        raise CheckpointError(f"{path}: missing")
    if path.stat().st_size > MAX_JSON_BYTES:
        raise CheckpointError(f"{path}: larger than {MAX_JSON_BYTES} bytes; not a file written by `wmplan train`")
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError, ValueError) as err:
        raise CheckpointError(f"{path}: not valid JSON ({err.__class__.__name__}); the checkpoint is corrupt") from None


def read_config(folder: Path) -> dict:
    """``config.json`` of a checkpoint folder, checked by :class:`CheckpointConfig` (types and ranges of every field
    this wmplan reads, and that the model configuration is one it can build); returned as the plain dict."""
    path = folder / "config.json"
    cfg = _read_json(path)
    if not isinstance(cfg, dict) or cfg.get("format") != FORMAT:
        got = cfg.get("format") if isinstance(cfg, dict) else type(cfg).__name__
        raise CheckpointError(f"{path}: format: expected {FORMAT!r}, got {got!r}; not a wmplan model checkpoint")
    if cfg.get("schema_version") != SCHEMA_VERSION:
        raise CheckpointError(
            f"{path}: schema_version: this wmplan reads {SCHEMA_VERSION}, got {cfg.get('schema_version')!r}"
        )
    try:
        parsed = CheckpointConfig.model_validate(cfg)
    except ValidationError as err:
        raise CheckpointError(format_validation_error(str(path), err)) from None
    try:
        mcfg = ModelConfig(**parsed.model.model_dump())
    except ConfigError as err:
        raise CheckpointError(f"{path}: model: {err}") from None
    if (parsed.kind == "deterministic") != mcfg.deterministic:
        raise CheckpointError(
            f"{path}: kind: {parsed.kind!r} disagrees with model.deterministic = {mcfg.deterministic}"
        )
    return cfg


def _expected_state(cfg: dict) -> dict[str, tuple[tuple[int, ...], torch.dtype]]:
    """Names, shapes and dtypes of the state dict of the model ``cfg`` states, found without allocating it."""
    with torch.device("meta"):
        model = WorldModel(ModelConfig(**cfg["model"]), EgoKinematics(**cfg["ego"]))
    return {k: (tuple(v.shape), v.dtype) for k, v in model.state_dict().items()}


_DTYPE_BYTES = {"F64": 8, "F32": 4, "F16": 2, "BF16": 2, "I64": 8, "I32": 4, "I16": 2, "I8": 1, "U8": 1, "BOOL": 1}


def _header(path: Path) -> dict[str, tuple[tuple[int, ...], str]]:
    """Names, shapes and dtypes of a safetensors file, read from its header alone."""
    try:
        with safe_open(str(path), framework="pt") as fh:
            return {k: (tuple(fh.get_slice(k).get_shape()), fh.get_slice(k).get_dtype()) for k in fh.keys()}  # noqa: SIM118
    except (SafetensorError, OSError, ValueError) as err:
        raise CheckpointError(f"{path}: not a readable safetensors file ({str(err).splitlines()[0][:80]})") from None


def _load_tensors(
    path: Path, expected_sha: str | None, *, max_bytes: int | None = None, check=None
) -> dict[str, torch.Tensor]:
    """Read a safetensors file: its size bounded (``max_bytes``) before hashing, its sha256 compared, its header
    passed to ``check`` (names, shapes) before any tensor is allocated, and every float tensor checked finite."""
    if not path.is_file():
        raise CheckpointError(f"{path}: missing")
    if max_bytes is not None and path.stat().st_size > max_bytes:
        raise CheckpointError(
            f"{path}: {path.stat().st_size} bytes, more than the stated model's tensors can take "
            f"({max_bytes}); the file does not belong to this config.json"
        )
    if expected_sha is not None and _sha256(path) != expected_sha:
        raise CheckpointError(f"{path}: sha256 differs from config.json; the file is truncated or was changed")
    header = _header(path)
    if check is not None:
        check(header)
    try:
        tensors = load_file(str(path))  # safetensors: a JSON header and raw buffers, never pickle
    except (SafetensorError, OSError, ValueError) as err:
        raise CheckpointError(f"{path}: not a readable safetensors file ({str(err).splitlines()[0][:80]})") from None
    for name, t in tensors.items():
        if t.is_floating_point() and not bool(torch.isfinite(t).all()):
            raise CheckpointError(f"{path}: {name}: holds NaN or inf values; the checkpoint is unusable")
    return tensors


def _state_bytes(expected: dict[str, tuple[tuple[int, ...], torch.dtype]]) -> int:
    return sum(math.prod(shape) * torch.empty((), dtype=dt).element_size() for shape, dt in expected.values())


def load_weights(folder: Path, cfg: dict) -> dict[str, torch.Tensor]:
    """The checked weights of a checkpoint folder whose ``config.json`` (already read by :func:`read_config`) is
    ``cfg``: names and shapes must be those of the model it states, before anything is allocated."""
    path = folder / "model.safetensors"
    expected = _expected_state(cfg)

    def check(header: dict[str, tuple[tuple[int, ...], str]]) -> None:
        missing = sorted(set(expected) - set(header))
        extra = sorted(set(header) - set(expected))
        wrong = [k for k in expected if k in header and header[k][0] != expected[k][0]]
        if missing or extra or wrong:
            what = (
                f"missing {missing[0]}"
                if missing
                else f"unexpected {extra[0]}"
                if extra
                else f"{wrong[0]}: shape {list(header[wrong[0]][0])}, the model needs {list(expected[wrong[0]][0])}"
            )
            raise CheckpointError(f"{path}: weights do not fit the stated model ({what})")

    return _load_tensors(
        path, cfg["sha256"]["model.safetensors"], max_bytes=2 * _state_bytes(expected) + 2**20, check=check
    )


def load_model(model_dir: Path | str) -> tuple[WorldModel, dict]:
    """Load the newest checkpoint of a model folder: (model in eval mode, its config.json as a dict).

    Raises:
        CheckpointError: one line naming the file and field: a config of the wrong type or out of range, weights
            whose names or shapes differ from the model the config states (checked from the file's header, before
            any allocation), a changed or truncated file (sha256), or weights holding NaN or inf.
    """
    folder = checkpoint_folder(model_dir)
    cfg = read_config(folder)
    state = load_weights(folder, cfg)
    model = WorldModel(ModelConfig(**cfg["model"]), EgoKinematics(**cfg["ego"]))
    try:
        model.load_state_dict(state, strict=True)
    except RuntimeError as err:
        first = str(err).splitlines()[0][:120]
        raise CheckpointError(
            f"{folder / 'model.safetensors'}: weights do not fit the stated model ({first})"
        ) from None
    model.eval()
    return model, cfg


def load_training_state(model_dir: Path | str) -> tuple[dict, dict[str, torch.Tensor], dict]:
    """(config.json, optimiser tensors, train_state.json) of the newest checkpoint, for --resume.

    The optimiser tensors must each be a scalar or the shape of the parameter they belong to (checked from the
    header before loading).
    """
    folder = checkpoint_folder(model_dir)
    cfg = read_config(folder)
    expected = _expected_state(cfg)
    with torch.device("meta"):
        params = [
            tuple(p.shape) for p in WorldModel(ModelConfig(**cfg["model"]), EgoKinematics(**cfg["ego"])).parameters()
        ]
    opt_path = folder / "optimizer.safetensors"

    def check(header: dict[str, tuple[tuple[int, ...], str]]) -> None:
        for name, (shape, _) in header.items():
            pid, _, _key = name.partition(".")
            if not pid.isdigit() or int(pid) >= len(params) or shape not in ((), params[int(pid)]):
                raise CheckpointError(
                    f"{opt_path}: {name}: shape {list(shape)} does not fit the stated model's parameters"
                )

    opt = _load_tensors(
        opt_path, cfg["sha256"]["optimizer.safetensors"], max_bytes=3 * _state_bytes(expected) + 2**20, check=check
    )
    ts_path = folder / "train_state.json"
    if (
        not ts_path.is_file()
        or ts_path.stat().st_size > MAX_JSON_BYTES
        or _sha256(ts_path) != cfg["sha256"]["train_state.json"]
    ):
        raise CheckpointError(f"{ts_path}: missing or changed since the checkpoint was written")
    state = _read_json(ts_path)
    try:
        TrainState.model_validate(state)
    except ValidationError as err:
        raise CheckpointError(format_validation_error(str(ts_path), err)) from None
    return cfg, opt, state


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
