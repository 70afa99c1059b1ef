"""Planner latency and closed-loop throughput: how long one decision of the sampling planner takes, and where.

What is measured (onramp-merge, the default budget ``PlannerConfig()`` = 64 candidates x 8 futures x 15 steps of
0.2 s, CEM, penalty mode):

* ``decision_ms_median``, ``decision_ms_p95``: wall-clock time of ``SamplingPlanner.plan`` for ONE episode
  (batch B = 1), over every decision of ``latency_episodes`` closed-loop episodes driven by that planner (one
  untimed warm-up call first). ``decision_cpu_ms_median`` is the same in CPU time of this thread: a cross-check
  when other programs share the machine. The top-level figures are those of the *headline* predictor: the trained
  latent model if one is given (``--model DIR`` or the environment variable ``WMPLAN_BENCH_MODEL``), otherwise an
  untrained forward model of the default size (seeded random weights): its futures are meaningless but it costs
  exactly what a trained one costs. The constant-velocity predictor is always measured beside it, for reference.
* ``breakdown_ms``: the pieces of one decision timed one by one on contexts recorded in those episodes (for each
  context the fastest of 3 calls, the one least disturbed by other programs; then the median over contexts):
  the whole ``plan``, candidate generation (sampling and the lane-tracking steering law, ``track_lane`` also shown
  on its own), the predictor, the costs (with the risk summary and the headway term also on their own), and the
  rest of ``plan`` (sampler update, bookkeeping) as the difference; shares are of the whole ``plan``.
* ``episodes_per_minute``: batched closed-loop evaluation, ``throughput_episodes`` episodes of onramp-merge in
  one batch through ``run_batch`` (the evaluation loop of ``wmplan evaluate``), per predictor.

Threads: torch runs on ``torch.set_num_threads(threads)``, 1 if the machine is loaded (1-minute load average >= 1
at the start: another program holds a core), else the number of cores; both are recorded. On a shared machine
two torch threads that wait on each other were measured to be many times slower than one.

* ``decision_ms_median_oracle``: the same for ``mpc+oracle`` (the true simulator re-run from the true state for
  the 64 plans x 8 futures of every decision; the reference of paired comparisons), with its breakdown under
  ``predictors["oracle"]``.

Targets: ``decision_ms_median`` <= 100 ms (the planning issue); ``decision_ms_median_oracle`` <= 30 ms (the
compiled-simulator issue).

Usage: ``python benchmarks/plan_latency.py [--quick] [--json FILE] [--model DIR]``; ``wmplan bench`` calls
:func:`run`. Importing this module runs nothing. Numbers depend on the machine and on what else it is doing. They
time a planner on a simplified traffic model and certify nothing about a real vehicle.
"""

from __future__ import annotations

import argparse
import copy
import os
import statistics
import sys
import time

import numpy as np

from wmplan import benchkit

SCENARIO = "onramp-merge"
FULL = dict(latency_episodes=3, breakdown_contexts=30, throughput_episodes=50, duration_s=None)
QUICK = dict(latency_episodes=1, breakdown_contexts=5, throughput_episodes=4, duration_s=4.0)
TARGET_DECISION_MS = 100.0
TARGET_ORACLE_DECISION_MS = 30.0
MODEL_ENV = "WMPLAN_BENCH_MODEL"
BREAKDOWN_REPEATS = 3


def _choose_threads() -> int:
    load = benchkit.load_avg()
    cores = os.cpu_count() or 1
    return 1 if load is None or load >= 1.0 else cores


def _scenario(duration_s: float | None):
    from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict

    scn = load_scenario(SCENARIO)
    if duration_s is None:
        return scn
    d = copy.deepcopy(scenario_to_dict(scn))
    d["duration_s"] = duration_s
    return parse_scenario(d, source=SCENARIO)


def _predictors(params, cfg, model_dir: str | None) -> tuple[dict, str]:
    """Predictors to measure, by name, and the name of the headline one."""
    import torch

    from wmplan.evaluate.planners import HISTORY, NUM_OBJECTS, make_planner
    from wmplan.model.config import ModelConfig
    from wmplan.model.ego import EgoKinematics
    from wmplan.model.world_model import WorldModel
    from wmplan.plan.predictors import ModelPredictor

    out = {"constant-velocity": make_planner("mpc+constant-velocity", params, {"config": cfg}).predictor}
    if model_dir:
        from wmplan.model.checkpoint import load_model

        model, _ = load_model(model_dir)
        out["latent"] = ModelPredictor(model.eval(), "latent")
        return out, "latent"
    ego = EgoKinematics.from_scenario(params.scenario, cfg.plan_dt_s)
    mcfg = ModelConfig(history=HISTORY, horizon=cfg.horizon, num_objects=NUM_OBJECTS, plan_dt_s=cfg.plan_dt_s)
    model = WorldModel(mcfg, ego, generator=torch.Generator().manual_seed(0)).eval()
    out["untrained-latent"] = ModelPredictor(model, "latent")
    return out, "untrained-latent"


def _planner(params, cfg, predictor):
    from wmplan.model.ego import EgoKinematics
    from wmplan.plan.mpc import SamplingPlanner

    return SamplingPlanner(cfg, params, predictor, EgoKinematics.from_scenario(params.scenario, cfg.plan_dt_s))


def _timed_plan(planner, wall_ms: list, cpu_ms: list, contexts: list) -> None:
    """Wrap ``planner.plan`` (this instance only) to time every call and keep its context."""
    plan = planner.plan

    def timed(ctx, **kwargs):
        t0, c0 = time.perf_counter(), time.thread_time()
        res = plan(ctx, **kwargs)
        wall_ms.append((time.perf_counter() - t0) * 1e3)
        cpu_ms.append((time.thread_time() - c0) * 1e3)
        contexts.append(ctx)
        return res

    planner.plan = timed


def _latency(params, cfg, predictor, num_episodes: int) -> tuple[dict, list]:
    """Per-decision time of ``plan`` with B = 1 over closed-loop episodes; also the contexts met."""
    import torch

    from wmplan.evaluate.closed_loop import initial_history, run_batch
    from wmplan.evaluate.planners import HISTORY, NUM_OBJECTS
    from wmplan.plan.predictors import make_context
    from wmplan.sim.spawn import initial_state

    planner = _planner(params, cfg, predictor)
    state = initial_state(params, [1000])
    hist, ids = initial_history(state, HISTORY, cfg.plan_dt_s)
    planner.plan(make_context(params, state, hist, ids, NUM_OBJECTS), generator=torch.Generator().manual_seed(0))
    wall, cpu, contexts = [], [], []
    _timed_plan(planner, wall, cpu, contexts)
    outcomes = []
    for e in range(num_episodes):
        out = run_batch(params, planner, np.array([e]), seed=e, name=predictor.name)
        outcomes.append({k: out.rows[0][k] for k in ("collision", "success", "decisions")})
    result = {
        "decision_ms_median": statistics.median(wall),
        "decision_ms_p95": float(np.percentile(wall, 95)),
        "decision_ms_mean": float(np.mean(wall)),
        "decision_ms_max": max(wall),
        "decision_cpu_ms_median": statistics.median(cpu),
        "decisions": len(wall),
        "episodes": outcomes,
    }
    return result, contexts


def _time_ms(fn, repeats: int = BREAKDOWN_REPEATS) -> tuple[float, object]:
    """Wall-clock milliseconds of the fastest of ``repeats`` calls of ``fn`` (the least disturbed by other
    programs) and the result of the last call."""
    wall, _cpu, out = benchkit.timed(fn, repeats)
    return min(wall) * 1e3, out


def _breakdown(params, cfg, predictor, contexts: list, num_contexts: int) -> dict:
    """Median time of each piece of a decision over up to ``num_contexts`` recorded contexts (B = 1)."""
    import torch

    from wmplan.plan.mpc import LANE_CHOICES
    from wmplan.plan.risk import leader_gap_and_closing, summarise_risk

    planner = _planner(params, cfg, predictor)
    planner.reset_state(1)
    gen = torch.Generator().manual_seed(1)
    pick = np.linspace(0, len(contexts) - 1, min(num_contexts, len(contexts))).round().astype(int)
    parts: dict[str, list[float]] = {
        k: []
        for k in ("plan", "candidates", "track_lane", "predictor", "costs", "summarise_risk", "headway_leader_search")
    }
    with torch.inference_mode():
        for i in pick:
            ctx = contexts[i]
            ms, _ = _time_ms(lambda ctx=ctx: planner.plan(ctx, generator=gen))
            parts["plan"].append(ms)
            ms, (plans, choice) = _time_ms(
                lambda ctx=ctx: planner.candidates(ctx, planner.mean, planner.std, planner.lane_p, gen)
            )
            parts["candidates"].append(ms)
            lane, _, y_road = planner._lane_info(ctx)
            d_lane = torch.tensor(LANE_CHOICES)[choice]
            y_target = (((lane[:, None] + d_lane).double() + 0.5) * params.lane_width_m - y_road[:, None]).float()
            noise = torch.zeros_like(plans[..., 0])
            ms, _ = _time_ms(lambda ctx=ctx, p=plans, y=y_target, n=noise: planner.track_lane(ctx, p[..., 0], y, n))
            parts["track_lane"].append(ms)
            ms, fut = _time_ms(lambda ctx=ctx, p=plans: predictor.predict(ctx, p, cfg.num_futures, generator=gen))
            parts["predictor"].append(ms)
            ms, _ = _time_ms(lambda ctx=ctx, p=plans, c=choice, f=fut: planner.costs(ctx, p, c, f))
            parts["costs"].append(ms)
            ms, _ = _time_ms(
                lambda f=fut: summarise_risk(f, cvar_alpha=cfg.cvar_alpha, safe_distance_m=cfg.safe_distance_m)
            )
            parts["summarise_risk"].append(ms)
            ms, _ = _time_ms(lambda f=fut: leader_gap_and_closing(f))
            parts["headway_leader_search"].append(ms)
    med = {k: statistics.median(v) for k, v in parts.items()}
    pieces = med["candidates"] + med["predictor"] + med["costs"]
    med["rest_of_plan"] = max(med["plan"] - pieces, 0.0)
    share = {k: med[k] / med["plan"] for k in ("candidates", "predictor", "costs", "rest_of_plan")}
    return {
        "median_ms": med,
        "share_of_decision": share,
        "contexts": int(len(pick)),
        "note": "track_lane is part of candidates; summarise_risk and headway_leader_search are part of costs; "
        "rest_of_plan = plan - candidates - predictor - costs",
    }


def _throughput(params, cfg, predictor, num_episodes: int) -> dict:
    from wmplan.data.collect import episode_seeds
    from wmplan.evaluate.closed_loop import run_batch

    planner = _planner(params, cfg, predictor)
    seeds = episode_seeds(0, num_episodes)
    t0, c0 = time.perf_counter(), time.process_time()
    out = run_batch(params, planner, seeds, seed=0, name=predictor.name)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    return {
        "episodes_per_minute": num_episodes / wall * 60.0,
        "episodes": num_episodes,
        "batch_size": num_episodes,
        "seconds": wall,
        "cpu_seconds": cpu,
        "episodes_per_cpu_minute": num_episodes / cpu * 60.0,
        "decisions": int(sum(r["decisions"] for r in out.rows)),
        "collision_rate": float(np.mean([r["collision"] for r in out.rows])),
        "success_rate": float(np.mean([r["success"] for r in out.rows])),
    }


def run(quick: bool = False, model_dir: str | None = None) -> dict:
    """Measure; return the results as a JSON-ready dict (see the module docstring for what each number means)."""
    import torch

    from wmplan.plan.mpc import PlannerConfig
    from wmplan.sim.params import SimParams

    model_dir = model_dir or os.environ.get(MODEL_ENV) or None
    settings = QUICK if quick else FULL
    threads = _choose_threads()
    torch.set_num_threads(threads)
    machine = benchkit.machine(torch_threads=threads)
    cfg = PlannerConfig()
    params = SimParams.from_scenario(_scenario(settings["duration_s"]))
    predictors, headline = _predictors(params, cfg, model_dir)
    per: dict[str, dict] = {}
    for name, predictor in predictors.items():
        lat, contexts = _latency(params, cfg, predictor, settings["latency_episodes"])
        lat["breakdown_ms"] = _breakdown(params, cfg, predictor, contexts, settings["breakdown_contexts"])
        lat["closed_loop"] = _throughput(params, cfg, predictor, settings["throughput_episodes"])
        per[name] = lat
    # the oracle (the reference of paired comparisons): the true simulator re-run for 64 plans x 8 futures
    from wmplan.evaluate.planners import make_planner

    oracle = make_planner("mpc+oracle", params, {"config": cfg}).predictor
    lat, contexts = _latency(params, cfg, oracle, settings["latency_episodes"])
    lat["breakdown_ms"] = _breakdown(params, cfg, oracle, contexts, settings["breakdown_contexts"])
    per["oracle"] = lat
    top = per[headline]
    oracle_ms = lat["decision_ms_median"]
    return {
        "benchmark": "plan_latency",
        "quick": quick,
        "headline_predictor": headline,
        "headline_is_trained": bool(model_dir),
        "decision_ms_median": top["decision_ms_median"],
        "decision_ms_p95": top["decision_ms_p95"],
        "episodes_per_minute": top["closed_loop"]["episodes_per_minute"],
        "meets_target": top["decision_ms_median"] <= TARGET_DECISION_MS,
        "decision_ms_median_oracle": oracle_ms,
        "meets_targets": {
            "decision_ms_median": top["decision_ms_median"] <= TARGET_DECISION_MS,
            "decision_ms_median_oracle": oracle_ms <= TARGET_ORACLE_DECISION_MS,
        },
        "predictors": per,
        "settings": {
            "scenario": SCENARIO,
            "planner_config": cfg.to_dict(),
            "model": model_dir,
            **settings,
            "latency_batch": 1,
            "statistic": "median and 95th percentile over all timed decisions",
            "oracle": "latency and breakdown only (its closed-loop throughput is not measured)",
        },
        "targets": {"decision_ms_median": TARGET_DECISION_MS, "decision_ms_median_oracle": TARGET_ORACLE_DECISION_MS},
        "machine": {**machine, "load_avg_1min_at_end": benchkit.load_avg()},
        "caution": benchkit.CAUTION,
    }


def _arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--model",
        dest="model_dir",
        metavar="DIR",
        help=f"trained latent model folder (default: ${MODEL_ENV}, else an untrained model of the default size)",
    )


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(
        run,
        "Planner latency (one decision, default budget; also the oracle's) and closed-loop evaluation throughput.",
        argv,
        _arguments,
    )


if __name__ == "__main__":
    sys.exit(main())
