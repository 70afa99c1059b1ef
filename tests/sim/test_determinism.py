"""Determinism and state contracts of the batched simulator.

A scene is a pure function of its seed: it must evolve bit for bit the same whether it runs alone or inside a
batch of other scenes, and a snapshot taken with ``TrafficState.to_arrays`` must restore a state that continues
exactly as the original. These are contract tests (common practice, no source:
docs/references.md#practice-determinism): the reference is the simulator itself run a second way, compared
with ``np.array_equal`` on every state field.

Every run uses the rule-based ego (``ego_rules.rule_actions``), so the ego's actions depend on the state and any
divergence would feed back into the traffic.
"""

from __future__ import annotations

import dataclasses
import re

import numpy as np
import pytest

from wmplan.scenario import builtin_names, load_scenario
from wmplan.sim import SimParams, TrafficState, initial_state, step
from wmplan.sim.ego_rules import rule_actions

FIELDS = tuple(f.name for f in dataclasses.fields(TrafficState))
SCENARIOS = (
    "courtesy-stop",
    "cut-in",
    "lane-drop",
    "lane-drop-turns",
    "onramp-merge",
    "open-road",
    "short-gap-cut-in",
    "stop-and-go",
)
BATCH = 512
NUM_STEPS = 100


def _params(name: str) -> SimParams:
    return SimParams.from_scenario(load_scenario(name))


def _advance(state: TrafficState, params: SimParams) -> TrafficState:
    new, _info = step(state, rule_actions(state, params), params)
    return new


def _assert_same(a: TrafficState, b: TrafficState, where: str) -> None:
    """Every field of two states equal bit for bit (same dtype and shape too)."""
    for name in FIELDS:
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype, f"{where}: field {name} dtype {x.dtype} != {y.dtype}"
        assert np.array_equal(x, y), f"{where}: field {name} differs"


def _batch_seeds(seed: int) -> np.ndarray:
    return np.random.default_rng(seed).choice(2**31 - 1, size=BATCH, replace=False)


def test_builtin_scenarios_are_the_ones_tested_here():
    """The parametrized tests below cover every built-in scenario; a new one must be added to SCENARIOS."""
    assert tuple(builtin_names()) == SCENARIOS


@pytest.mark.parametrize("name", SCENARIOS)
def test_scene_is_identical_alone_and_inside_a_batch_of_512(name):
    """Scene i of a 512-scene batch equals the same seed run alone, every field at every one of 100 steps.

    Checked for the first, a middle and the last position of the batch, and again inside a batch of 5 where the
    seed sits at another position (the result must not depend on the neighbours or the batch size).
    """
    params = _params(name)
    seeds = _batch_seeds(7)
    positions = (0, 137, BATCH - 1)
    batch = initial_state(params, seeds)
    alone = [initial_state(params, [seeds[i]]) for i in positions]
    small_seeds = np.array([seeds[5], seeds[9], seeds[137], seeds[1], seeds[2]])
    small = initial_state(params, small_seeds)
    for k in range(NUM_STEPS + 1):
        for j, i in enumerate(positions):
            _assert_same(batch.take([i]), alone[j], f"{name} seed {seeds[i]} step {k} (batch position {i})")
        _assert_same(small.take([2]), alone[1], f"{name} seed {seeds[137]} step {k} (batch of 5, position 2)")
        if k < NUM_STEPS:
            batch = _advance(batch, params)
            small = _advance(small, params)
            alone = [_advance(s, params) for s in alone]
    # The run must have exercised the dynamics: vehicles moved and the traffic changed over time.
    assert batch.step.min() == NUM_STEPS
    if any(d > 0 for d in params.scenario.traffic.density_veh_per_km):  # a scenario without random traffic has none
        assert (batch.next_id > initial_state(params, seeds).next_id).any(), "no vehicle entered in any scene"


@pytest.mark.parametrize("name", SCENARIOS)
def test_same_seeds_twice_give_identical_runs(name):
    params = _params(name)
    seeds = _batch_seeds(11)[:32]
    a = initial_state(params, seeds)
    b = initial_state(params, seeds.copy())
    for k in range(NUM_STEPS):
        _assert_same(a, b, f"{name} step {k}")
        a, b = _advance(a, params), _advance(b, params)
    _assert_same(a, b, f"{name} step {NUM_STEPS}")


@pytest.mark.parametrize("name", SCENARIOS)
def test_different_seeds_give_different_runs(name):
    """Every pair of 16 distinct seeds differs in the traffic (vehicle rows and hidden traits), at the start and
    after 50 steps; after 50 steps the vehicle rows alone differ (different traits led to different motion)."""
    params = _params(name)
    seeds = np.arange(16) + 1000
    st = initial_state(params, seeds)
    assert len(np.unique(st.key)) == len(seeds)
    for moment in ("start", "after 50 steps"):
        rows = st.vehicles().reshape(len(seeds), -1)
        if moment == "start":
            rows = np.concatenate([rows, st.traits.reshape(len(seeds), -1)], axis=1)
        for i in range(len(seeds)):
            for j in range(i + 1, len(seeds)):
                assert not np.array_equal(rows[i], rows[j]), f"{name}: seeds {seeds[i]} and {seeds[j]} agree {moment}"
        for _ in range(50):
            st = _advance(st, params)


@pytest.mark.parametrize("name", ["onramp-merge", "stop-and-go"])
def test_snapshot_restore_mid_episode_continues_identically(name, tmp_path):
    """to_arrays -> np.savez -> np.load -> from_arrays at step 40, then 60 more steps: identical to not restoring."""
    params = _params(name)
    st = initial_state(params, np.arange(24) + 500)
    for _ in range(40):
        st = _advance(st, params)
    snap = st.to_arrays()
    assert set(snap) == set(FIELDS)
    path = tmp_path / "snapshot.npz"
    np.savez(path, **snap)
    with np.load(path) as loaded:
        restored = TrafficState.from_arrays({k: loaded[k] for k in loaded.files})
    _assert_same(restored, st, f"{name} restored at step 40")
    for k in range(60):
        st, restored = _advance(st, params), _advance(restored, params)
        _assert_same(restored, st, f"{name} step {41 + k} after restore")


def test_snapshot_is_a_copy_not_a_view():
    """Writing into a snapshot (or into the arrays a state was restored from) never changes the state."""
    params = _params("open-road")
    st = _advance(initial_state(params, [3, 4]), params)
    before = st.to_arrays()
    snap = st.to_arrays()
    snap["x_m"][:] = -1.0
    snap["valid"][:] = False
    restored = TrafficState.from_arrays(snap)
    snap["x_m"][:] = 123.0
    assert np.array_equal(restored.x_m, -np.ones_like(st.x_m))
    _assert_same(st, TrafficState.from_arrays(before), "original after writing into its snapshot")


def test_from_arrays_refuses_a_missing_field():
    snap = initial_state(_params("open-road"), [1]).to_arrays()
    del snap["cooldown_s"]
    with pytest.raises(ValueError, match=re.escape("snapshot is missing field(s) ['cooldown_s']")):
        TrafficState.from_arrays(snap)


def test_from_arrays_refuses_mismatched_shapes():
    snap = initial_state(_params("open-road"), [1, 2]).to_arrays()
    snap["y_m"] = snap["y_m"][:, :-1]
    with pytest.raises(
        ValueError, match=re.escape("snapshot field y_m has shape (2, 15), expected leading axes (2, 16)")
    ):
        TrafficState.from_arrays(snap)


def test_step_changes_nothing_in_place():
    """``step`` returns a new state; the state passed in keeps every value (a contract of this project: the
    state is a frozen dataclass, DEVELOPERS.md, "Layout and data flow")."""
    params = _params("onramp-merge")
    st = initial_state(params, np.arange(32))
    for _ in range(20):
        before = st.to_arrays()
        new = _advance(st, params)
        _assert_same(st, TrafficState.from_arrays(before), "input state after step")
        st = new


def test_take_selects_and_repeats_scenes():
    """take(idx) then step == step then take(idx); a repeated scene evolves identically to its copy."""
    params = _params("lane-drop")
    st = initial_state(params, np.arange(10) + 40)
    idx = [7, 2, 7, 0]
    sub = st.take(idx)
    assert sub.num_scenes == 4 and sub.num_vehicles == st.num_vehicles
    for k in range(60):
        _assert_same(sub, st.take(idx), f"take at step {k}")
        _assert_same(sub.take([0]), sub.take([2]), f"repeated scene at step {k}")
        st, sub = _advance(st, params), _advance(sub, params)
    # take copies: writing into the selection leaves the source alone
    sub.x_m[:] = 0.0
    assert not np.array_equal(st.take(idx).x_m, sub.x_m)
    # a scalar index gives a batch of one
    assert st.take(3).num_scenes == 1


def test_concat_joins_batches_and_steps_like_one_batch():
    params = _params("cut-in")
    st = initial_state(params, np.arange(20) + 77)
    parts = [st.take(range(0, 7)), st.take(range(7, 20))]
    joined = TrafficState.concat(parts)
    _assert_same(joined, st, "concat of the two halves")
    for k in range(50):
        parts = [_advance(p, params) for p in parts]
        st = _advance(st, params)
        _assert_same(TrafficState.concat(parts), st, f"step {k + 1}")


def test_step_refuses_a_wrong_action_shape():
    params = _params("open-road")
    st = initial_state(params, [0, 1, 2])
    with pytest.raises(ValueError, match=re.escape("action must have shape (3, 2) (accel_mps2, steer_rad), got (2,)")):
        step(st, np.zeros(2), params)


@pytest.mark.parametrize("name", ["onramp-merge", "cut-in"])
def test_engine_made_pickled_and_rebuilt_states_step_alike(name):
    """An engine-made state (its fields views of the engine's packed arrays, made on first read), a pickled copy
    (fields only) and a state rebuilt from copies of its fields continue bit for bit alike over 60 steps; reading a
    field of the engine-made state gives the same array every time, and the state it came from is unchanged."""
    import pickle

    params = _params(name)
    st = initial_state(params, np.arange(24) + 5)
    for _ in range(17):
        st = _advance(st, params)
    before = st.to_arrays()
    assert st.x_m is st.x_m and st.traits is st.traits
    copies = [st, pickle.loads(pickle.dumps(st)), TrafficState.from_arrays(st.to_arrays())]
    for k in range(60):
        copies = [_advance(c, params) for c in copies]
        for c in copies[1:]:
            _assert_same(copies[0], c, f"step {k}")
    for field, value in before.items():
        np.testing.assert_array_equal(getattr(st, field), value)
    with pytest.raises(AttributeError):
        _ = st.no_such_field


def test_one_compiled_specialisation_whatever_the_inputs():
    """Read-only, strided and other-typed inputs (actions, groups, plans, state fields) are copied into the one
    layout the compiled functions take, so each is compiled once (a second specialisation of the step costs tens
    of seconds on first use); their results equal those of ordinary inputs."""
    from wmplan.sim import engine, kernel
    from wmplan.sim.ego_rules import _rule_actions, rule_actions
    from wmplan.sim.engine import step_groups
    from wmplan.sim.observe import _observe_scenes, observe
    from wmplan.sim.oracle import _rollout_range, oracle_futures_batch

    params = _params("onramp-merge")
    st = initial_state(params, np.arange(6))
    arrays = st.to_arrays()
    for value in arrays.values():
        value.flags.writeable = False
    frozen = TrafficState(**{k: (v[:, ::-1][:, ::-1] if v.ndim == 2 else v) for k, v in arrays.items()})
    act = np.zeros((6, 2), dtype=np.float32)
    act.flags.writeable = False
    group = np.zeros(6, dtype=np.int32)
    group.flags.writeable = False
    a, _ = step(st, np.zeros((6, 2)), params)
    b, _ = step(frozen, act, params)
    c, _ = step_groups(frozen, act[:, ::1], engine.param_table(params), group)
    _assert_same(a, b, "read-only inputs")
    _assert_same(a, c, "step_groups, read-only int32 group")
    plans = np.zeros((1, 2, 3, 2), dtype=np.float32)
    plans.flags.writeable = False
    oracle_futures_batch(frozen, params, np.array([0]), plans, 2)
    rule_actions(frozen, params)
    observe(frozen, params)
    for fn in (kernel.step_range, _rollout_range, _rule_actions, _observe_scenes):
        assert len(fn.signatures) == 1, (fn.__name__, fn.signatures)
