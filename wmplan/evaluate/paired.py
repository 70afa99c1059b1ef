"""Paired comparisons of a planner with a reference planner on the same episode seeds, and their power (numpy/scipy).

Planners in one evaluation meet the same scene seeds (common random numbers), so their episodes pair up by seed and
each difference is measured within a pair, free of the scene-to-scene spread. For a 0/1 outcome (collision, success,
near miss) the n pairs form a 2x2 table::

    a = event for both     b = event for the planner only     c = event for the reference only     d = for neither

and the rate difference, planner minus reference, is ``(b - c) / n``: only the b + c discordant pairs carry it.

Methods and sources:

- Interval for a difference of paired proportions: Newcombe (1998), Statistics in Medicine 17, 2635-2650,
  method 10 (docs/references.md#newcombe-1998-paired-difference). With Wilson intervals [l1, u1] of the planner's
  rate p1 = (a + b) / n and [l2, u2] of the reference's p2 = (a + c) / n, theta = p1 - p2::

      L = theta - sqrt((p1 - l1)^2 - 2 phi (p1 - l1)(u2 - p2) + (u2 - p2)^2)
      U = theta + sqrt((p2 - l2)^2 - 2 phi (p2 - l2)(u1 - p1) + (u1 - p1)^2)
      phi = (A - n/2) / sqrt(P) if A > n/2;  0 if 0 <= A <= n/2;  A / sqrt(P) if A < 0
      A = ad - bc,  P = (a + b)(c + d)(a + c)(b + d)   (phi = 0 when any of those margins is 0)

  It stays inside [-1, 1] and keeps a width at zero counts, where the Wald interval collapses to a point.
- Exact McNemar test (McNemar 1947, Psychometrika 12, 153-157, pages from memory;
  docs/references.md#mcnemar-1947): under no difference b ~ Binomial(b + c, 1/2); two-sided
  p = min(1, 2 P(X <= min(b, c))), and 1 without discordant pairs.
- Pairs needed for 80 % power: Connor (1987), Biometrics 43, 207-211
  (docs/references.md#connor-1987-sample-size), for discordant probabilities p10 (planner only) and p01
  (reference only), psi = p10 + p01, delta = p10 - p01::

      n = [z_{1-alpha/2} sqrt(psi) + z_{power} sqrt(psi - delta^2)]^2 / delta^2,   rounded up

  It sizes the large-sample McNemar test; the exact test reported here is conservative, so the comparison also
  reports the exact test's power at that n (:func:`mcnemar_exact_power`, computed by summing over the binomial
  number of discordant pairs, the conditional power of the exact test at each).
- Speed and progress: paired t interval on the per-pair differences (Student 1908; the textbook one-sample t
  interval of the differences, common practice).
- No discordant pair: the comparison has no power. Each planner's event rate then gets its exact one-sided 95 %
  upper bound 1 - 0.05^(1/n) (Clopper & Pearson 1934 with k = 0, docs/references.md#clopper-pearson-1934), about
  3/n (the "rule of three", Hanley & Lippman-Hand 1983, JAMA 249, from memory;
  docs/references.md#hanley-1983-rule-of-three).

Results on a simplified traffic model certify nothing about a real vehicle. Bad input raises
:class:`wmplan.errors.ConfigError` with a one-line message.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.stats

from wmplan.errors import ConfigError
from wmplan.evaluate.stats import clopper_pearson_interval, mean_ci, near_miss_flags
from wmplan.intervals import Z_95, wilson_interval

BINARY_OUTCOMES = ("collision", "success", "near_miss")
"""The 0/1 outcomes compared pair by pair, in table order."""

_DIFF_KEY = {
    "collision": "collision_rate_diff",
    "success": "success_diff",
    "near_miss": "near_miss_rate_diff",
}

METHODS = {
    "rate_difference_ci95": "Newcombe (1998) method 10, paired hybrid score interval",
    "p_value": "exact McNemar test, two-sided",
    "pairs_needed": "Connor (1987), McNemar test, two-sided alpha 0.05, power 0.8",
    "mean_difference_ci95": "paired t interval",
    "upper95": "exact one-sided 95 % bound (Clopper-Pearson)",
}
"""Names of the methods behind each statistic, for the JSON and the report."""

_ROW_FIELDS = "seed, collision, success, mean_speed_mps, progress_m and near_miss (or min_ttc_s and max_brake_threat)"


# --- one 2x2 table --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PairedCounts:
    """The 2x2 table of one 0/1 outcome over n pairs (planner first, reference second)."""

    both: int
    planner_only: int
    reference_only: int
    neither: int

    @property
    def n(self) -> int:
        """Number of pairs."""
        return self.both + self.planner_only + self.reference_only + self.neither

    @classmethod
    def from_flags(cls, planner: object, reference: object) -> PairedCounts:
        """Count the table from two (N,) 0/1 arrays of the same pairs."""
        p = np.asarray(planner, dtype=bool).ravel()
        r = np.asarray(reference, dtype=bool).ravel()
        if p.shape != r.shape or p.size == 0:
            raise ConfigError(
                f"PairedCounts.from_flags: needs two non-empty flag arrays of one length, got {p.size} and {r.size}"
            )
        return cls(int((p & r).sum()), int((p & ~r).sum()), int((~p & r).sum()), int((~p & ~r).sum()))


def _check_counts(counts: PairedCounts) -> None:
    cells = (counts.both, counts.planner_only, counts.reference_only, counts.neither)
    if any(int(c) != c or c < 0 for c in cells) or counts.n == 0:
        raise ConfigError(f"paired counts must be integers >= 0 with n > 0, got {cells}")


def paired_difference_ci(counts: PairedCounts, z: float = Z_95) -> tuple[float, float]:
    """Newcombe (1998) method 10 interval for the paired rate difference (planner minus reference).

    Args:
        counts: the 2x2 table.
        z: normal quantile of the Wilson intervals it is built from (1.959964 for 95 %).

    Returns:
        ``(low, high)`` within [-1, 1].
    """
    _check_counts(counts)
    a, b, c, d, n = counts.both, counts.planner_only, counts.reference_only, counts.neither, counts.n
    p1, p2 = (a + b) / n, (a + c) / n
    l1, u1 = (float(v) for v in wilson_interval(a + b, n, z=z))
    l2, u2 = (float(v) for v in wilson_interval(a + c, n, z=z))
    margins = (a + b) * (c + d) * (a + c) * (b + d)
    cross = a * d - b * c
    if margins == 0 or 0 <= cross <= n / 2:
        phi = 0.0
    elif cross > n / 2:
        phi = (cross - n / 2) / math.sqrt(margins)
    else:
        phi = cross / math.sqrt(margins)
    theta = p1 - p2
    low = theta - math.sqrt(max(0.0, (p1 - l1) ** 2 - 2 * phi * (p1 - l1) * (u2 - p2) + (u2 - p2) ** 2))
    high = theta + math.sqrt(max(0.0, (p2 - l2) ** 2 - 2 * phi * (p2 - l2) * (u1 - p1) + (u1 - p1) ** 2))
    return max(-1.0, low), min(1.0, high)


def mcnemar_exact_p(planner_only: int, reference_only: int) -> float:
    """Two-sided exact McNemar p-value from the discordant counts b (planner only) and c (reference only).

    Returns:
        ``min(1, 2 * P(Binomial(b + c, 1/2) <= min(b, c)))``; 1.0 when b + c = 0.
    """
    b, c = int(planner_only), int(reference_only)
    if b < 0 or c < 0 or b != planner_only or c != reference_only:
        raise ConfigError(f"mcnemar_exact_p: needs integer counts >= 0, got b={planner_only!r} c={reference_only!r}")
    if b + c == 0:
        return 1.0
    return float(min(1.0, 2.0 * scipy.stats.binom.cdf(min(b, c), b + c, 0.5)))


# --- power ----------------------------------------------------------------------------------------------------


def _check_design(p10: float, p01: float, alpha: float, power: float) -> None:
    if not (0 <= p10 <= 1 and 0 <= p01 <= 1 and p10 + p01 <= 1):
        raise ConfigError(f"discordant probabilities need 0 <= p10, p01 and p10 + p01 <= 1, got {p10!r}, {p01!r}")
    if not 0 < alpha < 1:
        raise ConfigError(f"alpha must lie in (0, 1), got {alpha!r}")
    if not 0 < power < 1:
        raise ConfigError(f"power must lie in (0, 1), got {power!r}")


def mcnemar_sample_size(p10: float, p01: float, alpha: float = 0.05, power: float = 0.8) -> int | None:
    """Connor (1987) number of pairs for a two-sided McNemar test to detect p10 != p01.

    Args:
        p10: probability that a pair has the event for the planner only.
        p01: probability that a pair has the event for the reference only.
        alpha: two-sided significance level.
        power: wanted power.

    Returns:
        The number of pairs (rounded up), or None when p10 = p01 (no difference to detect).
    """
    _check_design(p10, p01, alpha, power)
    psi, delta = p10 + p01, p10 - p01
    if delta == 0:
        return None
    z_a = scipy.stats.norm.ppf(1 - alpha / 2)
    z_b = scipy.stats.norm.ppf(power)
    n = (z_a * math.sqrt(psi) + z_b * math.sqrt(max(0.0, psi - delta * delta))) ** 2 / (delta * delta)
    return max(1, math.ceil(n - 1e-9))


def mcnemar_exact_power(p10: float, p01: float, n: int, alpha: float = 0.05) -> float:
    """Power of the two-sided exact McNemar test at level alpha with n pairs.

    The number of discordant pairs m is Binomial(n, p10 + p01); given m, the planner-only count is
    Binomial(m, p10 / (p10 + p01)), and the test rejects when ``2 P(Binomial(m, 1/2) <= min(b, m - b)) <= alpha``.
    The sum over m runs over the values of probability above 1e-13 at either tail (bounded work at any n).

    Returns:
        The probability of rejecting, in [0, 1].
    """
    _check_design(p10, p01, alpha, 0.5)
    if int(n) != n or n < 1:
        raise ConfigError(f"mcnemar_exact_power: n must be an integer >= 1, got {n!r}")
    psi = p10 + p01
    if psi == 0:
        return 0.0
    lo = int(scipy.stats.binom.ppf(1e-13, n, psi))
    hi = int(scipy.stats.binom.isf(1e-13, n, psi))
    m = np.arange(max(lo, 1), max(hi, 1) + 1)
    # largest k with 2 P(Bin(m, 1/2) <= k) <= alpha (-1 when none)
    k = scipy.stats.binom.ppf(alpha / 2, m, 0.5)
    k = np.where(scipy.stats.binom.cdf(k, m, 0.5) <= alpha / 2, k, k - 1)
    q = p10 / psi
    reject = np.where(k >= 0, scipy.stats.binom.cdf(k, m, q) + scipy.stats.binom.sf(m - k - 1, m, q), 0.0)
    return float(np.clip(np.sum(scipy.stats.binom.pmf(m, n, psi) * reject), 0.0, 1.0))


def upper_bound95(k: int, n: int) -> float:
    """Exact one-sided 95 % upper bound on an event rate from k events in n trials (Clopper-Pearson).

    For k = 0 it is 1 - 0.05^(1/n), close to the rule of three 3/n.
    """
    return float(clopper_pearson_interval(k, n, alpha=0.10)[1])


# --- rows -----------------------------------------------------------------------------------------------------


def _by_seed(rows: Sequence[dict], name: str) -> dict[int, dict]:
    if len(rows) == 0:
        raise ConfigError(f"paired comparison: planner '{name}' has no episode rows")
    out: dict[int, dict] = {}
    for i, row in enumerate(rows):
        if not isinstance(row, Mapping) or "seed" not in row:
            raise ConfigError(f"paired comparison: row {i} of planner '{name}' has no 'seed'; rows need {_ROW_FIELDS}")
        seed = int(row["seed"])
        if seed in out:
            raise ConfigError(
                f"paired comparison: planner '{name}' has seed {seed} twice; a paired comparison needs one episode "
                f"per seed"
            )
        out[seed] = row
    return out


def pair_rows(
    reference_rows: Sequence[dict], planner_rows: Sequence[dict], reference: str, planner: str
) -> tuple[list[dict], list[dict]]:
    """The two planners' rows in the same seed order (ascending seeds).

    Raises:
        ConfigError: a planner has no rows, a row has no seed, a seed repeats, or the seed sets differ.
    """
    ref = _by_seed(reference_rows, reference)
    own = _by_seed(planner_rows, planner)
    if ref.keys() != own.keys():
        only_own = sorted(own.keys() - ref.keys())
        only_ref = sorted(ref.keys() - own.keys())
        first = lambda seeds: f", e.g. {seeds[0]}" if seeds else ""  # noqa: E731
        raise ConfigError(
            f"paired comparison of '{planner}' with reference '{reference}': the seed sets differ "
            f"({len(only_own)} seeds only in '{planner}'{first(only_own)}; {len(only_ref)} only in "
            f"'{reference}'{first(only_ref)}); run both planners with the same --seed and --episodes"
        )
    seeds = sorted(own)
    return [own[s] for s in seeds], [ref[s] for s in seeds]


def _flags(rows: list[dict], key: str, name: str) -> np.ndarray:
    if key == "near_miss":
        return near_miss_flags(rows, name)
    try:
        return np.array([bool(r[key]) for r in rows], dtype=bool)
    except KeyError:
        raise ConfigError(
            f"paired comparison: a row of planner '{name}' has no '{key}' field; rows need {_ROW_FIELDS}"
        ) from None


def _values(rows: list[dict], key: str, name: str) -> np.ndarray:
    try:
        return np.array([float(r[key]) for r in rows], dtype=np.float64)
    except KeyError:
        raise ConfigError(
            f"paired comparison: a row of planner '{name}' has no '{key}' field; rows need {_ROW_FIELDS}"
        ) from None


def paired_mean_difference(planner: object, reference: object, level: float = 0.95) -> tuple[float, list[float]]:
    """Mean of the per-pair differences (planner minus reference) with its paired t interval.

    Pairs where either value is not finite are left out.

    Returns:
        ``(mean, [low, high])``; the interval is [NaN, NaN] with fewer than two usable pairs and [mean, mean] when
        every difference is the same; the mean is NaN without any usable pair.
    """
    p = np.asarray(planner, dtype=np.float64).ravel()
    r = np.asarray(reference, dtype=np.float64).ravel()
    if p.shape != r.shape:
        raise ConfigError(f"paired_mean_difference: needs two arrays of one length, got {p.size} and {r.size}")
    diff = (p - r)[np.isfinite(p) & np.isfinite(r)]
    if diff.size == 0:
        return math.nan, [math.nan, math.nan]
    ci = mean_ci(diff, level)
    return ci.mean, [ci.low, ci.high]


# --- words ----------------------------------------------------------------------------------------------------

_EVENT_WORDS = {
    "collision": ("collision", "collisions"),
    "near_miss": ("near miss", "near misses"),
    "success": ("episode without success", "episodes without success"),
}


def no_power_statement(outcome: str, n: int, events: int, upper95: float) -> str:
    """One sentence saying that a comparison without discordant pairs cannot tell two planners apart.

    Args:
        outcome: one of :data:`BINARY_OUTCOMES`.
        n: number of paired episodes.
        events: episodes in which both planners had the event ("event" is a failure to succeed for ``success``):
            with no discordant pair the two planners share every one of them.
        upper95: exact one-sided 95 % upper bound on each planner's event rate.

    Returns:
        e.g. "no collision in either planner's 400 episodes: this comparison cannot tell them apart; both rates
        are below 0.0075 (95%)".
    """
    if outcome not in _EVENT_WORDS:
        raise ConfigError(f"no_power_statement: outcome must be one of {BINARY_OUTCOMES}, got {outcome!r}")
    one, many = _EVENT_WORDS[outcome]
    if outcome == "success" and events == 0:
        return (
            f"every one of either planner's {n} episodes succeeded: this comparison cannot tell them apart; both "
            f"failure rates are below {upper95:.2g} (95%)"
        )
    if events == 0:
        return (
            f"no {one} in either planner's {n} episodes: this comparison cannot tell them apart; both rates are "
            f"below {upper95:.2g} (95%)"
        )
    return (
        f"both planners had {many} in the same {events} of {n} episodes and nowhere else: this comparison cannot "
        f"tell them apart"
    )


# --- the comparison -------------------------------------------------------------------------------------------


def _power_entry(outcome: str, counts: PairedCounts, detect: float | None, alpha: float, power: float) -> dict:
    n = counts.n
    b, c = counts.planner_only, counts.reference_only
    if outcome == "success":  # the event whose rate is bounded is the failure to succeed
        shared = counts.neither
        k_planner, k_reference = shared + c, shared + b
    else:
        shared = counts.both
        k_planner, k_reference = shared + b, shared + c
    entry: dict = {
        "no_power": b + c == 0,
        "statement": None,
        "planner_rate_upper95": upper_bound95(k_planner, n),
        "reference_rate_upper95": upper_bound95(k_reference, n),
        "difference": None,
        "difference_source": None,
        "discordant_rate": (b + c) / n,
        "pairs_needed": None,
        "exact_test_power_at_pairs_needed": None,
    }
    if entry["no_power"]:
        bound = max(entry["planner_rate_upper95"], entry["reference_rate_upper95"])
        entry["statement"] = no_power_statement(outcome, n, shared, bound)
    if detect is not None:
        delta, source = float(detect), "given"
    elif b != c:
        delta, source = (b - c) / n, "observed"
    else:
        return entry
    psi = max((b + c) / n, abs(delta))
    p10, p01 = (psi + delta) / 2, (psi - delta) / 2
    needed = mcnemar_sample_size(p10, p01, alpha, power)
    entry.update(difference=delta, difference_source=source, discordant_rate=psi, pairs_needed=needed)
    if needed is not None:
        entry["exact_test_power_at_pairs_needed"] = mcnemar_exact_power(p10, p01, needed, alpha)
    return entry


def paired_comparison(
    reference_rows: Sequence[dict],
    planner_rows: Sequence[dict],
    *,
    reference: str = "reference",
    planner: str = "planner",
    detect: Mapping[str, float] | None = None,
    alpha: float = 0.05,
    power: float = 0.8,
) -> dict:
    """Paired differences of one planner to the reference planner on the same episode seeds.

    Args:
        reference_rows: the reference planner's episode rows (dicts with the fields of ``_ROW_FIELDS``: seed,
            collision, success, mean_speed_mps, progress_m, and near_miss or min_ttc_s and max_brake_threat).
        planner_rows: the compared planner's rows, on the same seeds (any order).
        reference: the reference planner's name (reported, and used in messages).
        planner: the compared planner's name (messages only).
        detect: optional differences to size the power for, planner minus reference, by outcome name
            (``collision``, ``success``, ``near_miss``), each in [-1, 1] and not 0. Without one, the observed
            difference is used.
        alpha: two-sided level of the McNemar test the power is computed for.
        power: wanted power.

    Returns:
        A JSON-ready dict: ``reference``, ``n_pairs``; per 0/1 outcome the difference (``collision_rate_diff``,
        ``success_diff``, ``near_miss_rate_diff``) with ``<key>_ci95`` (Newcombe method 10), the exact McNemar
        ``<outcome>_p_value``, the discordant counts ``<outcome>_planner_only`` and ``<outcome>_reference_only``,
        and ``<outcome>_power`` (a dict: ``no_power``, ``statement`` (words when there is no discordant pair),
        ``planner_rate_upper95`` and ``reference_rate_upper95`` (exact one-sided bounds on each planner's event
        rate; for success the failure rate), ``difference`` and ``difference_source`` ("observed" or "given"),
        ``discordant_rate``, ``pairs_needed`` (Connor 1987; None without a difference to detect) and
        ``exact_test_power_at_pairs_needed``); ``mean_speed_diff_mps``, ``progress_diff_m`` with their
        ``..._ci95`` (paired t); ``methods`` (:data:`METHODS`). Rates are fractions in [0, 1], differences
        planner minus reference.

    Raises:
        ConfigError: missing fields, repeated seeds, different seed sets, or a bad ``detect``/alpha/power.
    """
    detect = dict(detect or {})
    for key, value in detect.items():
        if key not in BINARY_OUTCOMES:
            raise ConfigError(f"paired_comparison: detect keys must be among {BINARY_OUTCOMES}, got {key!r}")
        if not (isinstance(value, int | float) and -1 <= value <= 1 and value != 0):
            raise ConfigError(
                f"paired_comparison: detect['{key}'] must be a difference in [-1, 1] other than 0, got {value!r}"
            )
    _check_design(0.0, 0.0, alpha, power)
    own, ref = pair_rows(reference_rows, planner_rows, reference, planner)
    out: dict = {"reference": reference, "n_pairs": len(own)}
    for outcome in BINARY_OUTCOMES:
        counts = PairedCounts.from_flags(_flags(own, outcome, planner), _flags(ref, outcome, reference))
        key = _DIFF_KEY[outcome]
        low, high = paired_difference_ci(counts)
        out[key] = (counts.planner_only - counts.reference_only) / counts.n
        out[f"{key}_ci95"] = [low, high]
        out[f"{outcome}_p_value"] = mcnemar_exact_p(counts.planner_only, counts.reference_only)
        out[f"{outcome}_planner_only"] = counts.planner_only
        out[f"{outcome}_reference_only"] = counts.reference_only
        out[f"{outcome}_power"] = _power_entry(outcome, counts, detect.get(outcome), alpha, power)
    for field, key, ci_key in (
        ("mean_speed_mps", "mean_speed_diff_mps", "mean_speed_diff_ci95"),
        ("progress_m", "progress_diff_m", "progress_diff_ci95"),
    ):
        mean, ci = paired_mean_difference(_values(own, field, planner), _values(ref, field, reference))
        out[key] = mean
        out[ci_key] = ci
    out["methods"] = dict(METHODS)
    return out


# --- tables ---------------------------------------------------------------------------------------------------

TABLE_HEADER = (
    "planner",
    "reference",
    "pairs",
    "collision diff [95% CI]",
    "collision p",
    "success diff [95% CI]",
    "near-miss diff [95% CI]",
    "near-miss p",
    "speed diff m/s [95% CI]",
    "progress diff m [95% CI]",
    "pairs for 80% power (collision / near miss)",
)
"""Columns of :func:`comparison_table` and :func:`comparison_markdown`."""

TABLE_METHODS = (
    "Differences are planner minus reference on the same episode seeds. Rate intervals: Newcombe (1998) method 10; "
    "p: exact McNemar test; speed and progress: paired t intervals; pairs for 80% power: Connor (1987), two-sided "
    "alpha 0.05, sized on the observed difference (or on the one asked for)."
)


def _fmt_diff(value: float, ci: Sequence[float], digits: int) -> str:
    def num(x: float) -> str:
        return f"{round(x, digits) + 0.0:+.{digits}f}"  # + 0.0: no "-0.0" for a value that rounds to zero

    if not math.isfinite(value):
        return "n/a"
    low, high = ci
    if not (math.isfinite(low) and math.isfinite(high)):
        return f"{num(value)} [n/a]"
    return f"{num(value)} [{num(low)}, {num(high)}]"


def _fmt_p(p: float) -> str:
    return "<0.0001" if p < 1e-4 else f"{p:.4f}"


def _fmt_needed(entry: dict) -> str:
    if entry["no_power"] and entry["difference_source"] != "given":
        return "-"
    return "-" if entry["pairs_needed"] is None else str(entry["pairs_needed"])


def comparison_rows(comparisons: Mapping[str, dict]) -> tuple[list[list[str]], list[str]]:
    """Cells of each planner's row and the numbered notes (no-power statements) below the table."""
    rows: list[list[str]] = []
    notes: list[str] = []
    for planner, cmp in comparisons.items():
        cells = [planner, str(cmp["reference"]), str(cmp["n_pairs"])]
        for outcome in BINARY_OUTCOMES:
            key, entry = _DIFF_KEY[outcome], cmp[f"{outcome}_power"]
            if entry["no_power"]:
                notes.append(f"{planner} vs {cmp['reference']}, {outcome.replace('_', ' ')}: {entry['statement']}")
                cells.append(f"no power [{len(notes)}]")
                p_cell = "-"
            else:
                cells.append(_fmt_diff(cmp[key], cmp[f"{key}_ci95"], 3))
                p_cell = _fmt_p(cmp[f"{outcome}_p_value"])
            if outcome != "success":
                cells.append(p_cell)
        cells.append(_fmt_diff(cmp["mean_speed_diff_mps"], cmp["mean_speed_diff_ci95"], 2))
        cells.append(_fmt_diff(cmp["progress_diff_m"], cmp["progress_diff_ci95"], 1))
        cells.append(f"{_fmt_needed(cmp['collision_power'])} / {_fmt_needed(cmp['near_miss_power'])}")
        rows.append(cells)
    return rows, notes


def comparison_table(comparisons: Mapping[str, dict]) -> str:
    """Fixed-width text table of paired comparisons, for the terminal.

    Args:
        comparisons: planner name -> the dict of :func:`paired_comparison` (the reference itself left out).

    Returns:
        Lines (no trailing newline): a header, one row per planner, then the methods line and one numbered note per
        comparison without power (its words and upper bounds instead of a row of zeros).
    """
    rows, notes = comparison_rows(comparisons)
    widths = [max(len(r[i]) for r in [TABLE_HEADER, *rows]) for i in range(len(TABLE_HEADER))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in [TABLE_HEADER, *rows]]
    lines.insert(1, "  ".join("-" * w for w in widths))
    lines.append(TABLE_METHODS)
    lines.extend(f"[{i}] {note}" for i, note in enumerate(notes, start=1))
    return "\n".join(lines)


def comparison_markdown(comparisons: Mapping[str, dict]) -> str:
    """The same comparison table in Markdown, for the run report (notes as a numbered list below it)."""
    rows, notes = comparison_rows(comparisons)

    def line(cells: Sequence[str]) -> str:
        return "| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |"

    out = [line(TABLE_HEADER), "|" + "|".join(" --- " for _ in TABLE_HEADER) + "|"]
    out.extend(line(r) for r in rows)
    out.extend(["", TABLE_METHODS])
    if notes:
        out.append("")
        out.extend(f"{i}. {note}" for i, note in enumerate(notes, start=1))
    return "\n".join(out)


# --- the differences the data can tell --------------------------------------------------------------------------

DIFFERENCES = (
    ("collision_rate_diff", "collision_rate_diff_ci95", "collision", "collision rate", ""),
    ("near_miss_rate_diff", "near_miss_rate_diff_ci95", "near_miss", "near-miss rate", ""),
    ("success_diff", "success_diff_ci95", "success", "success rate", ""),
    ("mean_speed_diff_mps", "mean_speed_diff_ci95", None, "mean speed", " m/s"),
    ("progress_diff_m", "progress_diff_ci95", None, "progress", " m"),
)
"""(key of a comparison, key of its 95% interval, its 0/1 outcome or None for a mean, quantity in words, unit
after a number) of each difference a comparison reports, in the order reports list them."""


def excludes_zero(ci: object) -> bool:
    """True when ``ci`` is a pair of finite numbers on the same side of zero (both above it or both below)."""
    if not isinstance(ci, Sequence) or isinstance(ci, (str, bytes)) or len(ci) != 2:
        return False
    try:
        low, high = float(ci[0]), float(ci[1])
    except (TypeError, ValueError):
        return False
    return math.isfinite(low) and math.isfinite(high) and (low > 0.0 or high < 0.0)


def clear_differences(comparisons: Mapping[str, dict]) -> list[dict]:
    """The differences whose 95% interval excludes zero, planner by planner in :data:`DIFFERENCES` order.

    Args:
        comparisons: planner name -> the dict of :func:`paired_comparison`.

    Returns:
        One dict per such difference: ``planner``, ``reference``, ``key``, ``quantity``, ``difference`` (planner
        minus reference), ``ci95``, ``n_pairs``, ``p_value`` (exact McNemar, 0/1 outcomes only, else None) and
        ``text``, one line in words, e.g. ``mpc+constant-velocity vs mpc+oracle: collision rate +0.250 [+0.111,
        +0.402] over 40 pairs, McNemar p = 0.0020``. An outcome without power is never listed.
    """
    out = []
    for planner, cmp in comparisons.items():
        for key, ci_key, outcome, quantity, unit in DIFFERENCES:
            ci = cmp.get(ci_key)
            if key not in cmp or not excludes_zero(ci):
                continue
            if outcome is not None and cmp.get(f"{outcome}_power", {}).get("no_power"):
                continue
            p = cmp.get(f"{outcome}_p_value") if outcome is not None else None
            digits = 3 if outcome is not None else 2
            text = (
                f"{planner} vs {cmp['reference']}: {quantity} {_fmt_diff(cmp[key], ci, digits)}{unit} over "
                f"{cmp['n_pairs']} pairs" + (f", McNemar p = {_fmt_p(p)}" if p is not None else "")
            )
            out.append(
                {
                    "planner": planner,
                    "reference": cmp["reference"],
                    "key": key,
                    "quantity": quantity,
                    "difference": cmp[key],
                    "ci95": list(ci),
                    "n_pairs": cmp["n_pairs"],
                    "p_value": p,
                    "text": text,
                }
            )
    return out
