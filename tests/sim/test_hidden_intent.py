"""The scenarios where hidden intent decides the outcome: from one start, the futures split on it.

This checks the scenario files' own claims (their header comments), not an outside formula: the oracle's
``resampled`` futures (traits re-drawn from the scenario's distributions, wmplan/sim/oracle.py) from the same
start must disagree about what the decisive driver does (short-gap-cut-in, lane-drop-turns: whether the
neighbour moves into the ego's lane ahead of it; courtesy-stop: whether the lead brakes to let a waiting car in),
while its ``known`` futures (the episode's own traits and decisions, no random events left) all agree. The
400-episode comparison of planners lives in benchmarks/scenario_discrimination.py, not in a test.
"""

from __future__ import annotations

import numpy as np

from wmplan.scenario import load_scenario
from wmplan.sim.engine import step
from wmplan.sim.features import F_VX, F_X, F_Y
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


def _slot_at(state, params: SimParams, lane: int, offset_m: float) -> int:
    """The slot of scene 0 holding the vehicle placed in ``lane`` at ``offset_m`` ahead of the ego."""
    dx = state.x_m[0] - state.x_m[0, 0]
    hit = np.flatnonzero(state.valid[0] & (state.lane[0] == lane) & (np.abs(dx - offset_m) < 1e-9))
    assert len(hit) == 1, (lane, offset_m, hit)
    return int(hit[0])


def test_lane_drop_turns_futures_split_on_the_hidden_traits():
    """As for short-gap-cut-in, with the neighbour in the ending lane: keeping speed from the start (seed 0), with
    re-drawn traits between 10 % and 90 % of 64 futures have the neighbour move in ahead of the ego within 3 s; with
    each episode's own traits all futures of an episode agree, and episodes 0-11 do not all agree."""
    params = SimParams.from_scenario(load_scenario("lane-drop-turns"))
    state = initial_state(params, list(range(12)))
    assert _slot_at(state, params, 1, 8.0) == 1
    keep = np.zeros((1, HORIZON, 2))
    resampled = _swerves(oracle_futures(state, params, keep, FUTURES, scene=0, mode="resampled", seed=5), params)
    assert 0.1 <= resampled.mean() <= 0.9, resampled.mean()
    outcomes = set()
    for scene in range(12):
        known = _swerves(oracle_futures(state, params, keep, 8, scene=scene, mode="known", seed=5), params)
        assert known.all() or not known.any(), (scene, known)
        outcomes.add(bool(known[0]))
    assert outcomes == {True, False}


def _lead_stops(fut, slot: int) -> np.ndarray:
    """(K,) whether the vehicle in ``slot`` slows below 8 m/s at some step of each future under the first plan."""
    return (fut.vehicles[0][..., slot, F_VX] < 8.0).any(axis=-1)


def test_courtesy_stop_futures_split_on_the_lead_s_decision():
    """The lead's decision to let the waiting car in is drawn on the first step. From the start (before it, seed 0),
    keeping speed, between 10 % and 90 % of 64 futures have the lead slow below 8 m/s within 3 s, whether the
    traits are the episode's own (the decision is still to be drawn) or re-drawn. After one step the decision is
    part of the state: every known future of an episode then agrees, and episodes 0-11 do not all agree."""
    params = SimParams.from_scenario(load_scenario("courtesy-stop"))
    state = initial_state(params, list(range(12)))
    lead = _slot_at(state, params, 0, 16.0)
    keep = np.zeros((1, HORIZON, 2))
    for mode in ("known", "resampled"):
        split = _lead_stops(oracle_futures(state, params, keep, FUTURES, scene=0, mode=mode, seed=5), lead)
        assert 0.1 <= split.mean() <= 0.9, (mode, split.mean())
    after, _info = step(state, np.zeros((12, 2)), params)
    assert (after.yield_state[:, lead] > 0).all()
    outcomes = set()
    for scene in range(12):
        known = _lead_stops(oracle_futures(after, params, keep, 8, scene=scene, mode="known", seed=5), lead)
        assert known.all() or not known.any(), (scene, known)
        outcomes.add(bool(known[0]))
    assert outcomes == {True, False}
