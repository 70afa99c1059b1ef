"""Forward-model throughput: training samples per second, rollout vehicle-steps per second at planner shapes, and
how close the rollout comes to the speed of its own matrix multiplies.

What is measured (a fresh default-size latent model, ``ModelConfig()``, weights drawn from a seeded generator; the
speed does not depend on training):

* ``training``: windows per second of the training step of ``wmplan.model.train`` (loss with the default
  ``TrainConfig`` weights, backward, gradient clipping, Adam) on batches of 256 windows cut from a small
  onramp-merge dataset simulated into a temporary folder. ``samples_per_s`` includes building the batch from the
  stored episodes (what ``train`` does every step); ``samples_per_s_model_only`` times the same steps on batches
  built beforehand. Several steps after a warm-up; the median step time.
* ``rollout``: ``WorldModel.sample`` at planner shapes, one scene (B = 1, a window of the dataset), C = 64 plans of
  H = 15 steps, K = 8 samples, N = 9 objects, in inference mode, called as the planner calls it (the rows alone,
  ``moments=False``: the decoder's last layer computes the means, not the variances the planner does not use):
  vehicle-steps = C x K x H x N per call; the median over repeats. ``s_per_call_median_with_moments`` times the
  call that also returns the residuals' means and log-variances (what the assessment uses).
  ``ego_kinematics_share`` is the time of ``model.ego.rollout`` over the same plans alone, divided by the
  rollout's time.
* ``rollout_efficiency`` = t_matmul / t_rollout: t_matmul is the time of a plain loop of ``torch.mm`` on random
  matrices with the shapes of every matrix multiply the rollout does (recorded at torch's dispatcher, every
  ``mm`` and ``addmm``, which is how each of its linear maps runs: the scene encoder's MLPs, attention
  projections and feed-forward layers on B x N rows; the plan encoder's first layer by parts, the plan's part on
  B x C rows and the objects' part on B x N rows, its second layer on B x C x N rows; the first layers of the prior
  and the decoder by parts, their history part on B x N rows, their plan part on B x C x N rows, the decoder's
  latent part on B x C x K x N rows; the rest of the prior on B x C x N rows, the rest of the decoder on
  B x C x K x N rows, in groups of about 8192 rows, with its last layer as two multiplies of H outputs, the x and
  the y steps), hence the same FLOPs, timed in the same process on the same threads. The FLOPs are counted
  twice: 2 x in x out x rows summed over those layers, and ``torch.utils.flop_counter.FlopCounterMode`` (its
  mm/addmm counts); both are reported and agree. The attention's own products (queries times keys, weights
  times values, batched products on B x heads x N x N) are in neither; at N = 9 objects they are 0.02 % of the
  FLOPs. Target: >= 0.5.
* ``rollout_closed_loop_batch``: the same measurement with 50 scenes in one call, the batch the closed-loop
  evaluation, sweeps and stress tests plan for at once (``rollout_efficiency_closed_loop_batch``). Its matmul loop
  multiplies the decoder's groups of rows as the rollout does (29 groups of 8192 rows at 50 scenes), which runs
  faster than one multiply of all 230400 rows: grouping the rollout sped up its baseline too.
* ``breakdown_s``: the rollout replayed piece by piece with the functions ``sample`` calls (median seconds per piece),
  to show where the time goes; ``breakdown_matches_sample`` says whether the replay reproduced ``sample``'s
  output exactly (if ``sample`` changes, the replay may no longer describe it).

Threads: torch's intra-op threads are set explicitly (``--threads``, default 1) and reported. Wall-clock numbers
depend on what else the machine is doing; the 1-minute load average at start and end is recorded, and the rollout
and matmul loop are also timed in process CPU time (``*_cpu``), which on one thread is less disturbed by other
programs.

Usage: ``python benchmarks/model_throughput.py [--quick] [--threads N] [--json FILE]``; ``wmplan bench`` calls
:func:`run`. Importing this module runs nothing.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from wmplan import benchkit

SCENARIO = "onramp-merge"
PLANNER_SHAPE = dict(scenes=1, candidates=64, samples=8)
CLOSED_LOOP_SCENES = 50  # wmplan.evaluate.closed_loop's default batch of episodes
TRAIN_BATCH = 256
FULL = dict(
    episodes=32,
    train_warmup=3,
    train_steps=20,
    rollout_warmup=5,
    rollout_repeats=31,
    matmul_repeats=31,
    breakdown_repeats=21,
)
QUICK = dict(
    episodes=12,
    train_warmup=1,
    train_steps=4,
    rollout_warmup=2,
    rollout_repeats=7,
    matmul_repeats=7,
    breakdown_repeats=5,
)
TARGET_EFFICIENCY = 0.5
SEED = 0


def _timed(fn, repeats: int) -> tuple[list[float], list[float]]:
    """Wall-clock and process-CPU seconds of ``repeats`` calls of ``fn``."""
    wall, cpu, _ = benchkit.timed(fn, repeats)
    return wall, cpu


def linear_shapes(fn) -> list[tuple[int, int, int]]:
    """(rows, in, out) of every matrix multiply of two matrices (``aten.mm``, ``aten.addmm``, and ``aten.linear``,
    as every linear map of the model reaches torch's dispatcher: ``nn.Linear``, ``F.linear`` and the inference
    path's ``torch.addmm`` / ``torch.mm`` alike) while ``fn()`` runs, recorded by a dispatch mode. Batched products
    (``aten.bmm``, the
    attention's queries times keys and weights times values) are left out."""
    import torch
    from torch.utils._python_dispatch import TorchDispatchMode

    aten = torch.ops.aten
    shapes: list[tuple[int, int, int]] = []
    two = {aten.mm.default, aten.mm.out}
    three = {aten.addmm.default, aten.addmm.out}

    class Recorder(TorchDispatchMode):
        def __torch_dispatch__(self, func, types, args=(), kwargs=None):
            if func in two or func in three:
                a, b = args[0:2] if func in two else args[1:3]
                shapes.append((int(a.shape[0]), int(a.shape[1]), int(b.shape[1])))
            elif func is aten.linear.default:  # F.linear on more than two dimensions arrives whole
                x, weight = args[0:2]
                shapes.append((int(x.numel() // weight.shape[1]), int(weight.shape[1]), int(weight.shape[0])))
            return func(*args, **(kwargs or {}))

    with Recorder():
        fn()
    return shapes


def flop_counter_mm_flops(fn) -> int | None:
    """FLOPs of mm / addmm counted by ``FlopCounterMode`` while ``fn()`` runs (None if unavailable); the batched
    products (bmm) are the attention's queries times keys and weights times values, in neither count."""
    try:
        import torch
        from torch.utils.flop_counter import FlopCounterMode
    except ImportError:  # pragma: no cover - old torch
        return None
    with FlopCounterMode(display=False) as counter:
        fn()
    wanted = {torch.ops.aten.mm, torch.ops.aten.addmm}  # the attention's batched products (bmm) left out, as above
    return int(sum(v for k, v in counter.get_flop_counts().get("Global", {}).items() if k in wanted))


def matmul_loop(shapes: list[tuple[int, int, int]], generator) -> Callable[[], None]:
    """A function doing one ``torch.mm`` per shape on random matrices made beforehand."""
    import torch

    mats = [(torch.randn(r, i, generator=generator), torch.randn(i, o, generator=generator)) for r, i, o in shapes]

    def go() -> None:
        for a, b in mats:
            torch.mm(a, b)

    return go


def breakdown(model, batch: dict, actions, k: int, repeats: int, seed: int) -> tuple[dict, dict, bool]:
    """Median wall-clock and process-CPU seconds of each piece of ``WorldModel.sample`` (rows alone, a latent
    model) replayed step by step with the functions it calls (:mod:`wmplan.model.inference`), in the same order;
    and whether the replay's rows equal ``sample``'s for the same generator seed. The decoder's pieces are
    replayed on the whole batch, as ``sample`` runs them when the batch is one group of plans (true at one scene,
    checked)."""
    import torch

    from wmplan.model import inference as inf
    from wmplan.model.nets import randn_rows

    hist = batch["history"]
    b, c = actions.shape[:2]
    n = hist.shape[2]
    if b * c * k * n > inf.CHUNK_ROWS:
        raise ValueError(f"the replay times one group of plans: at most {inf.CHUNK_ROWS} decoder rows")
    times: dict[str, list[float]] = {}
    cpu_times: dict[str, list[float]] = {}
    rows = None

    def now() -> tuple[float, float]:
        return time.perf_counter(), time.process_time()

    def tick(name: str, t0: tuple[float, float]) -> tuple[float, float]:
        t1 = now()
        times.setdefault(name, []).append(t1[0] - t0[0])
        cpu_times.setdefault(name, []).append(t1[1] - t0[1])
        return now()

    with torch.inference_mode():
        for _ in range(repeats):
            g = torch.Generator().manual_seed(seed)
            t = now()
            pw = inf.prepared(model)
            t = tick("prepared_weights_lookup", t)
            h = inf.by_object(inf.encode_scene(pw, hist, batch["road"]))
            t = tick("scene_encoder", t)
            ego_f = model.ego_future(batch, actions)
            t = tick("ego_kinematics", t)
            p = inf.encode_plan(pw, hist[:, -1, :, :2], ego_f, actions)
            t = tick("plan_encoder", t)
            eps = randn_rows((b, 1, k, n, model.zdim), g).permute(3, 0, 1, 2, 4)
            t = tick("latent_normals", t)
            z = inf.draw_latent(pw, h, p, eps)
            t = tick("prior_and_latent_draw", t)
            hp = inf.decoder_first(pw, h, p)
            t = tick("decoder_first_layer_history_and_plan_parts", t)
            cv = model.cv_positions(hist)
            t = tick("constant_velocity", t)
            planes = model.empty_planes(b, c, k, n, dtype=hist.dtype)
            pos = planes[:2]
            t = tick("empty_planes", t)
            x = inf._linear(z, pw.dec_z_w)
            x += hp[..., None, :]
            t = tick("decoder_first_layer_latent_part", t)
            x = inf._gelu_(x)
            t = tick("decoder_gelu_1", t)
            for i, (w, bias) in enumerate(pw.dec_hidden, start=2):
                x = inf._linear(x, w, bias)
                t = tick(f"decoder_linear_{i}", t)
                x = inf._gelu_(x)
                t = tick(f"decoder_gelu_{i}", t)
            x = x.view(-1, x.shape[-1])
            for j in range(2):
                torch.mm(x, pw.mean_wxy[j], out=pos[j].view(-1, pos.shape[-1]))
            t = tick("decoder_last_layer_means_into_planes", t)
            pos += (cv + pw.mean_b).permute(3, 1, 0, 2)[:, :, :, None, None]
            t = tick("positions_plus_constant_velocity", t)
            rows = model.finish_rows(hist, planes, ego_f)
            t = tick("finish_rows", t)
            # the headings of every predicted row (part of finish_rows), timed alone on same-size planes
            vx, vy = planes[2].clone(), planes[3].clone()
            t = now()
            torch.atan2(vy, vx.clamp_min(0.1))
            tick("finish_rows.atan2_part", t)
    ref = model.sample(batch, actions, k, generator=torch.Generator().manual_seed(seed), moments=False)["rows"]
    med = lambda d: {name: statistics.median(v) for name, v in d.items()}  # noqa: E731
    return med(times), med(cpu_times), bool(torch.equal(ref, rows))


def _training(model_cfg, windows, index, cfg: dict) -> dict:
    """Median seconds per training step (batch building included, and excluded)."""
    import torch

    from wmplan.model.config import TrainConfig
    from wmplan.model.train import to_torch
    from wmplan.model.world_model import WorldModel

    tc = TrainConfig()
    model = WorldModel(model_cfg, windows_ego(windows), generator=torch.Generator().manual_seed(SEED))
    model.train()
    opt = torch.optim.Adam(model.parameters(), lr=tc.peak_lr(model_cfg.deterministic))
    rng = np.random.default_rng(SEED)
    gen = torch.Generator().manual_seed(SEED + 1)

    def one(batch) -> None:
        loss, _ = model.loss(batch, kl_weight=1.0, free_bits=tc.free_bits, prior_weight=tc.prior_weight, generator=gen)
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), tc.grad_clip)
        opt.step()

    def with_data() -> None:
        one(to_torch(windows.batch(index[rng.integers(0, len(index), TRAIN_BATCH)])))

    prebuilt = [
        to_torch(windows.batch(index[rng.integers(0, len(index), TRAIN_BATCH)])) for _ in range(cfg["train_steps"])
    ]
    it = iter(prebuilt)
    _timed(with_data, cfg["train_warmup"])
    wall, cpu = _timed(with_data, cfg["train_steps"])
    wall_m, cpu_m = _timed(lambda: one(next(it)), cfg["train_steps"])
    return {
        "batch_size": TRAIN_BATCH,
        "warmup_steps": cfg["train_warmup"],
        "timed_steps": cfg["train_steps"],
        "samples_per_s": TRAIN_BATCH / statistics.median(wall),
        "samples_per_cpu_s": TRAIN_BATCH / statistics.median(cpu),
        "samples_per_s_model_only": TRAIN_BATCH / statistics.median(wall_m),
        "s_per_step": statistics.median(wall),
        "loss_weights": {"kl_weight": 1.0, "free_bits": tc.free_bits, "prior_weight": tc.prior_weight},
    }


def candidate_plans(batch: dict, candidates: int, seed: int):
    """(B, C, H, 2) plans: each window's recorded plan perturbed per candidate (1 m/s^2, 0.05 rad)."""
    import torch

    b, h = batch["actions"].shape[:2]
    noise = torch.randn(b, candidates, h, 2, generator=torch.Generator().manual_seed(seed))
    return (batch["actions"][:, None] + noise * torch.tensor([1.0, 0.05])).contiguous()


def batched_rollout(model, windows, index, scenes: int, cfg: dict) -> dict:
    """Rollout and matmul-loop times at the planner's shape for ``scenes`` scenes in one call (what the closed-loop
    evaluation, sweeps and stress tests do: ``wmplan.evaluate.closed_loop`` plans for up to 50 episodes at once),
    measured as for one scene: the rows alone, the same FLOPs in a plain ``torch.mm`` loop, medians over repeats."""
    import torch

    from wmplan.model.train import to_torch

    c, k = PLANNER_SHAPE["candidates"], PLANNER_SHAPE["samples"]
    pick = index[:: max(1, len(index) // scenes)][:scenes]
    batch = to_torch(windows.batch(pick))
    actions = candidate_plans(batch, c, SEED + 5)

    def rollout() -> None:
        model.sample(batch, actions, k, generator=torch.Generator().manual_seed(SEED + 6), moments=False)

    reps = max(3, cfg["rollout_repeats"] // 3)
    _timed(rollout, 2)
    r_wall, _ = _timed(rollout, reps)
    with torch.inference_mode():
        shapes = linear_shapes(rollout)
    mm = matmul_loop(shapes, torch.Generator().manual_seed(SEED + 7))
    _timed(mm, 2)
    m_wall, _ = _timed(mm, reps)
    r2_wall, _ = _timed(rollout, reps)
    t_roll, t_mm = statistics.median(r_wall + r2_wall), statistics.median(m_wall)
    steps = len(pick) * c * k * model.cfg.horizon * model.cfg.num_rows
    return {
        "scenes": len(pick),
        "candidates": c,
        "samples": k,
        "s_per_call_median": t_roll,
        "s_loop_median": t_mm,
        "rollout_efficiency": t_mm / t_roll,
        "vehicle_steps_per_s": steps / t_roll,
        "flops_per_rollout": int(sum(2 * r * i * o for r, i, o in shapes)),
        "repeats": 2 * reps,
    }


def windows_ego(windows):
    from wmplan.model.ego import EgoKinematics

    return EgoKinematics.from_scenario(windows.dataset.scenario, windows.dataset.decision_dt_s)


def run(quick: bool = False, threads: int = 1) -> dict:
    """Measure; return the results as a JSON-ready dict (see the module docstring for what each number means)."""
    import torch

    from wmplan.data import simulate_dataset
    from wmplan.data.windows import Windows, WindowSpec, anchor_index
    from wmplan.model.config import ModelConfig
    from wmplan.model.train import to_torch
    from wmplan.model.world_model import WorldModel
    from wmplan.scenario import load_scenario

    cfg = QUICK if quick else FULL
    threads_before = torch.get_num_threads()
    torch.set_num_threads(int(threads))
    machine = benchkit.machine()
    try:
        model_cfg = ModelConfig()
        spec = WindowSpec(model_cfg.history, model_cfg.horizon, model_cfg.num_objects)
        with tempfile.TemporaryDirectory(prefix="wmplan-bench-model-") as tmp:
            ds = simulate_dataset(load_scenario(SCENARIO), Path(tmp) / "data", episodes=cfg["episodes"], seed=SEED)
        windows = Windows(ds, spec)
        index = anchor_index(ds, spec)

        # --- (a) training ---
        training = _training(model_cfg, windows, index, cfg)

        # --- (b) rollout at planner shapes ---
        ego = windows_ego(windows)
        model = WorldModel(model_cfg, ego, generator=torch.Generator().manual_seed(SEED)).eval()
        b, c, k = PLANNER_SHAPE["scenes"], PLANNER_SHAPE["candidates"], PLANNER_SHAPE["samples"]
        pick = index[len(index) // 2 : len(index) // 2 + b]
        batch = to_torch(windows.batch(pick))
        actions = candidate_plans(batch, c, SEED + 2)
        n = model_cfg.num_rows
        vehicle_steps = c * k * model_cfg.horizon * n * b

        def rollout() -> None:  # as the planner calls it (wmplan.plan.predictors): the rows alone
            model.sample(batch, actions, k, generator=torch.Generator().manual_seed(SEED + 3), moments=False)

        def rollout_with_moments() -> None:  # as the assessment calls it: also the residuals' means and variances
            model.sample(batch, actions, k, generator=torch.Generator().manual_seed(SEED + 3))

        def ego_only() -> None:
            with torch.inference_mode():
                model.ego_future(batch, actions)

        _timed(rollout, cfg["rollout_warmup"])
        r_wall, r_cpu = _timed(rollout, cfg["rollout_repeats"])
        _timed(ego_only, cfg["rollout_warmup"])
        e_wall, e_cpu = _timed(ego_only, cfg["rollout_repeats"])

        # --- (c) the same matrix multiplies alone ---
        with torch.inference_mode():
            shapes = linear_shapes(rollout)
        flops = int(sum(2 * r * i * o for r, i, o in shapes))
        with torch.inference_mode():
            fc_flops = flop_counter_mm_flops(rollout)
        mm = matmul_loop(shapes, torch.Generator().manual_seed(SEED + 4))
        _timed(mm, cfg["rollout_warmup"])
        m_wall, m_cpu = _timed(mm, cfg["matmul_repeats"])
        # a second rollout timing after the matmul loop, so that a change in machine load between the two shows
        r2_wall, r2_cpu = _timed(rollout, cfg["rollout_repeats"])
        _timed(rollout_with_moments, cfg["rollout_warmup"])
        rm_wall, _ = _timed(rollout_with_moments, cfg["rollout_repeats"])

        parts, parts_cpu, matches = breakdown(model, batch, actions, k, cfg["breakdown_repeats"], SEED + 3)
        batched = batched_rollout(model, windows, index, CLOSED_LOOP_SCENES, cfg)

        t_roll, t_roll_cpu = statistics.median(r_wall + r2_wall), statistics.median(r_cpu + r2_cpu)
        t_mm, t_mm_cpu = statistics.median(m_wall), statistics.median(m_cpu)
        t_ego = statistics.median(e_wall)
        by_layer: dict[str, int] = {}
        for r, i, o in shapes:
            key = f"{r}x{i}x{o}"
            by_layer[key] = by_layer.get(key, 0) + 2 * r * i * o
        result = {
            "benchmark": "model_throughput",
            "quick": quick,
            "torch_threads": torch.get_num_threads(),
            "rollout_efficiency": t_mm / t_roll,
            "rollout_efficiency_cpu_time": t_mm_cpu / t_roll_cpu,
            "rollout_efficiency_fastest_runs": min(m_wall) / min(r_wall + r2_wall),
            "rollout_vehicle_steps_per_s": vehicle_steps / t_roll,
            "rollout_efficiency_closed_loop_batch": batched["rollout_efficiency"],
            "rollout_closed_loop_batch": batched,
            "training_samples_per_s": training["samples_per_s"],
            "training": training,
            "rollout": {
                "scenes": b,
                "candidates": c,
                "samples": k,
                "horizon": model_cfg.horizon,
                "objects": n,
                "vehicle_steps_per_call": vehicle_steps,
                "s_per_call_median": t_roll,
                "s_per_call_min": min(r_wall + r2_wall),
                "s_per_call_median_before_matmul_loop": statistics.median(r_wall),
                "s_per_call_median_after_matmul_loop": statistics.median(r2_wall),
                "s_per_call_median_with_moments": statistics.median(rm_wall),
                "cpu_s_per_call_median": t_roll_cpu,
                "vehicle_steps_per_cpu_s": vehicle_steps / t_roll_cpu,
                "ego_kinematics_s": t_ego,
                "ego_kinematics_cpu_s": statistics.median(e_cpu),
                "ego_kinematics_share": t_ego / t_roll,
                "ego_kinematics_share_cpu_time": statistics.median(e_cpu) / t_roll_cpu,
                "repeats": 2 * cfg["rollout_repeats"],
            },
            "matmul": {
                "flops_per_rollout": flops,
                "flops_flop_counter_mm": fc_flops,
                "matrix_multiplies": len(shapes),
                "flops_by_shape_rows_x_in_x_out": by_layer,
                "s_loop_median": t_mm,
                "s_loop_min": min(m_wall),
                "cpu_s_loop_median": t_mm_cpu,
                "gflop_per_s_loop": flops / t_mm / 1e9,
                "gflop_per_s_rollout": flops / t_roll / 1e9,
            },
            "breakdown_s": parts,
            "breakdown_sum_s": sum(v for name, v in parts.items() if "." not in name),
            "breakdown_cpu_s": parts_cpu,
            "breakdown_sum_cpu_s": sum(v for name, v in parts_cpu.items() if "." not in name),
            "breakdown_matches_sample": matches,
            "model": {
                "num_parameters": model.num_parameters(),
                "config": model_cfg.to_dict(),
                "weights": f"fresh, drawn from torch.Generator seed {SEED} (speed does not depend on training)",
            },
            "settings": {
                "scenario": SCENARIO,
                "dataset_episodes": cfg["episodes"],
                "dataset_seed": SEED,
                "statistic": "median over repeats",
                **cfg,
            },
            "targets": {
                "rollout_efficiency": TARGET_EFFICIENCY,
                "rollout_efficiency_met": t_mm / t_roll >= TARGET_EFFICIENCY,
            },
            "machine": {
                **machine,
                "torch": torch.__version__,
                "torch_threads": int(threads),
                "load_avg_1min_at_end": benchkit.load_avg(),
            },
            "caution": benchkit.CAUTION,
        }
    finally:
        torch.set_num_threads(threads_before)
    return result


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be an integer >= 1, got {text!r}")
    return value


def _arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--threads", type=_positive_int, default=1, help="torch intra-op threads (default 1)")


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(
        run,
        "Forward-model throughput: training samples/s, rollout vehicle-steps/s and rollout "
        "efficiency against plain matmuls.",
        argv,
        _arguments,
    )


if __name__ == "__main__":
    sys.exit(main())
