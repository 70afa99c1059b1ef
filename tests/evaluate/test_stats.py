"""Reference tests of ``wmplan.evaluate.stats``: binomial intervals, t intervals, Brier score, reliability bins, ECE.

Sources (the tags [S], [M], [D], [C] are explained at the top of docs/references.md):
- Wilson (1927) and Clopper & Pearson (1934): docs/references.md#wilson-1927 and
  docs/references.md#clopper-pearson-1934; reference library
  scipy.stats.binomtest(k, n).proportion_ci(method='wilson' / 'exact') [S] (docs/references.md#lib-scipy); table
  values [D]; zero-event closed form 1 - (alpha/2)^(1/n) [D]. The example of scipy's documentation,
  binomtest(k=7, n=50, p=0.1).proportion_ci() -> (0.05819170033997342, 0.26739600249700846) [S], uses the default
  method 'exact': it is a Clopper-Pearson interval, not a Wilson one.
- Student t interval: reference library scipy.stats.ttest_1samp(...).confidence_interval; textbook formula
  mean +- t s / sqrt(n) (common practice [C], docs/references.md#practice-monte-carlo-tolerance).
- Brier (1950) score and expected calibration error (Naeini et al. 2015; Guo et al. 2017): the worked examples of
  docs/references.md#brier-1950 and docs/references.md#naeini-2015-ece [D] (citations from memory [M]).
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import scipy.stats

from wmplan.errors import ConfigError
from wmplan.evaluate import stats

TABLE_ROWS = [
    # k, n, Clopper-Pearson, Wilson [D]: docs/references.md#clopper-pearson-1934, docs/references.md#wilson-1927
    (3, 200, (0.003104, 0.043208), (0.005114, 0.043166)),
    (0, 200, (0.0, 0.018275), (0.0, 0.018845)),
    (7, 50, (0.058192, 0.267396), (0.069508, 0.261862)),
    (1, 1000, (0.000025, 0.005559), (0.000177, 0.005643)),
]


@pytest.mark.parametrize(("k", "n", "exact", "wilson"), TABLE_ROWS)
def test_intervals_against_scipy_and_table(k, n, exact, wilson):
    """Wilson and Clopper-Pearson match scipy binomtest proportion_ci [S] to 1e-10 and the table to 6 decimals."""
    ref = scipy.stats.binomtest(k, n)
    w_low, w_high = stats.wilson_interval(k, n)
    cp_low, cp_high = stats.clopper_pearson_interval(k, n)
    ref_w = ref.proportion_ci(confidence_level=0.95, method="wilson")
    ref_cp = ref.proportion_ci(confidence_level=0.95, method="exact")
    assert (w_low, w_high) == (
        pytest.approx(ref_w.low, rel=1e-10, abs=1e-15),
        pytest.approx(ref_w.high, rel=1e-10),
    )
    assert (cp_low, cp_high) == (
        pytest.approx(ref_cp.low, rel=1e-10, abs=1e-15),
        pytest.approx(ref_cp.high, rel=1e-10),
    )
    assert (w_low, w_high) == (pytest.approx(wilson[0], abs=1e-6), pytest.approx(wilson[1], abs=1e-6))
    assert (cp_low, cp_high) == (pytest.approx(exact[0], abs=1e-6), pytest.approx(exact[1], abs=1e-6))


def test_clopper_pearson_scipy_docs_example():
    """binomtest(k=7, n=50, p=0.1).proportion_ci() = (0.05819170033997342, 0.26739600249700846): the example of
    scipy's documentation [S], default method 'exact' (docs/references.md#clopper-pearson-1934)."""
    low, high = stats.clopper_pearson_interval(7, 50)
    assert low == pytest.approx(0.05819170033997342, rel=1e-12)
    assert high == pytest.approx(0.26739600249700846, rel=1e-12)


@pytest.mark.parametrize("n", [1, 10, 200])
def test_clopper_pearson_zero_and_all_events_closed_form(n):
    """k = 0: [0, 1 - (alpha/2)^(1/n)]; k = n: [(alpha/2)^(1/n), 1] (Beta(1, n) quantiles, [D]); 0.018275 at n = 200."""
    low, high = stats.clopper_pearson_interval(0, n)
    assert low == 0.0 and high == pytest.approx(1 - 0.025 ** (1 / n), rel=1e-12)
    low, high = stats.clopper_pearson_interval(n, n)
    assert high == 1.0 and low == pytest.approx(0.025 ** (1 / n), rel=1e-12)


def test_intervals_vectorised_and_other_levels():
    """Arrays of counts give the same intervals as scalar scipy calls, at 90 % too (scipy [S])."""
    k = np.array([0, 2, 5, 9, 10])
    w_low, w_high = stats.wilson_interval(k, 10, z=scipy.stats.norm.ppf(0.95))
    cp_low, cp_high = stats.clopper_pearson_interval(k, 10, alpha=0.1)
    for i, ki in enumerate(k):
        ref = scipy.stats.binomtest(int(ki), 10)
        ref_w = ref.proportion_ci(confidence_level=0.9, method="wilson")
        ref_cp = ref.proportion_ci(confidence_level=0.9, method="exact")
        assert w_low[i] == pytest.approx(ref_w.low, abs=1e-12) and w_high[i] == pytest.approx(ref_w.high, abs=1e-12)
        assert cp_low[i] == pytest.approx(ref_cp.low, abs=1e-12) and cp_high[i] == pytest.approx(ref_cp.high, abs=1e-12)


def test_brier_examples():
    """p = [0.9, 0.2, 0.7, 0.1], y = [1, 0, 0, 0] -> 0.1375; the ECE example's Brier -> 0.165 ([D],
    docs/references.md#brier-1950)."""
    assert stats.brier_score([0.9, 0.2, 0.7, 0.1], [1, 0, 0, 0]) == pytest.approx(0.1375, rel=1e-12)
    p = [0.1, 0.2, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9, 0.9]
    y = [0, 0, 1, 0, 0, 1, 0, 1, 1, 1]
    assert stats.brier_score(p, np.array(y, dtype=bool)) == pytest.approx(0.165, rel=1e-12)


def test_ece_and_reliability_bins_example():
    """Bins [0, 0.5) and [0.5, 1]: mean p 0.24 vs frequency 0.20 and 0.78 vs 0.80 -> ECE 0.03 ([D],
    docs/references.md#naeini-2015-ece)."""
    p = [0.1, 0.2, 0.2, 0.3, 0.4, 0.6, 0.7, 0.8, 0.9, 0.9]
    y = [0, 0, 1, 0, 0, 1, 0, 1, 1, 1]
    assert stats.expected_calibration_error(p, y, num_bins=2) == pytest.approx(0.03, abs=1e-12)
    bins = stats.reliability_bins(p, y, num_bins=2)
    assert [(b["low"], b["high"], b["count"]) for b in bins] == [(0.0, 0.5, 5), (0.5, 1.0, 5)]
    assert bins[0]["mean_pred"] == pytest.approx(0.24) and bins[0]["freq"] == pytest.approx(0.2)
    assert bins[1]["mean_pred"] == pytest.approx(0.78) and bins[1]["freq"] == pytest.approx(0.8)


def test_bin_convention_edges():
    """Equal-width bins, right-open except the last: 0.5 goes up, 1.0 stays in the last bin, 0.0 in the first;
    empty bins report NaN means (the module's stated convention)."""
    bins = stats.reliability_bins([0.0, 0.5, 1.0, 0.3], [0, 1, 1, 0], num_bins=10)
    counts = [b["count"] for b in bins]
    assert counts == [1, 0, 0, 1, 0, 1, 0, 0, 0, 1]
    assert math.isnan(bins[1]["mean_pred"]) and math.isnan(bins[1]["freq"])
    assert bins[9]["low"] == 0.9 and bins[9]["high"] == 1.0


@pytest.mark.parametrize("seed", [0, 1])
def test_ece_equals_loop_over_bins(seed):
    """The vectorised ECE equals sum_b (n_b / N) |freq_b - conf_b| written as a loop over the reported bins."""
    rng = np.random.default_rng(seed)
    p = rng.uniform(size=500)
    y = rng.uniform(size=500) < p**1.5
    bins = stats.reliability_bins(p, y, num_bins=15)
    ref = sum(b["count"] / 500 * abs(b["freq"] - b["mean_pred"]) for b in bins if b["count"])
    assert stats.expected_calibration_error(p, y, num_bins=15) == pytest.approx(ref, rel=1e-12)
    assert sum(b["count"] for b in bins) == 500


def test_ece_zero_when_calibrated_per_bin():
    """Within each bin the outcome frequency equals the mean prediction -> ECE 0 (definition, [D])."""
    p = [0.25] * 4 + [0.75] * 4
    y = [1, 0, 0, 0, 1, 1, 1, 0]
    assert stats.expected_calibration_error(p, y) == 0.0


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_mean_ci_against_scipy(seed, level):
    """mean +- t s / sqrt(n) equals scipy.stats.ttest_1samp(...).confidence_interval(level) (reference library)."""
    values = np.random.default_rng(seed).normal(3.0, 2.0, 17)
    ci = stats.mean_ci(values, level)
    ref = scipy.stats.ttest_1samp(values, 0.0).confidence_interval(confidence_level=level)
    assert ci.mean == pytest.approx(values.mean(), rel=1e-12)
    assert (ci.low, ci.high) == (pytest.approx(ref.low, rel=1e-12), pytest.approx(ref.high, rel=1e-12))
    assert ci.n == 17


def test_mean_ci_by_hand_and_edge_cases():
    """[1, 2, 3, 4, 5]: mean 3, s = sqrt(2.5), t_{0.975, 4} = 2.776445 -> half width 1.963243 ([D], t table value
    from scipy); one value -> NaN bounds; constant values -> zero width."""
    ci = stats.mean_ci([1, 2, 3, 4, 5])
    half = 2.7764451051977987 * math.sqrt(2.5) / math.sqrt(5)
    assert ci.mean == 3.0 and ci.low == pytest.approx(3 - half, rel=1e-12) and ci.high == pytest.approx(3 + half)
    assert half == pytest.approx(1.963243, abs=1e-6)
    one = stats.mean_ci([4.2])
    assert one.mean == 4.2 and math.isnan(one.low) and math.isnan(one.high)
    flat = stats.mean_ci([2.0, 2.0, 2.0])
    assert (flat.low, flat.high) == (2.0, 2.0)


def test_errors_name_the_value():
    """Bad input raises a one-line ConfigError naming the function, the value and the rule (DEVELOPERS.md,
    "Errors and files")."""
    with pytest.raises(ConfigError, match=re.escape("wilson_interval: needs integers 0 <= k <= n, got k=5 n=4")):
        stats.wilson_interval(5, 4)
    with pytest.raises(
        ConfigError,
        match=re.escape("clopper_pearson_interval: needs integers 0 <= k <= n with n > 0, got k=1.5"),
    ):
        stats.clopper_pearson_interval(1.5, 4)
    with pytest.raises(
        ConfigError, match=re.escape("brier_score: p must lie in [0, 1] (no NaN), got values from 0.2 to 1.2")
    ):
        stats.brier_score([0.2, 1.2], [0, 1])
    with pytest.raises(
        ConfigError,
        match=re.escape("expected_calibration_error: y must hold outcomes 0 or 1 (or booleans), got 2"),
    ):
        stats.expected_calibration_error([0.2, 0.3], [0, 2])
    with pytest.raises(ConfigError, match=re.escape("reliability_bins: p has 2 values but y has 3")):
        stats.reliability_bins([0.2, 0.3], [0, 1, 1])
    with pytest.raises(
        ConfigError, match=re.escape("mean_ci: values has 1 non-finite entries (inf/nan); filter them first")
    ):
        stats.mean_ci([1.0, math.inf])
    with pytest.raises(ConfigError, match=re.escape("reliability_bins: num_bins must be an integer >= 1, got 0")):
        stats.reliability_bins([0.2], [0], num_bins=0)


# --- near misses ----------------------------------------------------------------------------------------------
# Definition: no collision, and minimum time-to-collision below 1.5 s (a threshold widely used for serious traffic
# conflicts, van der Horst 1990, from memory: docs/references.md#van-der-horst-1990-ttc-threshold) or brake threat
# above 1
# (the brakes alone can no longer avoid the obstacle, wmplan/sim/threat.py). Rate interval: Wilson (1927) against
# scipy.stats.binomtest(...).proportion_ci(method="wilson").


def _row(collision=False, ttc=float("inf"), threat=0.0, **extra):
    return {"collision": collision, "min_ttc_s": ttc, "max_brake_threat": threat, **extra}


@pytest.mark.parametrize(
    ("row", "expected"),
    [
        (_row(ttc=1.49), True),
        (_row(ttc=1.5), False),  # strictly below the threshold
        (_row(ttc=3.0, threat=1.01), True),
        (_row(ttc=3.0, threat=1.0), False),  # strictly above 1
        (_row(ttc=0.2, threat=4.0, collision=True), False),  # a collision is counted as a collision only
        (_row(ttc=float("inf"), threat=0.3), False),  # no closing leader
        (_row(ttc=float("nan"), threat=float("nan")), False),
    ],
)
def test_near_miss_definition(row, expected):
    """The two criteria, their strict inequalities, and collisions excluded."""
    assert stats.is_near_miss(row) is expected


def test_near_miss_thresholds_are_parameters():
    """A stricter TTC threshold (1.0 s, used in some studies) or threat threshold changes the verdict."""
    assert stats.is_near_miss(_row(ttc=1.2), ttc_threshold_s=1.0) is False
    assert stats.is_near_miss(_row(ttc=9.0, threat=0.8), brake_threat_threshold=0.5) is True


def test_near_miss_rate_has_a_wilson_interval():
    """7 near misses in 40 rows: rate 0.175 and scipy's Wilson interval; a precomputed near_miss key wins."""
    rows = [_row(ttc=1.0)] * 7 + [_row(ttc=5.0)] * 33
    rate, ci = stats.near_miss_rate(rows)
    ref = scipy.stats.binomtest(7, 40).proportion_ci(confidence_level=0.95, method="wilson")
    assert rate == 0.175 and ci == [pytest.approx(ref.low, rel=1e-10), pytest.approx(ref.high, rel=1e-10)]
    flagged = [dict(r, near_miss=True) for r in rows]
    assert stats.near_miss_rate(flagged)[0] == 1.0
    assert stats.near_miss_flags([{"near_miss": False}]).tolist() == [False]


def test_near_miss_bad_input():
    """A missing field or an empty list is a one-line ConfigError naming the planner and the field."""
    with pytest.raises(ConfigError, match=re.escape("row 1 of planner 'rules' has no 'max_brake_threat' field")):
        stats.near_miss_flags([_row(), {"collision": False, "min_ttc_s": 2.0}], "rules")
    with pytest.raises(ConfigError, match=re.escape("near_miss_rate: planner 'rules' has no episode rows")):
        stats.near_miss_rate([], "rules")
    with pytest.raises(ConfigError, match=re.escape("ttc_threshold_s must be > 0, got 0")):
        stats.is_near_miss(_row(), ttc_threshold_s=0)
