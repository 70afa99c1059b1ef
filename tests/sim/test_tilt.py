"""Tilted random events (``wmplan.sim.tilt``): importance sampling inside an episode.

What is checked, and against what:

* the per-draw log-likelihood ratio against ``scipy.stats.bernoulli.logpmf`` (reference library,
  docs/references.md#lib-scipy);
* no tilt, or a tilt with factors 1, leaves the simulator bit for bit as it was, with zero log-weights (contract);
* the defining identity of importance sampling, E_g[W] = 1 with W = f(X) / g(X) (Owen, *Monte Carlo theory,
  methods and examples*, 2013, ch. 9; docs/references.md#owen-2013-monte-carlo): the mean episode weight of
  tilted runs is 1 within its standard error;
* unbiasedness, E_g[H W] = E_f[H], for an event H set off by the tilted draws, against plain Monte Carlo of the
  nominal simulator on other seeds (a two-sample z-test at 4 standard errors,
  docs/references.md#practice-monte-carlo-tolerance);
* the oracle ignores the tilt (it knows the nominal world);
* bad tilt values are refused with a one-line message naming the field and the range.

The statistical checks use a few thousand scenes; each runs in seconds.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from wmplan.scenario import load_scenario
from wmplan.sim import EGO, SimParams, initial_state, step
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.oracle import oracle_futures
from wmplan.sim.tilt import EventTilt, bernoulli_log_ratio


@pytest.fixture(scope="module")
def onramp() -> SimParams:
    return SimParams.from_scenario(load_scenario("onramp-merge"))


def _run(params: SimParams, seeds, num_steps: int, *, rules: bool):
    """Run scenes; return (log-weight per scene, near-ego brake seen per scene, ego refused per scene, states)."""
    state = initial_state(params, list(seeds))
    log_w = np.zeros(state.num_scenes)
    braked = np.zeros(state.num_scenes, dtype=bool)
    refused = np.zeros(state.num_scenes, dtype=bool)
    action = np.zeros((state.num_scenes, 2))
    states = []
    for t in range(num_steps):
        if rules and t % 2 == 0:
            action = rule_actions(state, params)
        state, info = step(state, action, params)
        log_w += info.log_weight
        dx = state.x_m - state.x_m[:, :1]
        near = state.valid & (np.abs(dx) <= 60.0) & (dx > -5.0)
        near[:, EGO] = False
        braked |= (near & (state.brake_timer_s > 0.0)).any(axis=1)
        refused |= (state.yield_state == 2).any(axis=1)
        states.append(state)
    return log_w, braked, refused, states


def test_log_ratio_matches_scipy_bernoulli():
    """log f(b)/g(b) = bernoulli.logpmf(b, p) - bernoulli.logpmf(b, q) (scipy.stats, reference library)."""
    rng = np.random.default_rng(3)
    p = rng.uniform(0.01, 0.99, 500)
    q = rng.uniform(0.01, 0.99, 500)
    b = rng.uniform(size=500) < 0.5
    ref = scipy.stats.bernoulli.logpmf(b.astype(int), p) - scipy.stats.bernoulli.logpmf(b.astype(int), q)
    np.testing.assert_allclose(bernoulli_log_ratio(b, p, q), ref, rtol=1e-12, atol=1e-12)
    # an outcome impossible under the nominal law weighs zero
    assert bernoulli_log_ratio(np.array([False]), np.array([1.0]), np.array([0.5]))[0] == -np.inf


@pytest.mark.parametrize("tilt", [None, EventTilt(), EventTilt(radius_m=10.0)])
def test_no_tilt_changes_nothing(onramp, tilt):
    """Factors of 1 (or no tilt): the same trajectory bit for bit as the nominal simulator, weights zero."""
    ref = _run(onramp, range(16), 120, rules=True)
    got = _run(onramp.with_tilt(tilt), range(16), 120, rules=True)
    assert np.all(got[0] == 0.0)
    for a, b in zip(ref[3], got[3], strict=True):
        np.testing.assert_array_equal(a.x_m, b.x_m)
        np.testing.assert_array_equal(a.yield_state, b.yield_state)
        np.testing.assert_array_equal(a.brake_timer_s, b.brake_timer_s)


def _check_importance_sampling(params, tilt, event: int, n: int, steps: int, rules: bool, other_seed: int):
    """E_g[W] = 1 within 4 standard errors, the tilted event more frequent, and E_g[H W] = E_f[H] against nominal
    Monte Carlo on other seeds (two-sample z-test at 4 standard errors). ``event`` picks H from ``_run``."""
    out_g = _run(params.with_tilt(tilt), range(n), steps, rules=rules)
    log_w, h_g = out_g[0], out_g[event]
    w = np.exp(log_w)
    assert np.any(log_w != 0.0)
    se_w = w.std(ddof=1) / np.sqrt(n)
    assert abs(w.mean() - 1.0) < 4.0 * se_w + 1e-12, (w.mean(), se_w)
    h_f = _run(params, range(other_seed, other_seed + n), steps, rules=rules)[event]
    est_is, se_is = (h_g * w).mean(), (h_g * w).std(ddof=1) / np.sqrt(n)
    est_mc, se_mc = h_f.mean(), h_f.std(ddof=1) / np.sqrt(n)
    assert h_g.mean() > est_mc + 3.0 * se_mc  # the tilt did make the event more frequent
    assert abs(est_is - est_mc) < 4.0 * np.hypot(se_is, se_mc), (est_is, se_is, est_mc, se_mc)


def test_brake_tilt_mean_weight_is_one_and_estimate_unbiased(onramp):
    """Hard-braking starts near the ego x3: E_g[W] = 1, and E_g[H W] = E_f[H] for H = a driver near the ego brakes
    hard within 10 s (importance-sampling identity, Owen 2013 ch. 9), against nominal Monte Carlo on other seeds."""
    _check_importance_sampling(onramp, EventTilt(brake_factor=3.0), 1, 3000, 100, rules=False, other_seed=10_000)


def test_yield_tilt_mean_weight_is_one_and_estimate_unbiased(onramp):
    """Drivers asked to let the merging ego in yield half as often: E_g[W] = 1 and E_g[H W] = E_f[H] for
    H = some driver refuses the ego, against nominal Monte Carlo on other seeds (rule-based ego on the ramp)."""
    _check_importance_sampling(onramp, EventTilt(yield_factor=0.5), 2, 1500, 260, rules=True, other_seed=20_000)


def test_oracle_ignores_the_tilt(onramp):
    """The oracle's futures are those of the nominal world whatever tilt the episode runs under (contract)."""
    state = initial_state(onramp, [5])
    plans = np.zeros((2, 15, 2))
    strong = onramp.with_tilt(EventTilt(brake_factor=50.0, yield_factor=0.1))
    a = oracle_futures(state, onramp, plans, 4, seed=1)
    b = oracle_futures(state, strong, plans, 4, seed=1)
    np.testing.assert_array_equal(a.vehicles, b.vehicles)
    # while the engine itself, run under that tilt for as long, does change (so the check above can fail)
    nominal, tilted = initial_state(onramp, [5, 6, 7, 8]), initial_state(onramp, [5, 6, 7, 8])
    for _ in range(30):
        nominal, _ = step(nominal, np.zeros((4, 2)), onramp)
        tilted, _ = step(tilted, np.zeros((4, 2)), strong)
    assert not np.array_equal(nominal.brake_timer_s, tilted.brake_timer_s)


@pytest.mark.parametrize(
    "kwargs, field, rng_text",
    [
        (dict(brake_factor=0.5), "brake_factor", "[1, 1000]"),
        (dict(brake_factor=float("nan")), "brake_factor", "[1, 1000]"),
        (dict(yield_factor=1.5), "yield_factor", "[0, 1]"),
        (dict(radius_m=-1.0), "radius_m", "[0, 10000]"),
        (dict(brake_factor=True), "brake_factor", "[1, 1000]"),
    ],
)
def test_bad_tilt_values_are_refused(kwargs, field, rng_text):
    with pytest.raises(ValueError) as err:
        EventTilt(**kwargs)
    msg = str(err.value)
    assert "\n" not in msg and f"EventTilt.{field}" in msg and rng_text in msg
