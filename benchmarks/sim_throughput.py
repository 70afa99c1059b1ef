"""Simulator throughput: vehicle-steps per second of the compiled engine, its speed-up over a per-vehicle loop, the
gymnasium environments' step rates and the cold-cache compile time.

What is measured (open-road, 16 vehicle slots per scene, the ego's actions all zero, so it keeps its speed and
heading):

* ``vehicle_steps_per_s[S]`` for S = 1, 64, 512, 2048 scenes: S x 16 slots x steps / seconds of ``engine.step``
  alone (no action computation, the default thread count), from a state already advanced ``warmup_steps`` steps;
  the median over ``repeats`` timings of ``timed_steps`` steps, each repeat starting from the same state. A slot
  counts whether or not it holds a vehicle (about 3/4 do); ``occupied_vehicle_steps_per_s`` counts only the
  occupied ones. ``vehicle_steps_per_cpu_s`` divides by the process's CPU time instead.
* ``speedup_vs_loop``: seconds per step of ``wmplan.sim.loop_reference.step_loop`` (Python loops over scenes
  and vehicles, ``math`` on floats) divided by those of ``engine.step`` (default threads, i.e. every core this
  process may use), on identical states (512 scenes, same steps), in the same process; the two final states are
  compared, and the result says whether they agree. ``speedup_vs_loop_one_thread``: the same with one thread.
* ``threaded``: 8192 scenes (the oracle's batch size) on one thread and on the default thread count, alternately:
  both rates, the ``speedup``, and whether the final states are equal.
* ``env_steps_per_s_single``: ``LaneEnv("open-road")`` steps per second with observations (no rendering),
  resetting when an episode ends; ``vector_env_steps_per_s_64``: scene-steps per second of a
  ``LaneVectorEnv`` of 64 scenes.
* ``compile_s``: a fresh Python process with an empty numba cache folder imports the simulator and takes one
  step; the seconds of that first step (the compilation of the kernel). ``compile_s_import`` is the import.

Usage: ``python benchmarks/sim_throughput.py [--quick] [--json FILE]``; ``wmplan bench`` calls :func:`run`.
Importing this module runs nothing. Numbers depend on the machine and on what else it is doing; the load average
at the start and the end is recorded with them. The targets compare ratios measured in this one process.
"""

from __future__ import annotations

import dataclasses
import functools
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from wmplan import benchkit

SCENARIO = "open-road"
SCENE_COUNTS = (1, 64, 512, 2048)
THREADED_SCENES = 8192  # 16 scenes x 64 plans x 8 futures: the oracle's batch at the default planner budget
FULL = dict(
    warmup_steps=30,
    timed_steps=30,
    repeats=7,
    loop_scenes=512,
    loop_steps=6,
    loop_repeats=3,
    engine_repeats_vs_loop=15,
    env_steps=20000,
    compile=True,
)
QUICK = dict(
    warmup_steps=6,
    timed_steps=6,
    repeats=3,
    loop_scenes=512,
    loop_steps=3,
    loop_repeats=1,
    engine_repeats_vs_loop=5,
    env_steps=500,
    compile=False,
)
TARGETS = {
    "speedup_vs_loop": 150.0,
    "vehicle_steps_per_s_1": 1e6,
    "env_steps_per_s_single": 20000.0,
    "vector_env_steps_per_s_64": 200000.0,
    "compile_s": 30.0,
}


def _advance(step_fn, state, action, params, num_steps: int):
    for _ in range(num_steps):
        state, _ = step_fn(state, action, params)
    return state


def _time_steps(step_fn, state, action, params, num_steps: int, repeats: int):
    """Wall-clock and process-CPU seconds of ``num_steps`` steps from ``state``, ``repeats`` times each; and the
    state they end in."""
    return benchkit.timed(lambda: _advance(step_fn, state, action, params, num_steps), repeats)


def _max_abs_diff(a, b) -> tuple[bool, float]:
    """Whether two states agree (floats to rtol = atol = 1e-9, the rest exactly) and the largest float gap."""
    ok, worst = True, 0.0
    for f in dataclasses.fields(a):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if x.dtype.kind == "f":
            ok &= bool(np.allclose(x, y, rtol=1e-9, atol=1e-9))
            worst = max(worst, float(np.max(np.abs(x - y), initial=0.0)))
        else:
            ok &= bool(np.array_equal(x, y))
    return ok, worst


def _compile_seconds() -> dict:
    """Import and first-step seconds of a fresh process whose numba cache folder is empty."""
    code = (
        "import time; t0 = time.perf_counter(); import numpy as np; from wmplan.scenario import load_scenario; "
        "from wmplan.sim import SimParams, initial_state, step; t1 = time.perf_counter(); "
        "p = SimParams.from_scenario(load_scenario('open-road')); st = initial_state(p, [0]); "
        "t2 = time.perf_counter(); step(st, np.zeros((1, 2)), p); t3 = time.perf_counter(); "
        "print(t1 - t0, t3 - t2)"
    )
    with tempfile.TemporaryDirectory() as cache:
        env = {**os.environ, "NUMBA_CACHE_DIR": cache}
        out = subprocess.run(
            [sys.executable, "-c", code],
            env=env,
            capture_output=True,
            text=True,
            timeout=600,
            cwd=str(Path(__file__).resolve().parent.parent),
        )
    if out.returncode != 0:
        return {"error": out.stderr.strip().splitlines()[-1:]}
    imp, first = (float(v) for v in out.stdout.split())
    return {"compile_s": first, "compile_s_import": imp}


def _env_rates(num_steps: int) -> dict:
    """Steps per second of one LaneEnv and scene-steps per second of a LaneVectorEnv of 64 (zero actions)."""
    from wmplan.sim.env import LaneEnv, LaneVectorEnv

    env = LaneEnv(SCENARIO)
    env.reset(seed=0)
    zero = np.zeros(2, dtype=np.float32)
    for _ in range(20):
        env.step(zero)
    t0 = time.perf_counter()
    for _ in range(num_steps):
        _, _, term, trunc, _ = env.step(zero)
        if term or trunc:
            env.reset()
    single = num_steps / (time.perf_counter() - t0)
    venv = LaneVectorEnv(SCENARIO, num_envs=64)
    venv.reset(seed=0)
    zeros = np.zeros((64, 2), dtype=np.float32)
    for _ in range(10):
        venv.step(zeros)
    n = max(10, num_steps // 64)
    t0 = time.perf_counter()
    for _ in range(n):
        venv.step(zeros)
    return {"env_steps_per_s_single": single, "vector_env_steps_per_s_64": 64 * n / (time.perf_counter() - t0)}


def run(quick: bool = False) -> dict:
    """Measure; return the results as a JSON-ready dict (see the module docstring for what each number means)."""
    from wmplan.scenario import load_scenario
    from wmplan.sim import SimParams, initial_state, step
    from wmplan.sim.threads import chunk_bounds, sim_threads

    cfg = QUICK if quick else FULL
    compile_info = _compile_seconds() if cfg["compile"] else {}
    machine = benchkit.machine(sim_threads=sim_threads())
    params = SimParams.from_scenario(load_scenario(SCENARIO))
    num_slots = params.num_vehicles

    # --- engine throughput at several batch sizes ---
    rates, cpu_rates, occupied_rates, occupancy = {}, {}, {}, {}
    for num_scenes in SCENE_COUNTS:
        action = np.zeros((num_scenes, 2))
        state = _advance(step, initial_state(params, list(range(num_scenes))), action, params, cfg["warmup_steps"])
        wall, cpu, _ = _time_steps(step, state, action, params, cfg["timed_steps"], cfg["repeats"])
        sec = statistics.median(wall)
        mean_valid = float(state.valid.sum(axis=1).mean())
        rates[str(num_scenes)] = num_scenes * num_slots * cfg["timed_steps"] / sec
        cpu_rates[str(num_scenes)] = num_scenes * num_slots * cfg["timed_steps"] / statistics.median(cpu)
        occupied_rates[str(num_scenes)] = num_scenes * mean_valid * cfg["timed_steps"] / sec
        occupancy[str(num_scenes)] = mean_valid

    # --- a large batch (the oracle's size) on one thread and split over threads of this process, side by side ---
    threads = max(2, sim_threads())
    n_big = THREADED_SCENES
    action = np.zeros((n_big, 2))
    state = _advance(step, initial_state(params, list(range(n_big))), action, params, cfg["warmup_steps"])
    bounds = chunk_bounds(n_big, threads)
    one_step = functools.partial(step, threads=1)
    many_step = functools.partial(step, threads=threads)
    one_wall, many_wall = [], []
    for _ in range(max(3, cfg["repeats"] // 2)):
        t0 = time.perf_counter()
        one_end = _advance(one_step, state, action, params, cfg["timed_steps"])
        one_wall.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        many_end = _advance(many_step, state, action, params, cfg["timed_steps"])
        many_wall.append(time.perf_counter() - t0)
    same, _ = _max_abs_diff(one_end, many_end)
    work = n_big * num_slots * cfg["timed_steps"]
    threaded = {
        "scenes": n_big,
        "threads": len(bounds),
        "one_thread_vehicle_steps_per_s": work / statistics.median(one_wall),
        "threaded_vehicle_steps_per_s": work / statistics.median(many_wall),
        "speedup": statistics.median(one_wall) / statistics.median(many_wall),
        "same_states_as_one_thread": same,
    }

    # --- the same steps done by the engine and by the per-vehicle loop ---
    from wmplan.sim.loop_reference import step_loop as loop_step

    n_s, n_k = cfg["loop_scenes"], cfg["loop_steps"]
    action = np.zeros((n_s, 2))
    state = _advance(step, initial_state(params, list(range(n_s))), action, params, cfg["warmup_steps"])
    eng_wall, eng_cpu, eng_end = _time_steps(step, state, action, params, n_k, cfg["engine_repeats_vs_loop"])
    eng1_wall, _, _ = _time_steps(one_step, state, action, params, n_k, cfg["engine_repeats_vs_loop"])
    loop_wall, loop_cpu, loop_end = _time_steps(loop_step, state, action, params, n_k, cfg["loop_repeats"])
    agree, worst = _max_abs_diff(eng_end, loop_end)
    eng_sec, loop_sec = statistics.median(eng_wall) / n_k, statistics.median(loop_wall) / n_k
    eng1_sec = statistics.median(eng1_wall) / n_k
    cpu_speedup = statistics.median(loop_cpu) / statistics.median(eng_cpu)
    env_rates = _env_rates(cfg["env_steps"])
    values = {"speedup_vs_loop": loop_sec / eng_sec, "vehicle_steps_per_s_1": rates["1"], **env_rates, **compile_info}

    return {
        "benchmark": "sim_throughput",
        "quick": quick,
        "vehicle_steps_per_s": rates,
        "vehicle_steps_per_cpu_s": cpu_rates,
        "threaded": threaded,
        "occupied_vehicle_steps_per_s": occupied_rates,
        "mean_occupied_slots": occupancy,
        "speedup_vs_loop": loop_sec / eng_sec,
        "speedup_vs_loop_one_thread": loop_sec / eng1_sec,
        "speedup_vs_loop_cpu_time": cpu_speedup,
        **env_rates,
        **compile_info,
        "vs_loop": {
            "scenes": n_s,
            "vehicle_slots": num_slots,
            "steps": n_k,
            "first_step": cfg["warmup_steps"],
            "engine_s_per_step": eng_sec,
            "engine_one_thread_s_per_step": eng1_sec,
            "loop_s_per_step": loop_sec,
            "loop_vehicle_steps_per_s": n_s * num_slots / loop_sec,
            "states_agree": agree,
            "max_abs_diff": worst,
        },
        "settings": {
            "scenario": SCENARIO,
            "vehicle_slots": num_slots,
            "scene_counts": list(SCENE_COUNTS),
            "actions": "zero (the ego keeps its speed and heading); timing covers engine.step only",
            "threads": sim_threads(),
            "statistic": "median over repeats, each repeat from the same warmed-up state",
            "seeds": "0 .. scenes-1",
            **cfg,
        },
        "targets": TARGETS,
        "meets_targets": {
            k: (values[k] <= t if k == "compile_s" else values[k] >= t) for k, t in TARGETS.items() if k in values
        },
        "machine": {**machine, "load_avg_1min_at_end": benchkit.load_avg()},
        "caution": benchkit.CAUTION,
    }


def main(argv: list[str] | None = None) -> int:
    return benchkit.main(
        run,
        "Simulator throughput: engine vehicle-steps/s, speed-up over a per-vehicle Python "
        "loop, environment step rates, compile time.",
        argv,
    )


if __name__ == "__main__":
    sys.exit(main())
