"""Rare-event estimation against problems with known answers.

The method under test is the multilevel cross-entropy method for rare events followed by importance sampling
(Rubinstein 1997, docs/references.md#rubinstein-1997-rare-events; Rubinstein & Kroese 2004,
docs/references.md#rubinstein-kroese-2004-cem; De Boer et al. 2005,
docs/references.md#de-boer-2005-cem-tutorial). Known answers:

* P(Z > 4), Z standard normal = scipy.stats.norm.sf(4) = 3.167124e-5 ([D],
  docs/references.md#rubinstein-1997-rare-events); the cross-entropy-optimal mean of a unit-variance normal
  proposal is E[Z | Z > 4] = phi(4) / (1 - Phi(4)) = 4.225607 ([D]), computed here from scipy.stats.norm.
* P(X > 20), X ~ Exp(mean 1) = e^-20 = 2.061154e-9 ([D]); the cross-entropy-optimal exponential mean is
  E[X | X > 20] = 21 by memorylessness ([D]).
* Defensive mixtures (Hesterberg 1995, from memory [M],
  docs/references.md#hesterberg-1995-defensive-mixtures): weights f / (alpha f + (1 - alpha) g) <= 1 / alpha
  follows from the definition.
* Plain Monte Carlo's variance at N samples is p (1 - p) / N (binomial variance, common practice, no source:
  docs/references.md#practice-monte-carlo-tolerance).
* Wilson intervals: the table [D] of docs/references.md#wilson-1927 and
  scipy.stats.binomtest(...).proportion_ci(method="wilson") ([S], docs/references.md#lib-scipy).

Coverage over 20 seeds: a correct 95% interval covers the truth in at least 15 of 20 runs with probability
1 - P(Binomial(20, 0.95) <= 14) = 0.9974 (scipy.stats.binom.cdf), so the bound is loose but can fail.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binom, binomtest, norm

from wmplan.intervals import wilson_interval
from wmplan.stress.rare_event import (
    DefensiveMixture,
    ExponentialFamily,
    GaussianFamily,
    cross_entropy_is,
    evaluate,
    is_estimate,
    plain_monte_carlo,
)

SEEDS = range(20)
MIN_COVERED = 15


def _gauss_tail(seed: int):
    return cross_entropy_is(
        lambda x: x[:, 0],
        GaussianFamily.standard(1),
        4.0,
        n_per_level=1000,
        n_final=4000,
        rng=np.random.default_rng(seed),
    )


def _exp_tail(seed: int):
    return cross_entropy_is(
        lambda x: x[:, 0],
        ExponentialFamily(np.ones(1)),
        20.0,
        n_per_level=2000,
        n_final=4000,
        rng=np.random.default_rng(seed),
    )


@pytest.mark.parametrize(
    ("run", "truth", "ce_mean"),
    [
        (_gauss_tail, float(norm.sf(4.0)), float(norm.pdf(4.0) / norm.sf(4.0))),
        (_exp_tail, math.exp(-20.0), 21.0),
    ],
)
def test_cross_entropy_is_covers_the_truth_and_beats_plain_monte_carlo(run, truth: float, ce_mean: float) -> None:
    """Over 20 seeds: the 95% interval covers the known probability in >= 15 runs; the mean estimate is within
    4 standard errors of the truth (no bias); the spread of the estimates is far below plain Monte Carlo's at the
    same number of evaluations; the final proposal's mean is near the cross-entropy optimum."""
    assert 1.0 - binom.cdf(MIN_COVERED - 1, 20, 0.95) > 0.997
    results = [run(seed) for seed in SEEDS]
    est = np.array([r.estimate for r in results])
    covered = sum(r.ci95[0] <= truth <= r.ci95[1] for r in results)
    assert covered >= MIN_COVERED
    assert abs(est.mean() - truth) <= 4.0 * est.std(ddof=1) / math.sqrt(len(est))
    budget = max(r.num_evaluations for r in results)
    plain_var = truth * (1 - truth) / budget
    assert est.var(ddof=1) < plain_var / 100.0
    assert all(r.reached for r in results)
    means = np.array([float(r.proposal.mean[0]) for r in results])
    assert means.mean() == pytest.approx(ce_mean, rel=0.02)
    assert all(r.ess > 50 for r in results)


def test_defensive_mixture_bounds_the_weights_and_keeps_the_estimate() -> None:
    """alpha f + (1 - alpha) g: its density is the mixture of scipy's normal densities, every weight f / mixture is
    at most 1 / alpha, and cross-entropy IS with alpha = 0.2 still covers P(Z > 4) in >= 15 of 20 seeds with a
    spread far below plain Monte Carlo's."""
    nominal, prop = GaussianFamily.standard(1), GaussianFamily(np.array([4.2]), np.array([1.0]))
    mix = DefensiveMixture(nominal, prop, 0.2)
    x = np.linspace(-6.0, 10.0, 401)[:, None]
    dens = 0.2 * norm.pdf(x[:, 0]) + 0.8 * norm.pdf(x[:, 0], 4.2, 1.0)
    assert np.allclose(np.exp(mix.log_pdf(x)), dens)
    assert np.all(np.exp(nominal.log_pdf(x) - mix.log_pdf(x)) <= 1.0 / 0.2 + 1e-12)
    truth = float(norm.sf(4.0))
    results = [
        cross_entropy_is(
            lambda z: z[:, 0],
            nominal,
            4.0,
            n_per_level=1000,
            n_final=4000,
            defensive=0.2,
            rng=np.random.default_rng(seed),
        )
        for seed in SEEDS
    ]
    assert sum(r.ci95[0] <= truth <= r.ci95[1] for r in results) >= MIN_COVERED
    est = np.array([r.estimate for r in results])
    assert est.var(ddof=1) < truth * (1 - truth) / results[0].num_evaluations / 100.0
    assert results[0].proposal.describe()["family"] == "defensive mixture"


def test_plain_monte_carlo_counts_and_uses_wilson() -> None:
    """Plain Monte Carlo on P(Z > 1) = norm.sf(1): the count's interval is scipy's Wilson interval and covers it."""
    res = plain_monte_carlo(lambda x: x[:, 0], GaussianFamily.standard(1), 1.0, 4000, rng=np.random.default_rng(3))
    ci = binomtest(res.failures, 4000).proportion_ci(method="wilson")
    assert res.ci95 == pytest.approx((ci.low, ci.high), abs=1e-12)
    assert res.ci95[0] <= norm.sf(1.0) <= res.ci95[1]


@pytest.mark.parametrize(
    ("k", "n", "lo", "hi"),
    [
        (3, 200, 0.005114, 0.043166),
        (0, 200, 0.0, 0.018845),
        (7, 50, 0.069508, 0.261862),
        (1, 1000, 0.000177, 0.005643),
    ],
)
def test_wilson_interval_matches_the_reference_table(k: int, n: int, lo: float, hi: float) -> None:
    """The Wilson values of docs/references.md#wilson-1927 (6 decimals) and scipy's binomtest."""
    got = wilson_interval(k, n)
    assert got == pytest.approx((lo, hi), abs=1e-6)
    ci = binomtest(k, n).proportion_ci(method="wilson")
    assert got == pytest.approx((ci.low, ci.high), abs=1e-12)


def test_gaussian_fit_is_the_weighted_mle_with_a_floor() -> None:
    """The fit is the weighted mean and weighted (biased) standard deviation, floored at std_floor x nominal."""
    rng = np.random.default_rng(0)
    x = rng.normal(size=(50, 2))
    w = rng.random(50)
    nominal = GaussianFamily.standard(2)
    fit = nominal.fit(x, w, nominal=nominal, std_floor=0.0)
    mean = np.average(x, axis=0, weights=w)
    std = np.sqrt(np.average((x - mean) ** 2, axis=0, weights=w))
    assert np.allclose(fit.mean, mean) and np.allclose(fit.std, std)
    narrow = nominal.fit(0.01 * x, w, nominal=nominal, std_floor=0.75)
    assert np.allclose(narrow.std, 0.75)
    # log density against scipy
    g = GaussianFamily(np.array([1.0, -2.0]), np.array([0.5, 2.0]))
    assert np.allclose(g.log_pdf(x), norm.logpdf(x, g.mean, g.std).sum(axis=1))


def test_fractional_values_estimate_the_conditional_probability() -> None:
    """A score may return (scores, values): with values = P(failure | x) exactly, the estimate of
    P(Z > 3 and a fair coin lands heads) = norm.sf(3) / 2 stays unbiased; values must be 0 below the level."""

    def score(x):
        s = x[:, 0] - 3.0
        return s, np.where(s >= 0, 0.5, 0.0)

    res = cross_entropy_is(
        score, GaussianFamily.standard(1), 0.0, n_per_level=1000, n_final=4000, rng=np.random.default_rng(1)
    )
    truth = norm.sf(3.0) / 2
    assert res.ci95[0] <= truth <= res.ci95[1]
    with pytest.raises(ValueError, match="score values must lie in"):
        evaluate(lambda x: (x[:, 0], np.ones(len(x))), np.array([[-1.0], [2.0]]), 0.0)


def test_is_estimate_by_hand() -> None:
    """Three samples, two failing with weights 2 and 6: estimate (2 + 6) / 3, ESS (8^2) / (4 + 36) = 1.6."""
    est, se, ess = is_estimate(np.array([1.0, 0.0, 1.0]), np.log(np.array([2.0, 5.0, 6.0])))
    assert est == pytest.approx(8.0 / 3.0)
    assert se == pytest.approx(np.std([2.0, 0.0, 6.0], ddof=1) / math.sqrt(3))
    assert ess == pytest.approx(1.6)
