"""The exploring policy's manoeuvres (wmplan/data/manoeuvres.py): drawn from their stated distributions, the same
in any batch, and counted in recorded windows as worked out by hand.

Distributions are checked with scipy.stats (docs/references.md#lib-scipy): the share of scenes that start a
manoeuvre against a binomial (``binomtest``), the kinds against their probabilities (``chisquare``), the braking
levels and lengths against uniform laws (``kstest``). Batch independence is a contract (common practice, no
source: docs/references.md#practice-determinism): the reference is the collection run a second way, compared with
``np.array_equal``.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest
from scipy import stats

from wmplan.data import Trajectories, collect, episode_seeds, load_dataset, simulate_dataset
from wmplan.data.manoeuvres import (
    DECEL_SHARE,
    HARD_BRAKE_S,
    HARD_BRAKE_SHARE,
    KIND_PROBS,
    KINDS,
    MANOEUVRE_RATE_PER_S,
    Manoeuvres,
    manoeuvre_shares,
)
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim import SimParams, initial_state

DT_S = 0.2
ALPHA = 1e-3  # a fixed-seed check fails only for a wrong law (or one seed in a thousand: then change nothing)


def _empty_road() -> SimParams:
    """open-road with no random traffic: no follower is ever near, so the plain start rate applies."""
    d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
    d["traffic"]["density_veh_per_km"] = [0.0] * len(d["road"]["lanes"])
    d["traffic"]["placed"] = []
    return SimParams.from_scenario(parse_scenario(d, source="empty-open-road"))


def _first_draws(n: int, seed: int) -> tuple[Manoeuvres, np.ndarray, SimParams]:
    params = _empty_road()
    state = initial_state(params, episode_seeds(seed, n))
    m = Manoeuvres(state.key, np.ones(n, dtype=bool))
    m.draw(0, DT_S, state, params)
    return m, state.ego_speed_mps, params


def test_manoeuvres_start_and_are_sized_as_their_laws_say():
    """40,000 scenes, one decision: starts ~ Binomial(n, rate x dt); kinds ~ KIND_PROBS; hard-braking levels ~
    U(HARD_BRAKE_SHARE) x the braking limit and their lengths ~ U(HARD_BRAKE_S) (rounded to whole decisions: the
    test compares the rounded law); strong decelerations ~ U(DECEL_SHARE) x the limit."""
    n = 40_000
    m, _, params = _first_draws(n, seed=3)
    started = m.kind >= 0
    assert stats.binomtest(int(started.sum()), n, MANOEUVRE_RATE_PER_S * DT_S).pvalue > ALPHA
    counts = np.bincount(m.kind[started], minlength=len(KINDS))
    expected = np.asarray(KIND_PROBS) * started.sum()
    assert stats.chisquare(counts, expected).pvalue > ALPHA
    brake = m.kind == KINDS.index("hard-brake")
    lo, hi = HARD_BRAKE_SHARE
    share = m.level[brake] / params.max_brake_mps2
    assert stats.kstest(share, stats.uniform(lo, hi - lo).cdf).pvalue > ALPHA
    # lengths: round(U(a, b) / dt) decisions; compare with the law of the rounded uniform, step by step
    steps = m.steps_left[brake]
    a, b = HARD_BRAKE_S
    for k in np.unique(steps):
        lo_s, hi_s = max(a, (k - 0.5) * DT_S), min(b, (k + 0.5) * DT_S)
        p = (hi_s - lo_s) / (b - a)
        assert stats.binomtest(int((steps == k).sum()), len(steps), p).pvalue > ALPHA
    decel = m.kind == KINDS.index("decelerate")
    lo, hi = DECEL_SHARE
    assert stats.kstest(m.level[decel] / params.max_brake_mps2, stats.uniform(lo, hi - lo).cdf).pvalue > ALPHA


def test_a_braking_manoeuvre_sets_the_acceleration_for_its_length_then_stops():
    """A running braking manoeuvre gives -level for exactly its number of decisions, then NaN (no override)."""
    m, v, _ = _first_draws(4000, seed=4)
    i = int(np.flatnonzero(m.kind == KINDS.index("hard-brake"))[0])
    n_steps, level = int(m.steps_left[i]), float(m.level[i])
    seen = [float(m.accel(np.zeros(len(v)), v)[i]) for _ in range(n_steps + 2)]
    assert seen[:n_steps] == [-level] * n_steps
    assert np.isnan(seen[n_steps:]).all()
    assert n_steps >= round(HARD_BRAKE_S[0] / DT_S)


@pytest.mark.parametrize("name", ["onramp-merge", "stop-and-go"])
def test_same_seed_same_data_whatever_the_batch_size(tmp_path, name):
    """Datasets of the same seed written with batch sizes 5 and 64 hold the same arrays bit for bit, and their
    explore episodes did brake hard (so the manoeuvres were part of what was compared)."""
    scn = load_scenario(name)
    a = simulate_dataset(scn, tmp_path / "a", episodes=12, seed=9, batch_size=5)
    b = simulate_dataset(scn, tmp_path / "b", episodes=12, seed=9, batch_size=64)
    for key, arr in a.traj.as_dict().items():
        assert np.array_equal(arr, b.traj.as_dict()[key]), key
    params = SimParams.from_scenario(scn)
    explore = a.traj.policy == 1
    assert explore.any()
    assert (a.traj.actions[explore, :, 0] <= -HARD_BRAKE_SHARE[0] * params.max_brake_mps2 + 1e-6).any()
    assert np.array_equal(load_dataset(tmp_path / "a").traj.actions, a.traj.actions)


def test_rules_episodes_do_not_change_and_explore_episodes_brake_hard_more_often():
    """The manoeuvres touch only ``explore`` episodes: ``rules`` episodes are bit for bit those without them.
    With them, more windows of onramp-merge hold a hard braking with a vehicle close behind."""
    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    seeds = episode_seeds(2, 48)
    with np.errstate(all="ignore"):
        plain = collect(params, seeds, manoeuvres=False)
        new = collect(params, seeds)
    rules = plain.policy == 0
    assert np.array_equal(plain.policy, new.policy) and rules.any() and (~rules).any()
    assert np.array_equal(plain.vehicles[rules], new.vehicles[rules])
    assert np.array_equal(plain.actions[rules], new.actions[rules])
    shares = [manoeuvre_shares(t.vehicles, t.actions, t.alive, params, history=5, horizon=15) for t in (plain, new)]
    assert shares[1]["hard_brake_follower_near"] > 1.5 * shares[0]["hard_brake_follower_near"]
    assert shares[1]["hard_brake"] > shares[0]["hard_brake"]


def _one_episode(accel_at: dict[int, float], t_n: int = 25) -> Trajectories:
    """One recorded episode on the empty road's lanes: the ego alone at 20 m/s in lane 1 but for one vehicle
    10 m behind (bumper gap) for the whole episode; the given actions at the given steps, zero elsewhere."""
    v_n = 3
    veh = np.zeros((1, t_n + 1, v_n, 8), dtype=np.float32)
    veh[..., 0, :] = [100.0, 5.25, 20.0, 0.0, 0.0, 4.7, 1.9, 1.0]
    veh[..., 1, :] = [100.0 - 4.7 - 10.0, 5.25, 20.0, 0.0, 0.0, 4.7, 1.9, 1.0]
    actions = np.zeros((1, t_n, 2), dtype=np.float32)
    for t, a in accel_at.items():
        actions[0, t, 0] = a
    alive = np.ones((1, t_n + 1), dtype=bool)
    return Trajectories(
        vehicles=veh,
        vehicle_id=np.zeros((1, t_n + 1, v_n), dtype=np.int32),
        actions=actions,
        alive=alive,
        collided=np.zeros(1, bool),
        offroad=np.zeros(1, bool),
        reached_goal=np.zeros(1, bool),
        policy=np.ones(1, np.int8),
        seeds=np.zeros(1, np.int64),
    )


def test_window_shares_match_a_count_by_hand():
    """25 decisions (26 recorded times), history 5, horizon 15: anchors 4..10 (t + 15 <= 25; 7 windows), window t
    sees actions t..t+14. A braking of -7 m/s^2 (0.875 of the 8 m/s^2 limit) at step 20 lies in the futures of
    anchors 6..10: 5 of 7; the vehicle
    10 m behind is within 30 m, so the same share has a follower near. -4 m/s^2 at step 2 lies in none.
    Worked by hand (counting, common practice, no source)."""
    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    assert params.max_brake_mps2 == 8.0
    t = _one_episode({20: -7.0, 2: -4.0})
    s = manoeuvre_shares(t.vehicles, t.actions, t.alive, params, history=5, horizon=15)
    assert s["windows"] == 7
    assert s["hard_brake"] == pytest.approx(5 / 7)
    assert s["hard_brake_follower_near"] == pytest.approx(5 / 7)
    assert s["decelerate"] == pytest.approx(5 / 7)
    assert s["lane_change"] == 0.0 and s["speed_change"] == 0.0
    # the ego dead from step 22 on: only anchors whose future ends by step 21 count (t + 15 <= 21: t = 4, 5, 6)
    t.alive[0, 22:] = False
    s = manoeuvre_shares(t.vehicles, t.actions, t.alive, params, history=5, horizon=15)
    assert s["windows"] == 3 and s["hard_brake"] == pytest.approx(1 / 3)
