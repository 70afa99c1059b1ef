"""The engine split over threads (``wmplan.sim.threads``): the same futures and states for any thread count.

What is checked (contracts of this project, common practice, no source:
docs/references.md#practice-determinism): scenes are independent and every random draw is keyed by the scene,
so the oracle's futures and a stepped batch are bit-identical whether the scenes run on one thread or are
split into chunks over several; chunks cover every scene once; an error in a chunk reaches the caller; a bad
``WMPLAN_SIM_THREADS`` is refused in one line naming the variable.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import wmplan.sim.threads as threads_module
from wmplan.errors import ConfigError
from wmplan.scenario import load_scenario
from wmplan.sim import SimParams, TrafficState, initial_state, step
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.oracle import oracle_futures_batch
from wmplan.sim.threads import ENV_VAR, chunk_bounds, map_chunks, sim_threads


@pytest.fixture
def small_chunks(monkeypatch):
    """Split batches from 128 scenes per thread on (the default threshold is set for speed, not for tests)."""
    monkeypatch.setattr(threads_module, "MIN_SCENES_PER_THREAD", 128)


@pytest.mark.parametrize("num_scenes,threads", [(1, 4), (255, 2), (256, 2), (1000, 3), (4096, 4), (129, 1)])
def test_chunks_cover_every_scene_once(num_scenes, threads, small_chunks):
    bounds = chunk_bounds(num_scenes, threads)
    assert bounds[0][0] == 0 and bounds[-1][1] == num_scenes
    assert all(b[1] == c[0] for b, c in zip(bounds[:-1], bounds[1:], strict=True))
    assert len(bounds) == max(1, min(threads, num_scenes // 128))


def test_oracle_futures_do_not_depend_on_the_thread_count(small_chunks):
    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    st = initial_state(params, np.arange(4))
    for _ in range(25):
        st, _ = step(st, rule_actions(st, params), params)
    gen = np.random.default_rng(5)
    plans = np.stack([gen.uniform(-2, 2, (4, 16, 10)), gen.uniform(-0.02, 0.02, (4, 16, 10))], axis=-1)
    # 4 scenes x 16 plans x 8 futures = 512 rollouts: split into 1, 2 and 4 chunks of at least 128
    runs = [oracle_futures_batch(st, params, np.arange(4), plans, 8, seed=11, threads=t) for t in (1, 2, 4)]
    for other in runs[1:]:
        for f in dataclasses.fields(other):
            assert np.array_equal(getattr(runs[0], f.name), getattr(other, f.name)), f.name


def test_chunked_stepping_equals_one_batch(small_chunks):
    params = SimParams.from_scenario(load_scenario("cut-in"))
    st = initial_state(params, np.arange(300))

    def run(a, b):
        s = st.rows(a, b)
        for _ in range(20):
            s, _ = step(s, rule_actions(s, params), params)
        return s

    ends = map_chunks(run, 300, threads=2)  # results in chunk order
    assert len(ends) == 2
    whole = st
    for _ in range(20):
        whole, _ = step(whole, rule_actions(whole, params), params)
    joined = TrafficState.concat(ends)
    for f in dataclasses.fields(TrafficState):
        assert np.array_equal(getattr(whole, f.name), getattr(joined, f.name)), f.name


def test_an_error_in_a_chunk_reaches_the_caller(small_chunks):
    def run(a, b):
        if a > 0:
            raise RuntimeError(f"chunk {a}:{b} failed")

    with pytest.raises(RuntimeError, match="chunk 150:300 failed"):
        map_chunks(run, 300, threads=2)


def test_thread_count_from_the_environment(monkeypatch):
    monkeypatch.setenv(ENV_VAR, "3")
    assert sim_threads() == 3
    for bad in ("0", "two", "-1"):
        monkeypatch.setenv(ENV_VAR, bad)
        with pytest.raises(ConfigError, match=f"^environment variable {ENV_VAR}={bad!r}: must be a whole number >= 1$"):
            sim_threads()
    monkeypatch.delenv(ENV_VAR)
    assert 1 <= sim_threads() <= 4


@pytest.mark.parametrize("name", ["onramp-merge", "stop-and-go"])
def test_step_is_bit_identical_for_any_thread_count(name, small_chunks):
    """``engine.step(..., threads=t)`` for t = 1, 2, 3, 4 on 600 scenes (chunks of at least 128) gives every field of
    the state and of the step's info bit for bit the same, over 30 steps of the rule-based ego."""
    params = SimParams.from_scenario(load_scenario(name))
    runs = []
    for t in (1, 2, 3, 4):
        st, infos = initial_state(params, np.arange(600)), []
        for _ in range(30):
            st, info = step(st, rule_actions(st, params), params, threads=t)
            infos.append(info)
        runs.append((st, infos))
    for st, infos in runs[1:]:
        for f in dataclasses.fields(TrafficState):
            assert np.array_equal(getattr(runs[0][0], f.name), getattr(st, f.name)), f.name
        for a, b in zip(runs[0][1], infos, strict=True):
            for f in ("collision", "offroad", "goal", "accel_mps2", "steer_rad", "log_weight"):
                assert np.array_equal(getattr(a, f), getattr(b, f)), f
