"""The scenarios where a hidden trait decides the outcome: from one start, the futures split on that trait.

This checks the scenario files' own claim (their header comments), not an outside formula: the oracle's
``resampled`` futures (traits re-drawn from the scenario's distributions, wmplan/sim/oracle.py) from the same
start must disagree about whether the neighbour swerves into the ego's lane, while its ``known`` futures (the
episode's own traits, no random events left in this scenario) all agree. The 400-episode comparison of planners
lives in benchmarks/scenario_discrimination.py, not in a test.
"""

from __future__ import annotations

import numpy as np

from wmplan.scenario import load_scenario
from wmplan.sim.features import F_X, F_Y
from wmplan.sim.oracle import oracle_futures
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state

HORIZON = 15  # plan steps of 0.2 s: 3 s
FUTURES = 64


def _swerves(fut, params: SimParams) -> np.ndarray:
    """(K,) whether the placed neighbour (slot 1) has its centre in the ego's lane, ahead of the ego, at some
    step of each future under the first plan."""
    rows = fut.vehicles[0]  # (K, H, V, F)
    own_lane = params.lane_of(rows[..., 0, F_Y])
    in_lane = params.lane_of(rows[..., 1, F_Y]) == own_lane
    ahead = rows[..., 1, F_X] > rows[..., 0, F_X]
    return (in_lane & ahead).any(axis=-1)


def test_short_gap_cut_in_futures_split_on_the_hidden_traits():
    """Keeping speed from the start (seed 0): with re-drawn traits, between 10 % and 90 % of 64 futures have the
    neighbour swerve in within 3 s; with each episode's own traits every future of that episode tells the same
    story, and the twelve episodes (seeds 0-11) do not all tell the same one."""
    params = SimParams.from_scenario(load_scenario("short-gap-cut-in"))
    state = initial_state(params, list(range(12)))
    keep = np.zeros((1, HORIZON, 2))
    resampled = _swerves(oracle_futures(state, params, keep, FUTURES, scene=0, mode="resampled", seed=5), params)
    assert 0.1 <= resampled.mean() <= 0.9, resampled.mean()
    outcomes = set()
    for scene in range(12):
        known = _swerves(oracle_futures(state, params, keep, 8, scene=scene, mode="known", seed=5), params)
        assert known.all() or not known.any(), (scene, known)
        outcomes.add(bool(known[0]))
    assert outcomes == {True, False}
