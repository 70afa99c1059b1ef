"""Simulator throughput: vehicle-steps per second of the batched engine, and its speed-up over a per-vehicle loop.

What is measured (open-road, 16 vehicle slots per scene, the ego's actions all zero, so it keeps its speed and
heading):

* ``vehicle_steps_per_s[S]`` for S = 64, 512, 2048 scenes: S x 16 slots x steps / seconds of ``engine.step``
  alone (no action computation), from a state already advanced ``warmup_steps`` steps (so the road is in its
  steady mix and numpy's code paths are warm); the median over ``repeats`` timings of ``timed_steps`` steps, each
  repeat starting from the same state. A slot counts whether or not it holds a vehicle (about 3/4 do);
  ``occupied_vehicle_steps_per_s`` counts only the occupied ones. ``vehicle_steps_per_cpu_s`` divides by the
  process's CPU time instead of wall-clock time: a cross-check when other programs share the machine.
* ``speedup_vs_loop``: seconds per step of ``wmplan.sim.loop_reference.step_loop`` (Python loops over scenes
  and vehicles, ``math`` on floats) divided by those of ``engine.step``, on identical states (same scenes, same
  steps), in the same process; the two final states are compared, and the result says whether they agree.
* ``threaded``: 8192 scenes (the oracle's batch size) stepped on one thread and split into contiguous chunks
  stepped in parallel threads of this process (``wmplan.sim.threads``), alternately, side by side: both rates, the
  ``speedup``, and whether the final states are equal. Smaller batches are not split (they lose: see that module).

Usage: ``python benchmarks/sim_throughput.py [--quick] [--json FILE]``; ``wmplan bench`` calls :func:`run`.
Importing this module runs nothing. Numbers depend on the machine and on what else it is doing; the load average
at the start is recorded with them.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

import numpy as np

SCENARIO = "open-road"
SCENE_COUNTS = (64, 512, 2048)
THREADED_SCENES = 8192  # 16 scenes x 64 plans x 8 futures: the oracle's batch at the default planner budget
FULL = dict(warmup_steps=30, timed_steps=30, repeats=7, loop_scenes=512, loop_steps=6, loop_repeats=3,
            engine_repeats_vs_loop=15)
QUICK = dict(warmup_steps=6, timed_steps=6, repeats=3, loop_scenes=512, loop_steps=3, loop_repeats=1,
             engine_repeats_vs_loop=5)


def _advance(step_fn, state, action, params, num_steps: int):
    for _ in range(num_steps):
        state, _ = step_fn(state, action, params)
    return state


def _time_steps(step_fn, state, action, params, num_steps: int, repeats: int):
    """Wall-clock and process-CPU seconds of ``num_steps`` steps from ``state``, ``repeats`` times each; and the
    state they end in."""
    wall, cpu = [], []
    end = state
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        end = _advance(step_fn, state, action, params, num_steps)
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return wall, cpu, end


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


def _machine() -> dict:
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    return {"platform": platform.platform(), "processor": platform.processor() or platform.machine(),
            "python": platform.python_version(), "numpy": np.__version__, "cpu_count": os.cpu_count(),
            "load_avg_1min_at_start": load}


def run(quick: bool = False) -> dict:
    """Measure; return the results as a JSON-ready dict (see the module docstring for what each number means)."""
    from wmplan.scenario import load_scenario
    from wmplan.sim import SimParams, initial_state, step
    from wmplan.sim.threads import chunk_bounds, map_chunks, sim_threads

    cfg = QUICK if quick else FULL
    machine = _machine()
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

    def run_chunk(a: int, b: int):
        return _advance(step, state.rows(a, b), action[a:b], params, cfg["timed_steps"])

    one_wall, many_wall = [], []
    for _ in range(max(3, cfg["repeats"] // 2)):
        t0 = time.perf_counter()
        one_end = _advance(step, state, action, params, cfg["timed_steps"])
        one_wall.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ends = map_chunks(run_chunk, n_big, threads)  # final states, in chunk order
        many_wall.append(time.perf_counter() - t0)
    same, _ = _max_abs_diff(one_end, type(one_end).concat(ends))
    work = n_big * num_slots * cfg["timed_steps"]
    threaded = {"scenes": n_big, "threads": len(bounds),
                "one_thread_vehicle_steps_per_s": work / statistics.median(one_wall),
                "threaded_vehicle_steps_per_s": work / statistics.median(many_wall),
                "speedup": statistics.median(one_wall) / statistics.median(many_wall),
                "same_states_as_one_thread": same}

    # --- the same steps done by the engine and by the per-vehicle loop ---
    from wmplan.sim.loop_reference import step_loop as loop_step

    n_s, n_k = cfg["loop_scenes"], cfg["loop_steps"]
    action = np.zeros((n_s, 2))
    state = _advance(step, initial_state(params, list(range(n_s))), action, params, cfg["warmup_steps"])
    eng_wall, eng_cpu, eng_end = _time_steps(step, state, action, params, n_k, cfg["engine_repeats_vs_loop"])
    loop_wall, loop_cpu, loop_end = _time_steps(loop_step, state, action, params, n_k, cfg["loop_repeats"])
    agree, worst = _max_abs_diff(eng_end, loop_end)
    eng_sec, loop_sec = statistics.median(eng_wall) / n_k, statistics.median(loop_wall) / n_k
    cpu_speedup = statistics.median(loop_cpu) / statistics.median(eng_cpu)

    return {
        "benchmark": "sim_throughput",
        "quick": quick,
        "vehicle_steps_per_s": rates,
        "vehicle_steps_per_cpu_s": cpu_rates,
        "threaded": threaded,
        "occupied_vehicle_steps_per_s": occupied_rates,
        "mean_occupied_slots": occupancy,
        "speedup_vs_loop": loop_sec / eng_sec,
        "speedup_vs_loop_cpu_time": cpu_speedup,
        "vs_loop": {
            "scenes": n_s, "vehicle_slots": num_slots, "steps": n_k, "first_step": cfg["warmup_steps"],
            "engine_s_per_step": eng_sec, "loop_s_per_step": loop_sec,
            "loop_vehicle_steps_per_s": n_s * num_slots / loop_sec,
            "states_agree": agree, "max_abs_diff": worst,
        },
        "settings": {
            "scenario": SCENARIO, "vehicle_slots": num_slots, "scene_counts": list(SCENE_COUNTS),
            "actions": "zero (the ego keeps its speed and heading); timing covers engine.step only",
            "statistic": "median over repeats, each repeat from the same warmed-up state",
            "seeds": "0 .. scenes-1", **cfg,
        },
        "targets": {"vehicle_steps_per_s_512": 5e6, "speedup_vs_loop": 100.0},
        "machine": {**machine, "load_avg_1min_at_end": os.getloadavg()[0] if hasattr(os, "getloadavg") else None},
        "note": "Throughput of a simplified traffic model on one machine; it certifies nothing about a real vehicle.",
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Simulator throughput: engine vehicle-steps/s and speed-up over a "
                                                 "per-vehicle Python loop.")
    parser.add_argument("--json", metavar="FILE", help="also write the results to FILE (atomically)")
    parser.add_argument("--quick", action="store_true", help="short runs (a smoke test, not for numbers)")
    args = parser.parse_args(argv)
    result = run(quick=args.quick)
    if args.json:
        from wmplan.io import atomic_write_json

        atomic_write_json(Path(args.json), result)
    print(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
