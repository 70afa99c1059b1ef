"""Statistics for evaluation tables: binomial and t intervals, Brier score, reliability bins, ECE (numpy/scipy).

Formulas and sources:

- Wilson (1927) score interval: defined once in :mod:`wmplan.intervals` (imported here).
- Clopper & Pearson (1934) exact interval: lower ``BetaInv(a/2; k, n-k+1)`` (0 if k = 0), upper
  ``BetaInv(1-a/2; k+1, n-k)`` (1 if k = n).
- Student t interval for a mean: ``mean +- t_{(1+level)/2, n-1} s / sqrt(n)``.
- Brier (1950) score ``mean((p - y)^2)``.
- Expected calibration error (Naeini, Cooper, Hauskrecht, AAAI 2015; Guo et al., ICML 2017):
  ``sum_b (n_b / N) |freq_b - mean_pred_b|`` over the non-empty bins.
- Near miss (:func:`is_near_miss`): an episode without a collision whose smallest time-to-collision fell below
  1.5 s or whose brake threat (:mod:`wmplan.sim.threat`) exceeded 1. The 1.5 s threshold is one widely used to call
  a traffic conflict serious (van der Horst 1990, TU Delft doctoral thesis; from memory:
  docs/references.md#van-der-horst-1990-ttc-threshold). Its rate gets a Wilson interval.

Bin convention (ECE depends on it): ``num_bins`` equal-width bins on [0, 1]; bin b is ``[b/B, (b+1)/B)``,
right-open, except the last, which is closed ``[(B-1)/B, 1]``. A prediction p goes to bin
``min(floor(p * B), B - 1)``.

Inputs are array-likes; scalar inputs give numpy scalars. Bad input raises :class:`wmplan.errors.ConfigError`
with a one-line message. Results on a simplified traffic model certify nothing about a real vehicle.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import scipy.stats

from wmplan.errors import ConfigError
from wmplan.evaluate.rows import NEAR_MISS_BRAKE_THREAT, NEAR_MISS_TTC_S
from wmplan.evaluate.rows import is_near_miss as near_miss_definition
from wmplan.intervals import Z_95, wilson_interval  # noqa: F401  (Z_95 for this module's users)

# --- input checks ---------------------------------------------------------------------------------------------


def _counts(fn: str, k: object, n: object) -> tuple[np.ndarray, np.ndarray]:
    k_arr = np.asarray(k, dtype=np.float64)
    n_arr = np.asarray(n, dtype=np.float64)
    try:
        k_arr, n_arr = np.broadcast_arrays(k_arr, n_arr)
    except ValueError:
        raise ConfigError(f"{fn}: k of shape {k_arr.shape} and n of shape {n_arr.shape} do not broadcast") from None
    bad = ~np.isfinite(k_arr) | ~np.isfinite(n_arr) | (k_arr != np.round(k_arr)) | (n_arr != np.round(n_arr))
    bad |= (n_arr <= 0) | (k_arr < 0) | (k_arr > n_arr)
    if bad.any():
        i = np.flatnonzero(bad.ravel())[0]
        raise ConfigError(
            f"{fn}: needs integers 0 <= k <= n with n > 0, got k={k_arr.ravel()[i]:g} n={n_arr.ravel()[i]:g}"
        )
    return k_arr, n_arr


def _level(fn: str, name: str, value: float) -> float:
    value = float(value)
    if not 0.0 < value < 1.0:
        raise ConfigError(f"{fn}: {name} must lie in (0, 1), got {value!r}")
    return value


def _predictions(fn: str, p: object, y: object) -> tuple[np.ndarray, np.ndarray]:
    p_arr = np.asarray(p, dtype=np.float64).ravel()
    y_arr = np.asarray(y, dtype=np.float64).ravel()
    if p_arr.shape != y_arr.shape:
        raise ConfigError(f"{fn}: p has {p_arr.size} values but y has {y_arr.size}; pass one outcome per prediction")
    if p_arr.size == 0:
        raise ConfigError(f"{fn}: p and y are empty; pass at least one prediction")
    if not np.all((p_arr >= 0) & (p_arr <= 1)):
        lo, hi = float(np.min(p_arr)), float(np.max(p_arr))
        raise ConfigError(f"{fn}: p must lie in [0, 1] (no NaN), got values from {lo:g} to {hi:g}")
    if not np.all((y_arr == 0) | (y_arr == 1)):
        bad = y_arr[(y_arr != 0) & (y_arr != 1)][0]
        raise ConfigError(f"{fn}: y must hold outcomes 0 or 1 (or booleans), got {bad:g}")
    return p_arr, y_arr


def _check_bins(fn: str, num_bins: int) -> None:
    if isinstance(num_bins, bool) or not isinstance(num_bins, int | np.integer) or num_bins < 1:
        raise ConfigError(f"{fn}: num_bins must be an integer >= 1, got {num_bins!r}")


# --- binomial intervals ---------------------------------------------------------------------------------------


def clopper_pearson_interval(k: object, n: object, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Clopper & Pearson (1934) exact interval for a binomial proportion.

    Args:
        k: (...) event counts, integers 0..n.
        n: (...) trial counts > 0, broadcastable with k.
        alpha: 1 - confidence level, in (0, 1).

    Returns:
        ``(low, high)``, float64 of the broadcast shape.
    """
    k_arr, n_arr = _counts("clopper_pearson_interval", k, n)
    alpha = _level("clopper_pearson_interval", "alpha", alpha)
    # Keep the beta parameters positive where the closed ends (0 or 1) apply, so scipy never sees a = 0.
    low = scipy.stats.beta.ppf(alpha / 2, np.maximum(k_arr, 1), n_arr - k_arr + 1)
    high = scipy.stats.beta.ppf(1 - alpha / 2, k_arr + 1, np.maximum(n_arr - k_arr, 1))
    low = np.where(k_arr == 0, 0.0, low)
    high = np.where(k_arr == n_arr, 1.0, high)
    return low[()], high[()]


# --- continuous metrics ---------------------------------------------------------------------------------------


class MeanCI(NamedTuple):
    """A sample mean with its t interval."""

    mean: float
    low: float
    high: float
    n: int


def mean_ci(values: object, level: float = 0.95) -> MeanCI:
    """Mean of a continuous metric with a two-sided Student t confidence interval.

    Args:
        values: (N,) finite samples (one per episode, say). Filter out non-finite values such as the +inf
            minimum TTC of an episode without a leader first, or summarise those with a fraction.
        level: confidence level in (0, 1).

    Returns:
        :class:`MeanCI`; ``low`` and ``high`` are NaN when N = 1 (no spread to estimate) and equal the mean
        when all values are equal.
    """
    level = _level("mean_ci", "level", level)
    arr = np.asarray(values, dtype=np.float64).ravel()
    if arr.size == 0:
        raise ConfigError("mean_ci: values is empty; pass at least one value")
    if not np.all(np.isfinite(arr)):
        raise ConfigError(
            f"mean_ci: values has {int((~np.isfinite(arr)).sum())} non-finite entries (inf/nan); filter them first"
        )
    mean = float(arr.mean())
    if arr.size == 1:
        return MeanCI(mean, float("nan"), float("nan"), 1)
    sem = float(arr.std(ddof=1)) / np.sqrt(arr.size)
    half = float(scipy.stats.t.ppf(0.5 + level / 2, arr.size - 1)) * sem
    return MeanCI(mean, mean - half, mean + half, int(arr.size))


# --- calibration ----------------------------------------------------------------------------------------------


def brier_score(p: object, y: object) -> float:
    """Brier (1950) score: mean squared difference between predicted probabilities and 0/1 outcomes.

    Args:
        p: (N,) predicted probabilities in [0, 1].
        y: (N,) outcomes, 0/1 or booleans.

    Returns:
        The score in [0, 1]; lower is better.
    """
    p_arr, y_arr = _predictions("brier_score", p, y)
    return float(np.mean((p_arr - y_arr) ** 2))


def _bin_index(p: np.ndarray, num_bins: int) -> np.ndarray:
    return np.minimum(np.floor(p * num_bins).astype(np.int64), num_bins - 1)


def reliability_bins(p: object, y: object, num_bins: int = 10) -> list[dict[str, float]]:
    """Per-bin mean prediction and observed frequency, for reliability diagrams.

    Bins follow the module's convention: equal width, ``[b/B, (b+1)/B)`` right-open except the last, closed one.

    Args:
        p: (N,) predicted probabilities in [0, 1].
        y: (N,) outcomes, 0/1 or booleans.
        num_bins: B >= 1.

    Returns:
        B dicts, in order, with keys ``low``, ``high`` (bin edges), ``count`` (predictions in the bin),
        ``mean_pred`` and ``freq`` (mean of p and of y in the bin; NaN for an empty bin).
    """
    p_arr, y_arr = _predictions("reliability_bins", p, y)
    _check_bins("reliability_bins", num_bins)
    idx = _bin_index(p_arr, num_bins)
    count = np.bincount(idx, minlength=num_bins)
    sum_p = np.bincount(idx, weights=p_arr, minlength=num_bins)
    sum_y = np.bincount(idx, weights=y_arr, minlength=num_bins)
    bins = []
    for b in range(num_bins):  # B small dicts for a table or a plot; the binning above is vectorised
        n = int(count[b])
        bins.append(
            {
                "low": b / num_bins,
                "high": (b + 1) / num_bins,
                "count": n,
                "mean_pred": float(sum_p[b] / n) if n else float("nan"),
                "freq": float(sum_y[b] / n) if n else float("nan"),
            }
        )
    return bins


def expected_calibration_error(p: object, y: object, num_bins: int = 10) -> float:
    """Expected calibration error ``sum_b (n_b / N) |freq_b - mean_pred_b|`` over equal-width bins.

    Args:
        p: (N,) predicted probabilities in [0, 1].
        y: (N,) outcomes, 0/1 or booleans.
        num_bins: B >= 1 (the module's bin convention).

    Returns:
        The ECE in [0, 1]; 0 is perfectly calibrated at this binning.
    """
    p_arr, y_arr = _predictions("expected_calibration_error", p, y)
    _check_bins("expected_calibration_error", num_bins)
    idx = _bin_index(p_arr, num_bins)
    sum_p = np.bincount(idx, weights=p_arr, minlength=num_bins)
    sum_y = np.bincount(idx, weights=y_arr, minlength=num_bins)
    # n_b/N * |sum_y/n_b - sum_p/n_b| = |sum_y - sum_p| / N; empty bins contribute 0.
    return float(np.abs(sum_y - sum_p).sum() / p_arr.size)


# --- near misses ----------------------------------------------------------------------------------------------


def _row_value(row: dict, key: str, where: str) -> object:
    try:
        return row[key]
    except (KeyError, TypeError):
        raise ConfigError(
            f"{where} has no '{key}' field; a near miss needs collision, min_ttc_s and max_brake_threat "
            f"(or a precomputed near_miss)"
        ) from None


def is_near_miss(
    row: dict,
    ttc_threshold_s: float = NEAR_MISS_TTC_S,
    brake_threat_threshold: float = NEAR_MISS_BRAKE_THREAT,
    where: str = "episode row",
) -> bool:
    """Whether one episode came close to a collision without having one.

    Definition: not ``collision``, and ``min_ttc_s < ttc_threshold_s`` or ``max_brake_threat >
    brake_threat_threshold``. A collision is more severe than a near miss and is counted as a collision only, so
    the two rates partition the episodes that went wrong. ``min_ttc_s`` is +inf in an episode without a closing
    leader (never a near miss by time-to-collision); a NaN in either field never meets its criterion.

    Args:
        row: one episode row of :mod:`wmplan.evaluate.closed_loop` (a dict with ``collision``, ``min_ttc_s`` in s
            and ``max_brake_threat``, dimensionless).
        ttc_threshold_s: time-to-collision threshold, s, > 0.
        brake_threat_threshold: brake-threat threshold, > 0.
        where: how error messages name the row.

    Raises:
        ConfigError: a field is missing or a threshold is not > 0.
    """
    if not ttc_threshold_s > 0:
        raise ConfigError(f"is_near_miss: ttc_threshold_s must be > 0, got {ttc_threshold_s!r}")
    if not brake_threat_threshold > 0:
        raise ConfigError(f"is_near_miss: brake_threat_threshold must be > 0, got {brake_threat_threshold!r}")
    if bool(_row_value(row, "collision", where)):
        return False
    ttc = float(_row_value(row, "min_ttc_s", where))
    threat = float(_row_value(row, "max_brake_threat", where))
    return bool(near_miss_definition(ttc, threat, False, ttc_threshold_s, brake_threat_threshold))


def near_miss_flags(rows: list[dict], name: str = "planner", **thresholds: float) -> np.ndarray:
    """(N,) bool near-miss flags of episode rows: a row's own ``near_miss`` when present, else :func:`is_near_miss`.

    Args:
        rows: episode rows.
        name: the planner, for error messages.
        **thresholds: ``ttc_threshold_s`` and/or ``brake_threat_threshold`` for :func:`is_near_miss`.
    """
    return np.array(
        [
            bool(r["near_miss"])
            if isinstance(r, dict) and "near_miss" in r
            else is_near_miss(r, where=f"row {i} of planner '{name}'", **thresholds)
            for i, r in enumerate(rows)
        ],
        dtype=bool,
    )


def near_miss_rate(rows: list[dict], name: str = "planner", **thresholds: float) -> tuple[float, list[float]]:
    """Near-miss rate of a planner's episodes with its Wilson (1927) 95 % interval.

    Args:
        rows: N >= 1 episode rows (see :func:`near_miss_flags`).
        name: the planner, for error messages.
        **thresholds: passed to :func:`is_near_miss`.

    Returns:
        ``(rate, [low, high])`` as floats.
    """
    if len(rows) == 0:
        raise ConfigError(f"near_miss_rate: planner '{name}' has no episode rows")
    flags = near_miss_flags(rows, name, **thresholds)
    k, n = int(flags.sum()), int(flags.size)
    low, high = wilson_interval(k, n)
    return k / n, [float(low), float(high)]
