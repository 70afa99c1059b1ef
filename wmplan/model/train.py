"""Training the forward model: a plain loop that reads top to bottom.

Logged scalars (the per-epoch rows of ``metrics.csv`` and the returned history):

| key              | meaning                                                                  |
|------------------|--------------------------------------------------------------------------|
| loss/nll         | Gaussian negative log-likelihood of the future residuals, per object     |
| loss/kl          | KL(posterior || prior) summed over latent dimensions, per object         |
| loss/total       | nll + kl_weight x (KL with free bits)                                    |
| loss/mse         | deterministic model: mean squared residual per coordinate and step (m^2) |
| val/nll, val/mse | the same on held-out episodes                                            |
| val/min_fde_k6_m | best-of-6 final displacement error at the horizon on held-out windows    |
| sched/lr, sched/kl_weight | learning rate and KL weight of the epoch (the latter latent only)  |
| perf/samples_per_s | training windows per second                                            |

Besides, ``curve.csv`` holds the finer training curve: a row every ``steps_per_epoch // 10`` steps and one at the end
of each epoch (:data:`CURVE_POINTS_PER_EPOCH`, ten when 10 divides the steps per epoch), each with
``step``, ``epoch`` (the epoch it falls in, from 0), ``epochs_done`` (steps done / steps per epoch), ``elapsed_s``,
the training losses averaged over the steps since the previous row, ``sched/lr``, ``sched/kl_weight`` (latent
only) and the validation losses (``val/nll``, ``val/kl`` or ``val/mse``) on the first :data:`CURVE_VAL_WINDOWS`
held-out windows. A run the time cap stops after its first epoch therefore still draws a curve of ten points.
"""

from __future__ import annotations

import csv
import io
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from wmplan.data import load_dataset
from wmplan.data.windows import Windows, WindowSpec, anchor_index
from wmplan.errors import CheckpointError, ConfigError
from wmplan.io import atomic_write_text
from wmplan.model.checkpoint import (
    load_training_state,
    optimizer_from_tensors,
    optimizer_to_tensors,
    save_checkpoint,
)
from wmplan.model.config import ModelConfig, TrainConfig
from wmplan.model.ego import EgoKinematics
from wmplan.model.world_model import WorldModel
from wmplan.scenario import scenario_hash
from wmplan.sim.features import ACTION_DIM, F_VALID, F_X, F_Y, NUM_ROAD_FEATURES, NUM_VEHICLE_FEATURES

VAL_WINDOWS = 2048
CURVE_POINTS_PER_EPOCH = 10
"""Rows of ``curve.csv`` per epoch when it divides the steps per epoch (module docstring)."""
CURVE_VAL_WINDOWS = 256
"""Held-out windows behind the validation values of ``curve.csv`` (a fixed subset: a forward pass on them costs
about as much as one training step of 256 windows without the backward pass)."""
CALIBRATION_CHUNK = 64
"""Windows per piece when the noise-scale calibration measures coverage."""
CACHE_LIMIT_BYTES = 2 * 1024**3
"""Training windows are built once and kept in memory when they take at most this much (else built per batch)."""


@dataclass
class TrainResult:
    """What :func:`train` returns: the trained model, one dict of metrics per epoch, the output folder and whether the
    time cap stopped it."""

    model: WorldModel
    history: list[dict]
    out_dir: Path
    stopped_early: bool
    curve: list[dict] = field(default_factory=list)
    """The rows of ``curve.csv`` (module docstring)."""


def to_torch(batch) -> dict[str, torch.Tensor]:
    """A numpy :class:`WindowBatch` as a dict of tensors."""
    return {
        k: torch.from_numpy(np.ascontiguousarray(getattr(batch, k))) for k in batch.__dataclass_fields__ if k != "slots"
    }


class WindowCache:
    """Every window of ``index`` built once, as tensors; ``batch(positions)`` gathers rows of it.

    Each window is computed from its own episode rows alone (:meth:`Windows.batch` is row by row), so a gathered
    batch holds the very numbers ``to_torch(windows.batch(index[positions]))`` gives; building them once saves the
    per-step framing (about a sixth of a training step's time on onramp-merge, measured).
    """

    def __init__(self, windows: Windows, index: np.ndarray, chunk: int = 512):
        parts = [to_torch(windows.batch(index[i : i + chunk])) for i in range(0, len(index), chunk)]
        self.tensors = {k: torch.cat([p[k] for p in parts]) for k in parts[0]}

    @staticmethod
    def nbytes(spec: WindowSpec, count: int) -> int:
        """Memory the cache of ``count`` windows would take (float32: rows over history and future, road context,
        actions, speed and steering angle)."""
        per_window = (
            (spec.history + spec.horizon) * (spec.num_objects + 1) * NUM_VEHICLE_FEATURES
            + NUM_ROAD_FEATURES
            + spec.horizon * ACTION_DIM
            + 2
        )
        return 4 * per_window * count

    def batch(self, positions: np.ndarray) -> dict[str, torch.Tensor]:
        """Tensors of the windows at ``positions`` (N,) (a training batch)."""
        pos = torch.from_numpy(np.asarray(positions, dtype=np.int64))
        return {k: v.index_select(0, pos) for k, v in self.tensors.items()}


def dataset_hashes(ds) -> list[str]:
    """Content hashes of a dataset's scenarios, in their stored order."""
    return [scenario_hash(scn) for scn in ds.scenarios]


def dataset_ego(ds, plan_dt_s: float, data_dir: Path | str) -> EgoKinematics:
    """The ego every scenario of a dataset shares (the model propagates one ego).

    Raises:
        ConfigError: two scenarios differ in the ego's vehicle or limits, naming both.
    """
    egos = [EgoKinematics.from_scenario(scn, plan_dt_s) for scn in ds.scenarios]
    for scn, ego in zip(ds.scenarios[1:], egos[1:], strict=True):
        if ego != egos[0]:
            diff = [f for f in ego.__dataclass_fields__ if getattr(ego, f) != getattr(egos[0], f)]
            raise ConfigError(
                f"{data_dir}: scenarios {ds.scenarios[0].name!r} and {scn.name!r} differ in the ego's "
                f"{', '.join(diff)}; one model propagates one ego, so train one model per ego"
            )
    return egos[0]


def split_episodes(num_episodes: int, val_fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Train / validation episodes, split by episode with a seeded permutation."""
    perm = np.random.default_rng(np.random.SeedSequence([seed, 0x5B1])).permutation(num_episodes)
    n_val = max(1, int(round(val_fraction * num_episodes)))
    if num_episodes - n_val < 1:
        raise ConfigError(f"dataset has {num_episodes} episode(s); need at least 2 for a train/validation split")
    return np.sort(perm[n_val:]), np.sort(perm[:n_val])


def split_dataset(ds, val_fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Train / validation episodes of a dataset: :func:`split_episodes` within each scenario's episodes, so every
    scenario is held out in the same share (with one scenario, exactly :func:`split_episodes`)."""
    if len(ds.scenarios) == 1:
        return split_episodes(ds.traj.num_episodes, val_fraction, seed)
    parts = []
    for i, scn in enumerate(ds.scenarios):
        eps = ds.scenario_episodes(i)
        try:
            tr, va = split_episodes(len(eps), val_fraction, seed)
        except ConfigError:
            raise ConfigError(
                f"{ds.path}: scenario {scn.name} has {len(eps)} episode(s); need at least 2 for a "
                "train/validation split"
            ) from None
        parts.append((eps[tr], eps[va]))
    return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


def min_fde(model: WorldModel, batch: dict, k: int, generator: torch.Generator) -> float:
    """Best-of-k final displacement error in metres for each valid object at the last step, averaged."""
    out = model.sample(batch, batch["actions"][:, None], k, generator=generator)
    pred = out["rows"][:, 0, :, -1, :, :2]  # (B, K, N, 2)
    true = batch["future"][:, -1, :, :2]  # (B, N, 2)
    ok = (batch["future"][:, -1, :, F_VALID] > 0.5) & (batch["history"][:, -1, :, F_VALID] > 0.5)
    ok[:, 0] = False
    err = (pred - true[:, None]).norm(dim=-1).min(dim=1).values  # (B, N)
    return float((err * ok).sum() / ok.sum().clamp_min(1))


def fit_residual_variance(model: WorldModel, windows: Windows, index: np.ndarray, batch_size: int) -> None:
    """Set the deterministic model's predictive variance to its residual variance per step and coordinate."""
    total = torch.zeros(model.cfg.horizon, 2)
    count = torch.zeros(model.cfg.horizon, 1)
    for i in range(0, len(index), batch_size):
        r, m = model.residuals(to_torch(windows.batch(index[i : i + batch_size])))
        total += (r**2 * m[..., None]).sum((0, 1))
        count += m.sum((0, 1))[:, None]
    model.fitted_logvar.copy_(torch.log(total / count.clamp_min(1.0) + 1e-4))


def calibrate_noise_scale(
    model: WorldModel, batch: dict, *, target: float = 0.90, samples: int = 64, seed: int = 0
) -> float:
    """Set the decoder-noise scale so that central ``target`` intervals of the predictive cover ``target`` of the
    true future coordinates of ``batch`` (bisection on a log scale; coverage grows with the scale)."""
    true = batch["future"][..., :2]
    valid = (batch["future"][..., F_VALID] > 0.5) & (batch["history"][:, -1:, :, F_VALID] > 0.5)
    valid[..., 0] = False
    q = (1.0 - target) / 2.0

    model.noise_scale.fill_(1.0)
    out = model.sample(batch, batch["actions"][:, None], samples, generator=torch.Generator().manual_seed(seed))
    centre = out["rows"][:, 0, ..., :2]  # (B, K, H, N, 2): decoder means per draw of z
    sd = (0.5 * out["logvar"][:, 0]).exp().permute(0, 1, 3, 2, 4)  # (B, K, H, N, 2)
    eps = torch.randn(centre.shape, generator=torch.Generator().manual_seed(seed + 1))
    ego_mask = torch.ones_like(centre)
    ego_mask[..., 0, :] = 0.0  # the ego's own path is exact

    levels = torch.tensor([q, 1.0 - q], dtype=centre.dtype)

    def coverage(scale: float) -> float:
        # a few windows at a time: the samples of all of them are 70 MB per array at 1024 windows, and each
        # bisection step would otherwise take every temporary from fresh pages (see wmplan/_alloc.py)
        inside = total = 0
        for s in range(0, true.shape[0], CALIBRATION_CHUNK):
            c = slice(s, s + CALIBRATION_CHUNK)
            xs = centre[c] + scale * sd[c] * eps[c] * ego_mask[c]
            lo, hi = torch.quantile(xs, levels, dim=1)  # one sort for both ends
            hit = ((true[c] >= lo) & (true[c] <= hi))[valid[c]]
            inside += int(hit.sum())
            total += hit.numel()
        return inside / max(total, 1)

    lo_s, hi_s = 0.05, 4.0
    for _ in range(12):
        mid = math.sqrt(lo_s * hi_s)
        if coverage(mid) < target:
            lo_s = mid
        else:
            hi_s = mid
    scale = math.sqrt(lo_s * hi_s)
    model.noise_scale.fill_(scale)
    return scale


def train(
    data_dir: Path | str,
    out_dir: Path | str,
    *,
    model_cfg: ModelConfig = ModelConfig(),
    train_cfg: TrainConfig = TrainConfig(),
    resume: bool = False,
    progress: Callable[[int, dict], None] | None = None,
) -> TrainResult:
    """Train a forward model on a dataset folder and write checkpoints to ``out_dir``.

    Args:
        data_dir: a folder written by ``wmplan simulate``.
        out_dir: the model folder; checkpoints after every epoch.
        model_cfg, train_cfg: configurations (ignored in favour of the stored ones when resuming).
        resume: continue from the newest checkpoint in ``out_dir``.
        progress: called after every optimiser step with (steps done in this call, running metrics).

    Returns:
        The trained model, the per-epoch history and whether the time budget stopped it before max_epochs.
    """
    out_dir = Path(out_dir)
    ds = load_dataset(data_dir)
    state = None
    if resume:
        ckpt_cfg, opt_tensors, state = load_training_state(out_dir)
        model_cfg = ModelConfig.from_dict(ckpt_cfg["model"])
        # checkpoints written before beta-NLL trained with the plain NLL: resume them so
        train_cfg = TrainConfig(**{"nll_beta": 0.0, **ckpt_cfg["train"]})
        stored = ckpt_cfg.get("dataset", {})
        if (
            stored.get("scenario_hashes", [stored.get("scenario_hash")]) != dataset_hashes(ds)
            or stored.get("array_sha256", ds.manifest["array_sha256"]) != ds.manifest["array_sha256"]
        ):
            raise CheckpointError(
                f"{out_dir}: was trained on another dataset (scenario or data differ); cannot resume on {data_dir}"
            )
    elif (out_dir / "latest").exists():
        raise ConfigError(f"{out_dir}: already holds a model; pass --resume to continue it or choose another --out")
    torch.set_num_threads(train_cfg.threads)
    if abs(ds.decision_dt_s - model_cfg.plan_dt_s) > 1e-9:
        raise ConfigError(
            f"model plan_dt_s {model_cfg.plan_dt_s} differs from the dataset's decision step {ds.decision_dt_s}"
        )
    spec = WindowSpec(model_cfg.history, model_cfg.horizon, model_cfg.num_objects)
    windows = Windows(ds, spec)
    tr_eps, va_eps = split_dataset(ds, train_cfg.val_fraction, train_cfg.seed)
    tr_idx = anchor_index(ds, spec, tr_eps, train_cfg.anchor_stride)
    va_idx = anchor_index(ds, spec, va_eps, 1)
    if len(tr_idx) == 0 or len(va_idx) == 0:
        raise ConfigError(f"{data_dir}: no usable training windows; simulate more or longer episodes")
    va_idx = va_idx[np.random.default_rng(train_cfg.seed).permutation(len(va_idx))[:VAL_WINDOWS]]
    val_batch = to_torch(windows.batch(va_idx))
    cache = WindowCache(windows, tr_idx) if WindowCache.nbytes(spec, len(tr_idx)) <= CACHE_LIMIT_BYTES else None

    ss = np.random.SeedSequence(train_cfg.seed)
    init_ss, data_ss, noise_ss, eval_ss = ss.spawn(4)
    gen_init = torch.Generator().manual_seed(int(init_ss.generate_state(1)[0]))
    ego = dataset_ego(ds, model_cfg.plan_dt_s, data_dir)
    model = WorldModel(model_cfg, ego, generator=gen_init)
    peak_lr = train_cfg.peak_lr(model_cfg.deterministic)
    opt = torch.optim.Adam(model.parameters(), lr=peak_lr, weight_decay=train_cfg.weight_decay)
    data_rng = np.random.default_rng(data_ss)
    gen_noise = torch.Generator().manual_seed(int(noise_ss.generate_state(1)[0]))
    history: list[dict] = []
    curve: list[dict] = []
    start_epoch, step, elapsed_before = 0, 0, 0.0
    if state is not None:
        from wmplan.model.checkpoint import checkpoint_folder, load_weights

        model.load_state_dict(load_weights(checkpoint_folder(out_dir), ckpt_cfg))
        optimizer_from_tensors(opt, opt_tensors, state["optimizer"])
        data_rng.bit_generator.state = state["data_rng"]
        gen_noise.set_state(torch.tensor(state["noise_gen"], dtype=torch.uint8))
        start_epoch, step, elapsed_before = state["epoch"] + 1, state["step"], state["elapsed_s"]
        history = state["history"]
        curve = [r for r in state.get("curve", []) if r.get("step", 0) <= step]

    meta = {
        "train": train_cfg.to_dict(),
        "dataset": {
            "path": str(Path(data_dir).resolve()),
            "scenario_name": ", ".join(scn.name for scn in ds.scenarios),
            "scenario_hash": dataset_hashes(ds)[0],
            "scenario_hashes": dataset_hashes(ds),
            "scenarios": [
                {"name": scn.name, "hash": h, "num_episodes": int(len(ds.scenario_episodes(i)))}
                for i, (scn, h) in enumerate(zip(ds.scenarios, dataset_hashes(ds), strict=True))
            ],
            "array_sha256": ds.manifest["array_sha256"],
            "num_episodes": ds.traj.num_episodes,
        },
        "num_parameters": model.num_parameters(),
        "window": {"history": spec.history, "horizon": spec.horizon, "num_objects": spec.num_objects},
    }
    total_steps = train_cfg.max_epochs * train_cfg.steps_per_epoch
    curve_every = max(1, train_cfg.steps_per_epoch // CURVE_POINTS_PER_EPOCH)
    curve_val = {k: v[:CURVE_VAL_WINDOWS] for k, v in val_batch.items()}
    t_start = time.perf_counter() - elapsed_before
    stopped_early = False
    for epoch in range(start_epoch, train_cfg.max_epochs):
        # --- train one epoch ---
        model.train()
        kl_weight = min(1.0, (epoch + 1) / max(1, train_cfg.kl_warmup_epochs))
        sums: dict[str, float] = {}
        part: dict[str, float] = {}  # sums since the last row of the fine curve
        part_steps = 0
        t_epoch = time.perf_counter()
        for _ in range(train_cfg.steps_per_epoch):
            lr = peak_lr * (0.1 + 0.9 * 0.5 * (1.0 + math.cos(math.pi * min(1.0, step / total_steps))))
            for g in opt.param_groups:
                g["lr"] = lr
            pos = data_rng.integers(0, len(tr_idx), train_cfg.batch_size)
            batch = cache.batch(pos) if cache is not None else to_torch(windows.batch(tr_idx[pos]))
            loss, metrics = model.loss(
                batch,
                kl_weight=kl_weight,
                free_bits=train_cfg.free_bits,
                nll_beta=train_cfg.nll_beta,
                prior_weight=train_cfg.prior_weight,
                generator=gen_noise,
            )
            opt.zero_grad(set_to_none=True)
            loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), train_cfg.grad_clip)
            opt.step()
            step += 1
            for k, v in metrics.items():
                sums[k] = sums.get(k, 0.0) + v
                part[k] = part.get(k, 0.0) + v
            part_steps += 1
            if part_steps == curve_every or step == (epoch + 1) * train_cfg.steps_per_epoch:
                curve.append(
                    _curve_row(model, curve_val, epoch, step, train_cfg.steps_per_epoch, part, part_steps, lr, t_start)
                )
                if model.zdim:
                    curve[-1]["sched/kl_weight"] = kl_weight
                part, part_steps = {}, 0
            if progress is not None:
                progress(1, {k: v / max(1, step - epoch * train_cfg.steps_per_epoch) for k, v in sums.items()})
        secs = time.perf_counter() - t_epoch
        if not all(bool(torch.isfinite(p).all()) for p in model.parameters()):
            raise ConfigError(
                f"{out_dir}: training diverged in epoch {epoch} (NaN or inf weights); nothing of this "
                "epoch was saved: the last complete checkpoint stays; try a smaller learning rate"
            )
        row = {"epoch": epoch, "step": step, "elapsed_s": round(time.perf_counter() - t_start, 2)}
        row.update({k: v / train_cfg.steps_per_epoch for k, v in sums.items()})
        row["sched/lr"] = lr
        if model.zdim:  # the least-squares model has no KL term to weigh
            row["sched/kl_weight"] = kl_weight
        row["perf/samples_per_s"] = train_cfg.steps_per_epoch * train_cfg.batch_size / secs
        # --- validate ---
        model.eval()
        with torch.no_grad():
            _, vm = model.loss(val_batch, kl_weight=1.0, free_bits=0.0, generator=torch.Generator().manual_seed(1))
        row.update({k.replace("loss/", "val/"): v for k, v in vm.items()})
        row["val/min_fde_k6_m"] = min_fde(
            model, val_batch, 6, torch.Generator().manual_seed(int(eval_ss.generate_state(1)[0]))
        )
        history.append(row)
        # --- checkpoint ---
        opt_tensors, opt_desc = optimizer_to_tensors(opt)
        train_state = {
            "epoch": epoch,
            "step": step,
            "elapsed_s": time.perf_counter() - t_start,
            "data_rng": data_rng.bit_generator.state,
            "noise_gen": gen_noise.get_state().tolist(),
            "optimizer": opt_desc,
            "history": history,
            "curve": curve,
        }
        if model_cfg.deterministic:
            fit_residual_variance(model, windows, tr_idx[:: max(1, len(tr_idx) // 20000)], 1024)
        # one reading of the clock decides both: a run the cap stops is calibrated like one that ran all its epochs
        over_cap = time.perf_counter() - t_start > 60.0 * train_cfg.minutes
        capped = over_cap and epoch + 1 < train_cfg.max_epochs
        last_epoch = epoch + 1 >= train_cfg.max_epochs or over_cap
        if last_epoch and not model_cfg.deterministic:
            half = {k: v[: VAL_WINDOWS // 2] for k, v in val_batch.items()}
            row["calib/noise_scale"] = calibrate_noise_scale(model, half, seed=train_cfg.seed)
        save_checkpoint(
            out_dir,
            model,
            epoch=epoch,
            meta={**meta, "metrics": row, "stopped_by_time_cap": capped},
            optimizer_state=opt_tensors,
            train_state=train_state,
        )
        write_metrics_csv(out_dir / "metrics.csv", history)
        write_metrics_csv(out_dir / "curve.csv", curve)
        if capped:
            stopped_early = True
            break
    model.eval()
    return TrainResult(model=model, history=history, out_dir=out_dir, stopped_early=stopped_early, curve=curve)


def _curve_row(
    model: WorldModel,
    val: dict,
    epoch: int,
    step: int,
    steps_per_epoch: int,
    sums: dict[str, float],
    count: int,
    lr: float,
    t_start: float,
) -> dict:
    """One row of the fine curve: the training losses averaged over the last ``count`` steps and the validation
    losses on ``val`` (no gradient; a generator of its own, so training draws the same numbers with or without
    it)."""
    row = {
        "epoch": epoch,
        "step": step,
        "epochs_done": step / steps_per_epoch,
        "elapsed_s": round(time.perf_counter() - t_start, 2),
    }
    row.update({k: v / count for k, v in sums.items()})
    row["sched/lr"] = lr
    model.eval()
    with torch.no_grad():
        _, vm = model.loss(val, kl_weight=1.0, free_bits=0.0, generator=torch.Generator().manual_seed(1))
    model.train()
    row.update({k.replace("loss/", "val/"): v for k, v in vm.items()})
    return row


def write_metrics_csv(path: Path, history: list[dict]) -> None:
    """One row per entry of ``history`` (an epoch, or a point of the fine curve) as CSV (columns in order of first
    appearance), atomically."""
    keys: list[str] = []
    for row in history:
        keys += [k for k in row if k not in keys]
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=keys)
    w.writeheader()
    for row in history:
        w.writerow(row)
    atomic_write_text(path, buf.getvalue())


assert F_X == 0 and F_Y == 1
