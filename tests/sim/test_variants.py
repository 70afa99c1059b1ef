"""Scenes of several scenario variants in one batch (``wmplan.sim.variants``).

The contract (common practice, no source: docs/references.md#practice-determinism): a scene evolves bit for
bit as it does in a batch of its own variant, whatever other variants share the batch; variants that would
change the batch's shapes or clock are refused with a one-line error.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

from wmplan.errors import ConfigError
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.engine import step
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.variants import VariantBatch, batchable


def _variant(**changes) -> SimParams:
    d = copy.deepcopy(scenario_to_dict(load_scenario("onramp-merge")))
    for path, value in changes.items():
        section, key = path.split("__")
        d[section][key] = value
    return SimParams.from_scenario(parse_scenario(d, source=str(changes)))


def test_each_group_steps_as_it_would_alone():
    a = _variant()
    b = _variant(traffic__density_veh_per_km=[8.0, 40.0, 30.0], drivers__hard_brake_rate_per_min=3.0)
    seeds_a, seeds_b = np.array([3, 4]), np.array([5, 6, 7])
    batch = VariantBatch((a, b), (2, 3))
    assert batch.bounds == [(0, 2), (2, 5)] and batch.num_scenes == 5
    state = batch.initial_state(np.concatenate([seeds_a, seeds_b]))
    alone = [initial_state(a, seeds_a), initial_state(b, seeds_b)]
    rng = np.random.default_rng(0)
    for _ in range(40):
        act = np.column_stack([rng.uniform(-3, 2, 5), rng.uniform(-0.02, 0.02, 5)])
        state, info = batch.step(state, act)
        alone[0], _ = step(alone[0], act[:2], a)
        alone[1], _ = step(alone[1], act[2:], b)
        for got, want in ((state.rows(0, 2), alone[0]), (state.rows(2, 5), alone[1])):
            for name in ("x_m", "y_m", "vx_mps", "valid", "vehicle_id", "brake_timer_s", "collided"):
                np.testing.assert_array_equal(getattr(got, name), getattr(want, name), err_msg=name)
        assert info.collision.shape == (5,) and info.accel_mps2.shape[0] == 5
    # the two variants did differ: denser traffic in the second
    assert state.rows(2, 5).valid.sum() > 0


def test_variants_that_change_shapes_or_clock_are_refused():
    a = _variant()
    with pytest.raises(ConfigError, match="time step, the duration, the number of vehicle slots"):
        VariantBatch((a, _variant(traffic__max_vehicles=12)), (1, 1))
    with pytest.raises(ConfigError, match="holds 2 scenes, got 3 seeds"):
        VariantBatch((a, a), (1, 1)).initial_state(np.array([1, 2, 3]))
    base = load_scenario("onramp-merge")
    d = copy.deepcopy(scenario_to_dict(base))
    d["ego"]["speed_mps"] = 15.0
    d["drivers"]["politeness"]["mean"] = 0.4
    assert batchable([base, parse_scenario(d, source="x")])
    d["limits"]["max_brake_mps2"] = 6.0
    assert not batchable([base, parse_scenario(d, source="y")])
