"""The oracle: true futures of a saved scene (``oracle.oracle_futures``, ``oracle.branch``).

What is checked, and against what:

* contracts (common practice, no source: docs/references.md#practice-determinism): output shapes (C, K, H, V,
  8) and (C, K); the same seed gives the same futures and another seed other futures; the K futures are shared
  by all C plans (common random numbers), so two equal plans get bit-identical futures; bad arguments raise a
  one-line ``ValueError``;
* ``known`` mode with nothing random left gives K identical futures, equal bit for bit to the true continuation
  of the scene, stepped here by hand with each plan action held for the plan step;
* ``resampled`` mode keeps what an observer sees and re-draws the hidden traits; the re-drawn desired speeds are
  compared with ``scipy.stats.truncnorm`` (reference library, docs/references.md#lib-scipy) by ``scipy.stats.kstest``;
* multimodality: the yield decision of a driver beside the merging ego is drawn per future; its frequency over
  K = 400 ``known`` futures is compared with the driver's ``yield_prob`` by ``scipy.stats.binomtest``, and the
  two groups of futures are told apart by ``scipy.stats.mannwhitneyu``;
* collision flags against constant-speed and constant-deceleration kinematics worked out by hand
  (x = v t; stopping distance v^2 / (2 b), [C]: docs/references.md#practice-kinematics).
"""

from __future__ import annotations

import dataclasses
import functools
import re

import numpy as np
import pytest
import scipy.stats

from wmplan.scenario import load_scenario
from wmplan.sim import EGO, SimParams, TrafficState, initial_state, step
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.engine import mergers
from wmplan.sim.features import F_VX, NUM_VEHICLE_FEATURES
from wmplan.sim.oracle import OracleFutures, branch, oracle_futures
from wmplan.sim.params import T_V0, T_YIELD, TRAIT_NAMES

# Fields an observer can see (or that are bookkeeping of the scene, not of the drivers' minds).
OBSERVABLE = (
    "step",
    "next_id",
    "x_m",
    "y_m",
    "vx_mps",
    "vy_mps",
    "heading_rad",
    "length_m",
    "width_m",
    "valid",
    "vehicle_id",
    "lane",
    "brake_timer_s",
    "brake_decel_mps2",
    "cooldown_s",
    "ego_speed_mps",
    "ego_steer_rad",
)


def _params(name: str) -> SimParams:
    return SimParams.from_scenario(load_scenario(name))


def _warm_state(params: SimParams, seeds, num_steps: int) -> TrafficState:
    st = initial_state(params, seeds)
    for _ in range(num_steps):
        st, _info = step(st, rule_actions(st, params), params)
    return st


def _plans(num_plans: int, horizon: int, seed: int) -> np.ndarray:
    """(C, H, 2) gentle random plans: accelerations within +-1.5 m/s^2, steering within +-0.01 rad."""
    gen = np.random.default_rng(seed)
    return np.stack(
        [gen.uniform(-1.5, 1.5, (num_plans, horizon)), gen.uniform(-0.01, 0.01, (num_plans, horizon))], axis=-1
    )


def _all_equal(a: OracleFutures, b: OracleFutures) -> bool:
    return all(np.array_equal(getattr(a, f.name), getattr(b, f.name)) for f in dataclasses.fields(OracleFutures))


def test_output_shapes_and_dtypes():
    params = _params("onramp-merge")
    st = _warm_state(params, [1, 2, 3, 4], 10)
    fut = oracle_futures(st, params, _plans(3, 7, 0), 5, scene=2, mode="known", seed=0)
    v_n = params.num_vehicles
    assert fut.vehicles.shape == (3, 5, 7, v_n, NUM_VEHICLE_FEATURES) == (3, 5, 7, v_n, 8)
    assert fut.vehicles.dtype == np.float64
    assert fut.vehicle_id.shape == (3, 5, 7, v_n)
    for name in ("collided", "offroad", "failed"):
        arr = getattr(fut, name)
        assert arr.shape == (3, 5) and arr.dtype == bool, name
    assert fut.first_collision_step.shape == (3, 5)
    assert np.issubdtype(fut.first_collision_step.dtype, np.integer)
    assert np.array_equal(fut.failed, fut.collided | fut.offroad)
    assert np.isin(fut.vehicles[..., 7], (0.0, 1.0)).all()
    assert (fut.vehicles[..., EGO, 7] == 1.0).all()
    assert np.isfinite(fut.vehicles).all()


@pytest.mark.parametrize("mode", ["known", "resampled"])
def test_same_seed_same_futures_other_seed_other_futures(mode):
    """stop-and-go has random hard-braking events (1.5 per driver and minute), so futures are genuinely random."""
    params = _params("stop-and-go")
    st = _warm_state(params, [5, 6], 30)
    plans = _plans(2, 15, 1)
    a = oracle_futures(st, params, plans, 8, scene=1, mode=mode, seed=123)
    b = oracle_futures(st, params, plans, 8, scene=1, mode=mode, seed=123)
    c = oracle_futures(st, params, plans, 8, scene=1, mode=mode, seed=124)
    assert _all_equal(a, b)
    assert not np.array_equal(a.vehicles, c.vehicles)
    # within one call the K futures are not all alike either
    spread = [not np.array_equal(a.vehicles[0, 0], a.vehicles[0, k]) for k in range(1, 8)]
    assert sum(spread) >= 4, spread


def test_futures_are_shared_across_plans():
    """Common random numbers: plan 0 and plan 2 are equal, so their K futures are identical bit for bit; running
    plan 0 alone (C = 1) gives the same K futures again."""
    params = _params("onramp-merge")
    st = _warm_state(params, [8, 9, 10], 20)
    plans = _plans(3, 10, 2)
    plans[2] = plans[0]
    fut = oracle_futures(st, params, plans, 6, scene=0, mode="known", seed=7)
    for f in dataclasses.fields(OracleFutures):
        arr = getattr(fut, f.name)
        assert np.array_equal(arr[0], arr[2]), f.name
    assert not np.array_equal(fut.vehicles[0], fut.vehicles[1])  # a different plan moves the ego differently
    alone = oracle_futures(st, params, plans[:1], 6, scene=0, mode="known", seed=7)
    for f in dataclasses.fields(OracleFutures):
        assert np.array_equal(getattr(alone, f.name)[0], getattr(fut, f.name)[0]), f.name


def test_known_branch_keeps_every_trait_and_decision():
    params = _params("onramp-merge")
    st = _warm_state(params, np.arange(8), 15)
    scene = int(np.argmax((st.yield_state != 0).sum(axis=1)))
    assert (st.yield_state[scene] != 0).any(), "need a scene with a pending yield decision"
    br = branch(st, params, scene, 50, mode="known", seed=3)
    src = st.take(np.full(50, scene))
    for name in (*OBSERVABLE, "traits", "yield_state"):
        assert np.array_equal(getattr(br, name), getattr(src, name)), name
    assert len(np.unique(br.key)) == 50 and not (br.key == st.key[scene]).any()
    assert not (br.collided | br.offroad | br.reached_goal).any()
    # traits never change while a future runs: every vehicle present at the branch point keeps them
    nxt = br
    for _ in range(20):
        nxt, _info = step(nxt, np.zeros((50, 2)), params)
    same_vehicle = nxt.valid & (nxt.vehicle_id == br.vehicle_id) & br.valid
    assert same_vehicle[:, 1:].sum() > 50
    assert np.array_equal(nxt.traits[same_vehicle], br.traits[same_vehicle])


@pytest.mark.parametrize("plan_dt_s", [0.1, 0.2, 0.3])
def test_known_futures_without_random_events_equal_the_true_continuation(plan_dt_s):
    """open-road has no hard-braking events (rate 0) and no lane that ends (so no merger and no yield decision).
    Vehicles entering the simulated stretch are random too (lane, size and traits drawn from the future's key),
    so entries are switched off here (density 0 while stepping). Nothing random is left: all K futures must be
    identical, and equal to the scene stepped by hand with its own key, each plan action held for
    plan_dt_s / dt_s simulator steps."""
    params = _params("open-road")
    assert params.brake_prob_per_step == 0.0
    assert (params.merge_target == -1).all() and not params.lane_ends_on_road.any()
    st = _warm_state(params, np.arange(8) + 60, 30)
    quiet = dataclasses.replace(params, density_veh_per_m=np.zeros_like(params.density_veh_per_m))
    scene, k_n, h_n = 3, 16, 12
    assert st.valid[scene].sum() >= 8
    plans = _plans(2, h_n, 4)
    plans[1, :, 1] = 0.02  # the second plan drifts left into the next lane
    fut = oracle_futures(st, quiet, plans, k_n, scene=scene, mode="known", plan_dt_s=plan_dt_s, seed=9)
    sub = int(round(plan_dt_s / params.dt_s))
    for c in range(2):
        truth = st.take([scene])
        rows, ids = [], []
        for h in range(h_n):
            for _ in range(sub):
                truth, _info = step(truth, plans[c, h][None], quiet)
            rows.append(truth.vehicles()[0])
            ids.append(truth.vehicle_id[0])
        for k in range(k_n):
            assert np.array_equal(fut.vehicles[c, k], np.stack(rows)), f"plan {c} future {k}"
            assert np.array_equal(fut.vehicle_id[c, k], np.stack(ids)), f"plan {c} future {k}"
        assert (fut.collided[c] == truth.collided[0]).all()
    # the futures did move: the traffic advanced and the two plans differ
    assert (fut.vehicles[0, 0, -1, 1:, 0] != st.x_m[scene, 1:]).any()
    assert not np.array_equal(fut.vehicles[0], fut.vehicles[1])


def test_resampled_branch_keeps_what_is_seen_and_redraws_traits():
    params = _params("onramp-merge")
    st = _warm_state(params, np.arange(8), 15)
    scene = int(np.argmax((st.yield_state != 0).sum(axis=1)))
    n = 64
    br = branch(st, params, scene, n, mode="resampled", seed=5)
    src = st.take(np.full(n, scene))
    for name in OBSERVABLE:
        assert np.array_equal(getattr(br, name), getattr(src, name)), name
    assert (br.yield_state == 0).all(), "pending decisions must be forgotten"
    traffic = src.valid.copy()
    traffic[:, EGO] = False
    assert traffic[0].sum() >= 8
    drivers = params.scenario.drivers
    for t_idx, name in enumerate(TRAIT_NAMES):
        new, old = br.traits[..., t_idx], src.traits[..., t_idx]
        assert np.array_equal(new[~traffic], old[~traffic]), f"{name}: ego / empty slots must keep their values"
        if getattr(drivers, name).std == 0.0:
            assert np.array_equal(new[traffic], old[traffic]), f"{name} is constant in this scenario"
    # desired speed: continuous with bounds 4.3 std away, so every re-drawn value differs from the old one and the
    # re-drawn values differ between futures
    v0_new, v0_old = br.traits[..., T_V0][traffic], src.traits[..., T_V0][traffic]
    assert (v0_new != v0_old).all()
    per_vehicle = br.traits[..., T_V0][:, traffic[0]]  # (n, vehicles)
    assert (per_vehicle.std(axis=0) > 1.0).all()


@functools.lru_cache(maxsize=1)
def _resampled_desired_speeds(num_batches: int, per_batch: int) -> tuple[np.ndarray, object]:
    """Desired speeds of all traffic drivers of one open-road scene, re-drawn in num_batches x per_batch futures."""
    scn = load_scenario("open-road")
    params = SimParams.from_scenario(scn)
    st = initial_state(params, [3])
    draws = []
    for seed in range(num_batches):
        br = branch(st, params, 0, per_batch, mode="resampled", seed=1000 + seed)
        traffic = br.valid.copy()
        traffic[:, EGO] = False
        draws.append(br.traits[..., T_V0][traffic])
    return np.concatenate(draws), scn.drivers.desired_speed_mps


def _truncnorm(dist) -> scipy.stats.rv_continuous:
    return scipy.stats.truncnorm(
        (dist.low - dist.mean) / dist.std, (dist.high - dist.mean) / dist.std, loc=dist.mean, scale=dist.std
    )


def test_resampled_desired_speeds_follow_the_truncated_normal():
    """All re-drawn desired speeds (n >= 750000, 80000 futures x about 10 drivers) against scipy.stats.truncnorm with
    the scenario's mean 30, std 3, low 22, high 38; KS p > 1e-3, and no value exactly on a bound (a truncated
    normal puts probability 0 there). n is chosen so that a clipped normal would be caught: its CDF differs from
    the truncated one by Phi(-8/3) = 0.0038 at the bounds, about 1.7 times the KS critical value
    1.95 / sqrt(n) = 0.0022 at n = 800000."""
    x, d = _resampled_desired_speeds(8, 10_000)
    assert x.size >= 750_000
    assert ((x >= d.low) & (x <= d.high)).all()
    at_bounds = int(((x == d.low) | (x == d.high)).sum())
    assert at_bounds == 0, f"{at_bounds} of {x.size} draws lie exactly on a bound"
    assert scipy.stats.kstest(x, _truncnorm(d).cdf).pvalue > 1e-3


def test_resampled_desired_speeds_between_the_bounds_follow_the_truncated_normal():
    """The draws strictly inside (low, high) against scipy.stats.truncnorm (KS, p > 1e-3; for a clipped normal
    too, the part inside the bounds is exactly the truncated normal). Also the mean of all draws: 30 by symmetry,
    within 5 standard errors."""
    x, d = _resampled_desired_speeds(8, 10_000)
    inside = x[(x > d.low) & (x < d.high)]
    assert inside.size > 0.99 * x.size
    assert scipy.stats.kstest(inside, _truncnorm(d).cdf).pvalue > 1e-3
    assert abs(x.mean() - d.mean) < 5 * x.std() / np.sqrt(x.size)


def _undecided_yield_interaction() -> tuple[TrafficState, SimParams, int, int]:
    """A state of onramp-merge in which a lane-1 driver is about to begin a yield interaction with the ego.

    The ego keeps its lane (lane 0, the acceleration lane) at constant speed, so it is a merging vehicle once it is
    within the merge zone. Returns (state, params, scene, slot) where, in the step from ``state``, the driver in
    ``slot`` gets the ego as its merging partner for the first time: the ego is within the yield window ahead of
    it, no other merging vehicle is in between, and its yield decision is still 0 (not drawn). Only drivers with
    0.2 <= yield_prob <= 0.8 are taken, so that the binomial test has power.
    """
    params = _params("onramp-merge")
    st = initial_state(params, np.arange(64))
    hold = np.zeros((64, 2))
    for _ in range(60):
        nxt, _info = step(st, hold, params)
        begins = (st.yield_state == 0) & (nxt.yield_state != 0) & (st.lane == 1) & st.valid
        begins[:, EGO] = False
        is_merger, _target = mergers(params, st)
        for s, v in zip(*np.nonzero(begins), strict=True):
            dx = st.x_m[s, EGO] - st.x_m[s, v]
            between = is_merger[s] & (st.x_m[s] > st.x_m[s, v]) & (st.x_m[s] < st.x_m[s, EGO])
            if (
                is_merger[s, EGO]
                and 0.0 < dx < params.yield_window_m
                and not between.any()
                and 0.2 <= st.traits[s, v, T_YIELD] <= 0.8
            ):
                return st, params, int(s), int(v)
        st = nxt
    raise AssertionError("no undecided yield interaction with the ego found in 64 scenes x 60 steps")


def test_yield_decision_is_multimodal_and_matches_the_drivers_yield_prob():
    """K = 400 ``known`` futures from a state where the decision is not yet drawn: the driver yields in a fraction
    consistent with its yield_prob (scipy.stats.binomtest, p > 1e-3), neither never nor always; and the futures
    split in two: the yielders end the 3 s horizon slower than the others (scipy.stats.mannwhitneyu, p < 1e-6).

    Which futures yield is read by branching with the same seed (``oracle_futures`` branches with ``branch``) and
    stepping once with the plan's first action."""
    st, params, scene, slot = _undecided_yield_interaction()
    k_n, seed = 400, 11
    yield_prob = float(st.traits[scene, slot, T_YIELD])
    hold = np.zeros((1, 15, 2))
    br = branch(st, params, scene, k_n, mode="known", seed=seed)
    first, _info = step(br, np.repeat(hold[:, 0], k_n, axis=0), params)
    decision = first.yield_state[:, slot]
    assert (decision != 0).all(), "the interaction must begin in the first step of every future"
    yields = decision == 1
    k = int(yields.sum())
    assert 0 < k < k_n
    assert scipy.stats.binomtest(k, k_n, yield_prob).pvalue > 1e-3, (k, k_n, yield_prob)

    fut = oracle_futures(st, params, hold, k_n, scene=scene, mode="known", seed=seed)
    assert (fut.vehicle_id[0, :, :, slot] == st.vehicle_id[scene, slot]).all()
    end_speed = fut.vehicles[0, :, -1, slot, F_VX]
    test = scipy.stats.mannwhitneyu(end_speed[yields], end_speed[~yields], alternative="less")
    assert test.pvalue < 1e-6, (np.median(end_speed[yields]), np.median(end_speed[~yields]))


def test_resampled_yield_frequency_matches_the_population_mean():
    """In ``resampled`` mode the driver's yield_prob is re-drawn per future, so it yields with probability
    E[yield_prob] = 0.5 (a normal with mean 0.5 cut symmetrically at 0 and 1: mean 0.5 by symmetry, whether cut by
    truncation or by clipping); binomial test p > 1e-3 against 0.5, not against the driver's own value."""
    st, params, scene, slot = _undecided_yield_interaction()
    assert params.scenario.drivers.yield_prob.mean == 0.5
    k_n = 400
    br = branch(st, params, scene, k_n, mode="resampled", seed=12)
    first, _info = step(br, np.zeros((k_n, 2)), params)
    decision = first.yield_state[:, slot]
    assert (decision != 0).all()
    k = int((decision == 1).sum())
    assert scipy.stats.binomtest(k, k_n, 0.5).pvalue > 1e-3, k


def _stopped_vehicle_ahead() -> tuple[TrafficState, SimParams]:
    """open-road, ego at x = 100 m in lane 1 at 27 m/s; one vehicle (4.7 m long) stands still 70 m ahead (centre to
    centre) in the same lane, held by a long hard-braking event and barred from changing lanes by its cool-down.
    Vehicles still enter lanes 0 and 2 at random (so the K futures differ), none enters lane 1 (none can come up
    behind the braking ego)."""
    params = _params("open-road")
    arr = initial_state(params, [21]).to_arrays()
    arr["valid"][:, 1:] = False
    ego_x = float(arr["x_m"][0, EGO])
    assert ego_x == 100.0 and arr["lane"][0, EGO] == 1 and arr["ego_speed_mps"][0] == 27.0
    assert arr["length_m"][0, EGO] == 4.7
    for name, value in (
        ("valid", True),
        ("x_m", ego_x + 70.0),
        ("y_m", arr["y_m"][0, EGO]),
        ("vx_mps", 0.0),
        ("lane", 1),
        ("length_m", 4.7),
        ("width_m", 1.85),
        ("brake_timer_s", 100.0),
        ("brake_decel_mps2", 5.0),
        ("cooldown_s", 100.0),
    ):
        arr[name][0, 1] = value
    density = params.density_veh_per_m.copy()
    density[1] = 0.0
    return TrafficState.from_arrays(arr), dataclasses.replace(params, density_veh_per_m=density)


def test_collision_flags_for_a_stopped_vehicle_ahead():
    """Plan 0 holds 27 m/s: the gap of 70 - 4.7 = 65.3 m closes after 65.3 / 27 = 2.42 s, i.e. in simulator step 25
    (t = 2.5 s), which belongs to plan step 12 (steps 25-26 at 0.2 s per plan step): a collision in every future,
    first at plan step 12. Plan 1 brakes at the limit 8 m/s^2: it stops after 27 / 8 = 3.375 s and
    27^2 / (2 x 8) = 45.5625 m, short of the gap: no collision in any future, and at the end of the 4 s horizon it
    stands at x = 145.5625 m; after 3 s it is at 100 + 27 x 3 - 8 x 3^2 / 2 = 145 m doing 3 m/s."""
    st, params = _stopped_vehicle_ahead()
    plans = np.zeros((2, 20, 2))
    plans[1, :, 0] = -8.0
    fut = oracle_futures(st, params, plans, 32, mode="known", seed=2)
    assert fut.collided[0].all()
    assert (fut.first_collision_step[0] == 12).all()
    assert not fut.collided[1].any() and not fut.offroad.any()
    assert (fut.first_collision_step[1] == 20).all()
    np.testing.assert_allclose(fut.vehicles[1, :, -1, EGO, 0], 100.0 + 27.0**2 / 16.0, rtol=0, atol=1e-9)
    assert (fut.vehicles[1, :, -1, EGO, F_VX] == 0.0).all()
    np.testing.assert_allclose(fut.vehicles[1, :, 14, EGO, 0], 145.0, rtol=0, atol=1e-9)
    np.testing.assert_allclose(fut.vehicles[1, :, 14, EGO, F_VX], 3.0, rtol=0, atol=1e-9)
    # the stopped vehicle never moved, and the futures differ elsewhere (vehicles entering lanes 0 and 2)
    assert (fut.vehicles[:, :, :, 1, 0] == 170.0).all()
    assert len({fut.vehicles[0, k].tobytes() for k in range(32)}) > 1


@pytest.mark.parametrize("plan_dt_s", [0.15, 0.05, 0.25])
def test_plan_step_not_a_multiple_of_dt_is_refused(plan_dt_s):
    params = _params("open-road")
    st = initial_state(params, [0])
    msg = f"plan_dt_s ({plan_dt_s}) must be a whole multiple of the simulator step dt_s (0.1)"
    with pytest.raises(ValueError, match=f"^{re.escape(msg)}$") as err:
        oracle_futures(st, params, np.zeros((1, 3, 2)), 2, plan_dt_s=plan_dt_s)
    assert "\n" not in str(err.value)


@pytest.mark.parametrize(
    ("kwargs", "msg"),
    [
        ({"plans": np.zeros((3, 2))}, "plans must have shape (C, H, 2), got (3, 2)"),
        ({"plans": np.zeros((1, 3, 3))}, "plans must have shape (C, H, 2), got (1, 3, 3)"),
        ({"num_futures": 0}, "num_futures must be >= 1, got 0"),
        ({"mode": "psychic"}, "mode must be 'known' or 'resampled', got 'psychic'"),
    ],
)
def test_bad_arguments_are_refused_in_one_line(kwargs, msg):
    params = _params("open-road")
    st = initial_state(params, [0])
    args = {"plans": np.zeros((1, 3, 2)), "num_futures": 2, **kwargs}
    plans, k = args.pop("plans"), args.pop("num_futures")
    with pytest.raises(ValueError, match=f"^{re.escape(msg)}$"):
        oracle_futures(st, params, plans, k, **args)


# --- the compiled rollout against the engine's step, one step at a time (docs/references.md#practice-equivalence-test)


def _stepped_futures(state, params, scenes, plans, k_n, *, mode, plan_dt_s, seed):
    """What oracle_futures_batch computed before its rollout was compiled: the branches taken into (S, C, K)
    order and advanced by engine.step, plan step by plan step, their world rows recorded."""
    from wmplan.sim.oracle import substeps_per_plan_step

    s_n, c_n, h_n, _ = plans.shape
    sub = substeps_per_plan_step(params, plan_dt_s)
    branches = branch(state, params, scenes, k_n, mode=mode, seed=seed)
    take = (np.arange(s_n)[:, None, None] * k_n + np.arange(k_n)[None, None, :]).repeat(c_n, axis=1)
    st = branches.take(take.reshape(-1))
    actions = np.repeat(plans, k_n, axis=1).reshape(s_n * c_n * k_n, h_n, 2)
    rows, ids, first = [], [], np.full(st.num_scenes, h_n)
    for h in range(h_n):
        for _ in range(sub):
            st, _info = step(st, actions[:, h], params)
        rows.append(st.vehicles())
        ids.append(st.vehicle_id)
        first = np.where((first == h_n) & (st.collided | st.offroad), h, first)
    lead = (s_n, c_n, k_n)
    return (
        np.stack(rows, 1).reshape(*lead, h_n, st.num_vehicles, -1),
        np.stack(ids, 1).reshape(*lead, h_n, -1),
        st.collided.reshape(lead),
        st.offroad.reshape(lead),
        first.reshape(lead),
    )


@pytest.mark.parametrize("name", ["onramp-merge", "cut-in", "stop-and-go"])
@pytest.mark.parametrize("mode", ["known", "resampled"])
def test_compiled_rollout_equals_stepping_the_engine(name, mode):
    """Bit for bit, three scenes of a batch, 16 plans (hard braking and swerves: collisions and off-road ends
    happen), 6 futures, 15 plan steps of 0.2 s; on two threads and on one."""
    from wmplan.sim.oracle import oracle_futures_batch

    params = SimParams.from_scenario(load_scenario(name))
    st = initial_state(params, np.arange(5) + 40)
    for _ in range(25):
        st, _ = step(st, rule_actions(st, params), params)
    gen = np.random.default_rng(3)
    plans = np.stack([gen.uniform(-8.0, 3.0, (3, 16, 15)), gen.normal(0.0, 0.15, (3, 16, 15))], axis=-1)
    scenes, seeds = np.array([4, 0, 2]), np.array([7, 8, 9])
    want = _stepped_futures(st, params, scenes, plans, 6, mode=mode, plan_dt_s=0.2, seed=seeds)
    for threads in (2, 1):  # 288 futures: two chunks on two threads
        got = oracle_futures_batch(st, params, scenes, plans, 6, mode=mode, plan_dt_s=0.2, seed=seeds, threads=threads)
        for field, ref in zip(
            ("vehicles", "vehicle_id", "collided", "offroad", "first_collision_step"), want, strict=True
        ):
            np.testing.assert_array_equal(getattr(got, field), ref, err_msg=field)
    assert want[2].any() or want[3].any()


def test_per_scene_parameters_run_in_one_call_as_alone():
    """Scenes of two scenario variants (denser traffic, more hard braking, another yield probability) in one call
    give, scene by scene, the futures each gives alone with its own parameters."""
    import copy

    from wmplan.scenario import parse_scenario, scenario_to_dict
    from wmplan.sim.oracle import oracle_futures_batch

    base = load_scenario("onramp-merge")
    d = copy.deepcopy(scenario_to_dict(base))
    d["traffic"]["density_veh_per_km"] = [8.0, 40.0, 30.0]
    d["drivers"]["hard_brake_rate_per_min"] = 3.0
    pa, pb = SimParams.from_scenario(base), SimParams.from_scenario(parse_scenario(d, source="variant"))
    sa, sb = initial_state(pa, [1, 2]), initial_state(pb, [3])
    gen = np.random.default_rng(5)
    plans = np.stack([gen.uniform(-4.0, 2.0, (3, 4, 10)), gen.normal(0.0, 0.03, (3, 4, 10))], axis=-1)
    both = TrafficState.concat([sa, sb])
    for mode in ("known", "resampled"):
        got = oracle_futures_batch(both, [pa, pa, pb], np.array([0, 1, 2]), plans, 5, mode=mode, seed=[1, 2, 3])
        alone = [
            oracle_futures_batch(sa, pa, np.array([0, 1]), plans[:2], 5, mode=mode, seed=[1, 2]),
            oracle_futures_batch(sb, pb, np.array([0]), plans[2:], 5, mode=mode, seed=[3]),
        ]
        for field in ("vehicles", "vehicle_id", "collided", "offroad", "first_collision_step"):
            want = np.concatenate([getattr(a, field) for a in alone])
            np.testing.assert_array_equal(getattr(got, field), want, err_msg=field)
    with pytest.raises(ValueError, match="one per scene"):
        oracle_futures_batch(both, [pa, pb], np.array([0, 1, 2]), plans, 5)


def test_object_futures_equal_the_numpy_framing():
    """object_futures (compiled) equals gather_slots + the identity check + to_frame + the float32 cast, the numpy
    code the oracle predictor ran before, on futures where slots are refilled and vehicles leave."""
    from wmplan.sim.observe import gather_slots, observe, to_frame
    from wmplan.sim.oracle import object_futures, oracle_futures_batch

    params = SimParams.from_scenario(load_scenario("onramp-merge"))
    st = initial_state(params, np.arange(4) + 9)
    for _ in range(30):
        st, _ = step(st, rule_actions(st, params), params)
    gen = np.random.default_rng(2)
    plans = np.stack([gen.uniform(-6.0, 2.0, (2, 8, 15)), gen.normal(0.0, 0.1, (2, 8, 15))], axis=-1)
    scenes = np.array([1, 3])
    fut = oracle_futures_batch(st, params, scenes, plans, 4, seed=[5, 6])
    _, _, slots = observe(st.take(scenes), params, 12)  # 12 objects: padding rows too
    slots = slots.copy()
    slots[0, 3] = 15  # a slot that is empty or refilled in some futures
    pose = np.stack([st.x_m[scenes, EGO], st.y_m[scenes, EGO], st.heading_rad[scenes, EGO] + 0.3], axis=-1)
    anchor = np.take_along_axis(st.vehicle_id[scenes], np.where(slots >= 0, slots, 0), axis=1)
    b, c, k, h = fut.vehicles.shape[:4]
    sl = np.broadcast_to(slots[:, None, None, None, :], (b, c, k, h, slots.shape[1]))
    picked = gather_slots(fut.vehicles, sl)
    ids = np.take_along_axis(fut.vehicle_id, np.where(sl >= 0, sl, 0), axis=-1)
    picked[..., 7] *= (ids == anchor[:, None, None, None, :]) & (sl >= 0)
    want = to_frame(
        picked,
        np.broadcast_to(pose[:, None, None, None, :2], (b, c, k, h, 2)),
        np.broadcast_to(pose[:, None, None, None, 2], (b, c, k, h)),
    ).astype(np.float32)
    got = object_futures(fut, slots, anchor, pose)
    np.testing.assert_array_equal(got, want)
    assert got.dtype == np.float32 and (got[..., 7] == 0).any() and (got[..., 7] == 1).any()
