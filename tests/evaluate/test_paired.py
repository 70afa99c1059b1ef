"""Reference tests of ``wmplan.evaluate.paired``: paired differences, McNemar, power, the no-power wording, tables.

Sources and the checks made against each:
- Newcombe (1998) method 10 (docs/references.md#newcombe-1998-paired-difference): the worked example of Fagerland,
  Lydersen & Laake, "Statistical Analysis of Contingency Tables" (2017), chapter 8, data of Cavo et al. (2012)
  (docs/references.md#fagerland-2017-contingency-tables): table [[59, 6], [16, 80]] -> difference -0.0621, 95 %
  interval -0.1186 to -0.0046 (4 decimals, as asserted by the test suite of the book's companion R package, read
  but not run); and a seeded coverage simulation (about 95 %).
- Exact McNemar test (docs/references.md#mcnemar-1947): statsmodels.stats.contingency_tables.mcnemar(table,
  exact=True), a general-purpose reference library (docs/references.md#lib-statsmodels); hand check b = 9, c = 1
  -> p = 2 (1 + 10) / 1024 = 0.021484375.
- Connor (1987) pairs for 80 % power (docs/references.md#connor-1987-sample-size): p10 = 0.05, p01 = 0.45 -> 23
  pairs and p10 = 0.15, p01 = 0.30 -> 155 pairs (worked examples of the formula published with public sample-size
  calculators that cite Connor 1987, p. 209; seen, the paper itself not); p10 = 0.05, p01 = 0.01 -> 291.96, 292
  pairs (by hand from the formula). A seeded Monte Carlo of McNemar tests at the computed n reaches about 80 %.
- Paired t interval: scipy.stats.ttest_rel(x, y).confidence_interval(0.95) (docs/references.md#lib-scipy).
- Upper bounds without events: scipy.stats.binomtest(0, n, alternative="less").proportion_ci(0.95) (exact
  Clopper-Pearson, docs/references.md#clopper-pearson-1934), and the rule of three 3/n
  (docs/references.md#hanley-1983-rule-of-three, from memory).
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
import scipy.stats
from statsmodels.stats.contingency_tables import mcnemar

from wmplan.errors import ConfigError
from wmplan.evaluate import paired as P

ISSUE_KEYS = {
    "reference",
    "collision_rate_diff",
    "collision_rate_diff_ci95",
    "collision_p_value",
    "success_diff",
    "success_diff_ci95",
    "mean_speed_diff_mps",
    "mean_speed_diff_ci95",
    "near_miss_rate_diff",
    "near_miss_rate_diff_ci95",
    "progress_diff_m",
    "progress_diff_ci95",
    "n_pairs",
    "collision_planner_only",
    "collision_reference_only",
}


def make_rows(rng: np.random.Generator, n: int, p_collision: float, speed: float, seeds=None) -> list[dict]:
    """Demo rows (invented data, not a reference): seeds 0..n-1 unless given."""
    seeds = range(n) if seeds is None else seeds
    return [
        {
            "seed": int(s),
            "collision": bool(rng.random() < p_collision),
            "success": bool(rng.random() < 0.9),
            "mean_speed_mps": float(speed + rng.normal()),
            "progress_m": float(300.0 + 10.0 * rng.normal()),
            "min_ttc_s": float(rng.exponential(4.0)),
            "max_brake_threat": float(1.2 * rng.random()),
        }
        for s in seeds
    ]


def table_cells(text: str) -> list[dict[str, str]]:
    """The rows of a fixed-width comparison table as dicts keyed by header, cut at the columns of its rule line."""
    lines = text.splitlines()
    starts = [m.start() for m in re.finditer(r"-+", lines[1])] + [None]
    rows = [line for line in lines[2:] if not line.startswith(("Differences", "["))]
    return [
        {h: line[a:b].strip() for h, a, b in zip(P.TABLE_HEADER, starts[:-1], starts[1:], strict=True)} for line in rows
    ]


# --- Newcombe method 10 ---------------------------------------------------------------------------------------


def test_newcombe_worked_example():
    """[[59, 6], [16, 80]]: -0.0621 (95 % CI -0.1186 to -0.0046), the book's chapter 8 worked example."""
    counts = P.PairedCounts(both=59, planner_only=6, reference_only=16, neither=80)
    low, high = P.paired_difference_ci(counts)
    assert (6 - 16) / 161 == pytest.approx(-0.0621, abs=5e-5)
    assert low == pytest.approx(-0.1186, abs=5e-5) and high == pytest.approx(-0.0046, abs=5e-5)


def test_newcombe_swapping_planners_mirrors_the_interval():
    """Swapping the two planners negates the difference and mirrors the interval (the method's symmetry)."""
    for table in [(59, 6, 16, 80), (0, 3, 0, 397), (5, 0, 0, 395), (1, 1, 7, 12)]:
        a, b, c, d = table
        low, high = P.paired_difference_ci(P.PairedCounts(a, b, c, d))
        low_s, high_s = P.paired_difference_ci(P.PairedCounts(a, c, b, d))
        assert (low_s, high_s) == (pytest.approx(-high, abs=1e-12), pytest.approx(-low, abs=1e-12))
        assert -1 <= low <= (b - c) / (a + b + c + d) <= high <= 1


def test_newcombe_without_events_keeps_a_width():
    """No event anywhere: the interval is +-(Wilson upper end of 0/n), not the Wald interval's single point 0."""
    low, high = P.paired_difference_ci(P.PairedCounts(0, 0, 0, 400))
    wilson_high = scipy.stats.binomtest(0, 400).proportion_ci(method="wilson").high
    assert (low, high) == (pytest.approx(-wilson_high, rel=1e-12), pytest.approx(wilson_high, rel=1e-12))


@pytest.mark.parametrize(
    ("n", "cells"),
    [(200, (0.01, 0.06, 0.02)), (400, (0.0, 0.01, 0.0025)), (100, (0.7, 0.1, 0.1))],
)
def test_newcombe_coverage_by_simulation(n, cells):
    """Seeded simulation of 4000 tables: the 95 % interval covers the true difference in 93-99 % of them."""
    rng = np.random.default_rng(20260516)
    a, b, c = cells
    tables = rng.multinomial(n, [a, b, c, 1 - a - b - c], size=4000)
    covered = 0
    for t in tables:
        low, high = P.paired_difference_ci(P.PairedCounts(*(int(v) for v in t)))
        covered += low <= b - c <= high
    assert 0.93 <= covered / len(tables) <= 0.99


# --- McNemar --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("b", "c"), [(9, 1), (6, 16), (0, 0), (0, 7), (13, 13), (40, 21), (3, 250)])
def test_mcnemar_exact_against_statsmodels(b, c):
    """Exact McNemar p equals statsmodels' mcnemar(exact=True) for tables with these discordant counts."""
    ref = mcnemar([[5, b], [c, 20]], exact=True).pvalue
    assert P.mcnemar_exact_p(b, c) == pytest.approx(ref, rel=1e-12, abs=1e-300)


def test_mcnemar_hand_example():
    """b = 9, c = 1: p = 2 (C(10,0) + C(10,1)) / 2^10 = 0.021484375 (by hand)."""
    assert P.mcnemar_exact_p(9, 1) == pytest.approx(0.021484375, rel=1e-12)
    assert P.mcnemar_exact_p(1, 9) == P.mcnemar_exact_p(9, 1)


# --- power ----------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("p10", "p01", "pairs"), [(0.05, 0.45, 23), (0.15, 0.30, 155), (0.05, 0.01, 292)])
def test_connor_worked_examples(p10, p01, pairs):
    """Connor (1987) at two-sided alpha 0.05 and 80 % power: 23, 155 and 292 pairs (worked examples)."""
    assert P.mcnemar_sample_size(p10, p01) == pairs
    assert P.mcnemar_sample_size(p01, p10) == pairs  # only |p10 - p01| and their sum matter
    assert P.mcnemar_sample_size(0.1, 0.1) is None


def test_connor_n_reaches_80_percent_in_simulation():
    """Seeded Monte Carlo, 20000 studies of 155 pairs at p10 = 0.15, p01 = 0.30: the large-sample McNemar test that
    Connor's formula sizes rejects in 80 % +- 2.5 points of them."""
    rng = np.random.default_rng(1987)
    n = P.mcnemar_sample_size(0.15, 0.30)
    t = rng.multinomial(n, [0.15, 0.30, 0.55], size=20000)
    b, c = t[:, 0], t[:, 1]
    chi2 = (b - c) ** 2 / np.maximum(b + c, 1)
    power = float(np.mean(chi2 > scipy.stats.chi2.ppf(0.95, 1)))
    assert power == pytest.approx(0.80, abs=0.025)


@pytest.mark.parametrize(("p10", "p01"), [(0.05, 0.01), (0.15, 0.30), (0.02, 0.005)])
def test_exact_test_power_against_simulation(p10, p01):
    """The exact McNemar test's power at Connor's n, computed, equals a seeded Monte Carlo of exact tests within 4.5
    standard errors; it is below 80 % there (the exact test is conservative)."""
    rng = np.random.default_rng(int(1e6 * p10) + int(1e3 * p01))
    n = P.mcnemar_sample_size(p10, p01)
    t = rng.multinomial(n, [p10, p01, 1 - p10 - p01], size=20000)
    b, c = t[:, 0], t[:, 1]
    p = np.where(b + c > 0, np.minimum(1.0, 2 * scipy.stats.binom.cdf(np.minimum(b, c), b + c, 0.5)), 1.0)
    simulated = float(np.mean(p <= 0.05))
    computed = P.mcnemar_exact_power(p10, p01, n)
    se = np.sqrt(computed * (1 - computed) / len(t))
    assert abs(simulated - computed) < 4.5 * se
    assert 0.7 < computed < 0.8


def test_upper_bound_without_events_against_scipy_and_rule_of_three():
    """0 events in n: exact one-sided 95 % bound = scipy binomtest(0, n, alternative='less') = 1 - 0.05^(1/n), within
    1 % of the rule of three 3/n for n >= 200."""
    for n in (200, 400, 2000):
        ref = scipy.stats.binomtest(0, n, alternative="less").proportion_ci(confidence_level=0.95).high
        assert P.upper_bound95(0, n) == pytest.approx(ref, rel=1e-10)
        assert P.upper_bound95(0, n) == pytest.approx(1 - 0.05 ** (1 / n), rel=1e-10)
        assert P.upper_bound95(0, n) == pytest.approx(3 / n, rel=0.01)
    ref = scipy.stats.binomtest(4, 400, alternative="less").proportion_ci(confidence_level=0.95).high
    assert P.upper_bound95(4, 400) == pytest.approx(ref, rel=1e-10)


# --- the comparison of two planners ---------------------------------------------------------------------------


def test_compare_planners_keys_and_values_against_references():
    """Every key the issue lists is there; each statistic equals its reference computed from the paired flags."""
    rng = np.random.default_rng(16)
    ref_rows = make_rows(rng, 400, 0.01, 20.0)
    own_rows = make_rows(rng, 400, 0.06, 21.0)
    out = P.paired_comparison(ref_rows, own_rows, reference="mpc+oracle", planner="mpc+constant-velocity")
    assert ISSUE_KEYS <= out.keys()
    json.dumps(out, allow_nan=False)
    assert out["reference"] == "mpc+oracle" and out["n_pairs"] == 400

    own_c = np.array([r["collision"] for r in own_rows])
    ref_c = np.array([r["collision"] for r in ref_rows])
    b, c = int((own_c & ~ref_c).sum()), int((~own_c & ref_c).sum())
    assert (out["collision_planner_only"], out["collision_reference_only"]) == (b, c)
    assert out["collision_rate_diff"] == pytest.approx(own_c.mean() - ref_c.mean(), abs=1e-15)
    table = [[int((own_c & ref_c).sum()), b], [c, int((~own_c & ~ref_c).sum())]]
    assert out["collision_p_value"] == pytest.approx(mcnemar(table, exact=True).pvalue, rel=1e-12)
    low, high = out["collision_rate_diff_ci95"]
    assert low < out["collision_rate_diff"] < high

    for field, key in (("mean_speed_mps", "mean_speed_diff"), ("progress_m", "progress_diff")):
        x = np.array([r[field] for r in own_rows])
        y = np.array([r[field] for r in ref_rows])
        ref_ci = scipy.stats.ttest_rel(x, y).confidence_interval(0.95)
        unit = "_mps" if field == "mean_speed_mps" else "_m"
        assert out[key + unit] == pytest.approx(float(np.mean(x - y)), rel=1e-12)
        assert out[key + "_ci95"] == [
            pytest.approx(ref_ci.low, rel=1e-10),
            pytest.approx(ref_ci.high, rel=1e-10),
        ]

    power = out["collision_power"]
    assert power["difference_source"] == "observed" and power["no_power"] is False
    psi, delta = (b + c) / 400, (b - c) / 400
    assert power["pairs_needed"] == P.mcnemar_sample_size((psi + delta) / 2, (psi - delta) / 2)


def test_pairs_by_seed_in_any_order():
    """Rows pair by seed, not by position: shuffling one planner's rows changes nothing."""
    rng = np.random.default_rng(5)
    ref_rows = make_rows(rng, 120, 0.05, 20.0)
    own_rows = make_rows(rng, 120, 0.10, 19.0)
    shuffled = [own_rows[i] for i in rng.permutation(len(own_rows))]
    assert P.paired_comparison(ref_rows, shuffled) == P.paired_comparison(ref_rows, own_rows)


def test_near_miss_is_computed_from_the_definition_when_absent():
    """Without a near_miss key the rows' min_ttc_s / max_brake_threat decide (stats.is_near_miss); with one, it is
    taken as given."""
    rng = np.random.default_rng(9)
    ref_rows = make_rows(rng, 200, 0.0, 20.0)
    own_rows = make_rows(rng, 200, 0.0, 20.0)
    out = P.paired_comparison(ref_rows, own_rows)
    flags = [(r["min_ttc_s"] < 1.5 or r["max_brake_threat"] > 1.0) for r in own_rows]
    ref_flags = [(r["min_ttc_s"] < 1.5 or r["max_brake_threat"] > 1.0) for r in ref_rows]
    assert out["near_miss_rate_diff"] == pytest.approx(np.mean(flags) - np.mean(ref_flags), abs=1e-15)
    given = [dict(r, near_miss=False) for r in own_rows]
    out = P.paired_comparison(ref_rows, given)
    assert out["near_miss_rate_diff"] == pytest.approx(-np.mean(ref_flags), abs=1e-15)


def test_no_power_is_said_in_words_with_upper_bounds():
    """No collision in either planner's 400 episodes: no_power, the sentence of the issue, both bounds 0.0075."""
    rng = np.random.default_rng(11)
    ref_rows = make_rows(rng, 400, 0.0, 20.0)
    own_rows = make_rows(rng, 400, 0.0, 20.5)
    out = P.paired_comparison(ref_rows, own_rows, reference="mpc+oracle", planner="rules")
    power = out["collision_power"]
    assert power["no_power"] is True and power["pairs_needed"] is None
    assert power["statement"] == (
        "no collision in either planner's 400 episodes: this comparison cannot tell them apart; both rates are "
        "below 0.0075 (95%)"
    )
    assert power["planner_rate_upper95"] == pytest.approx(1 - 0.05 ** (1 / 400), rel=1e-10)
    assert out["collision_p_value"] == 1.0

    text = P.comparison_table({"rules": out})
    row = table_cells(text)[0]
    assert row["collision diff [95% CI]"] == "no power [1]" and row["collision p"] == "-"
    assert row["pairs for 80% power (collision / near miss)"].startswith("- / ")
    assert "[1] rules vs mpc+oracle, collision: no collision in either planner's 400 episodes" in text
    md = P.comparison_markdown({"rules": out})
    assert "| no power [1] |" in md and "1. rules vs mpc+oracle, collision: no collision" in md


def test_no_power_wording_for_success_and_for_shared_events():
    """Every episode a success for both: said as failure rates; events in the same episodes: said so."""
    assert P.no_power_statement("success", 200, 0, 0.0149) == (
        "every one of either planner's 200 episodes succeeded: this comparison cannot tell them apart; both failure "
        "rates are below 0.015 (95%)"
    )
    assert P.no_power_statement("near_miss", 50, 3, 0.2) == (
        "both planners had near misses in the same 3 of 50 episodes and nowhere else: this comparison cannot tell "
        "them apart"
    )


def test_a_given_difference_sizes_the_power_even_without_events():
    """detect={'collision': 0.01} with no discordant pair: psi = |delta| = 0.01, Connor's n for (0.01, 0)."""
    rng = np.random.default_rng(12)
    rows = make_rows(rng, 100, 0.0, 20.0)
    out = P.paired_comparison(rows, make_rows(rng, 100, 0.0, 20.0), detect={"collision": 0.01})
    power = out["collision_power"]
    assert power["no_power"] is True and power["difference_source"] == "given"
    assert power["pairs_needed"] == P.mcnemar_sample_size(0.01, 0.0)
    # (1.959964 * 0.1 + 0.841621 * sqrt(0.01 - 0.0001))^2 / 0.0001 = 0.2797366^2 / 0.0001 = 782.5 -> 783 (by hand)
    assert power["pairs_needed"] == 783


def test_terminal_table_is_fixed_width():
    """Each column starts at the same offset in the header and in every row."""
    rng = np.random.default_rng(13)
    ref_rows = make_rows(rng, 300, 0.02, 20.0)
    cmps = {
        "mpc+constant-velocity": P.paired_comparison(ref_rows, make_rows(rng, 300, 0.08, 21.0), reference="mpc+oracle"),
        "rules": P.paired_comparison(ref_rows, make_rows(rng, 300, 0.03, 18.0), reference="mpc+oracle"),
    }
    text = P.comparison_table(cmps)
    lines = text.splitlines()
    starts = [m.start() for m in re.finditer(r"-+", lines[1])]
    assert len(starts) == len(P.TABLE_HEADER)
    for line in lines[0:1] + lines[2:4]:
        for s in starts[1:]:
            assert line[s - 2 : s] == "  " and line[s] != " "
    rows = table_cells(text)
    assert [r["planner"] for r in rows] == ["mpc+constant-velocity", "rules"]
    cv = cmps["mpc+constant-velocity"]
    low, high = cv["collision_rate_diff_ci95"]
    assert rows[0]["collision diff [95% CI]"] == f"{cv['collision_rate_diff']:+.3f} [{low:+.3f}, {high:+.3f}]"
    assert rows[0]["reference"] == "mpc+oracle" and rows[0]["pairs"] == "300"


# --- the differences the data can tell ----------------------------------------------------------------------


@pytest.mark.parametrize(
    "ci, expected",
    [
        ([0.011, 0.4], True),
        ([-0.4, -0.011], True),
        ([0.0, 0.4], False),  # touching zero is not excluding it
        ([-0.1, 0.1], False),
        ([float("nan"), 0.4], False),
        (None, False),
        ("ab", False),
    ],
)
def test_excludes_zero(ci, expected):
    assert P.excludes_zero(ci) is expected


def test_clear_differences_lists_only_intervals_off_zero():
    """Planner A collides in 10 of 40 episodes where the reference never does and drives 1 m/s faster; planner B
    is the reference's twin. Only A's collision and success differences (exact McNemar p = 2 / 2**10 =
    0.001953125, by hand from the binomial) and its speed difference are listed; B's outcomes without power
    never are."""

    def rows(collide: int, speed: float) -> list[dict]:
        return [
            {
                "seed": s,
                "collision": s < collide,
                "success": s >= collide,
                "near_miss": False,
                "mean_speed_mps": speed + 0.1 * (s % 3),
                "progress_m": 150.0 + (s % 5),
            }
            for s in range(40)
        ]

    ref = rows(0, 20.0)
    cmps = {
        "A": P.paired_comparison(ref, rows(10, 21.0), reference="oracle"),
        "B": P.paired_comparison(ref, rows(0, 20.0), reference="oracle"),
    }
    clear = P.clear_differences(cmps)
    assert [(d["planner"], d["key"]) for d in clear] == [
        ("A", "collision_rate_diff"),
        ("A", "success_diff"),
        ("A", "mean_speed_diff_mps"),
    ]
    col = clear[0]
    assert col["difference"] == 0.25 and col["p_value"] == pytest.approx(0.001953125, rel=1e-12)
    assert col["ci95"] == cmps["A"]["collision_rate_diff_ci95"] and col["ci95"][0] > 0
    low, high = col["ci95"]
    assert (
        col["text"] == f"A vs oracle: collision rate +0.250 [{low:+.3f}, {high:+.3f}] over 40 pairs, McNemar p = 0.0020"
    )
    assert clear[2]["p_value"] is None and clear[2]["text"].startswith("A vs oracle: mean speed +1.00 [")
    assert clear[2]["text"].endswith(" m/s over 40 pairs")
    assert cmps["B"]["collision_power"]["no_power"] and P.clear_differences({"B": cmps["B"]}) == []


# --- bad input ------------------------------------------------------------------------------------------------


def test_different_seed_sets_are_refused_in_one_line():
    """Seed sets that differ: one ConfigError line naming both planners, the counts and an example seed."""
    rng = np.random.default_rng(14)
    ref_rows = make_rows(rng, 10, 0.1, 20.0)
    own_rows = make_rows(rng, 10, 0.1, 20.0, seeds=range(3, 13))
    msg = (
        "paired comparison of 'rules' with reference 'mpc+oracle': the seed sets differ (3 seeds only in 'rules', "
        "e.g. 10; 3 only in 'mpc+oracle', e.g. 0); run both planners with the same --seed and --episodes"
    )
    with pytest.raises(ConfigError, match=re.escape(msg)):
        P.paired_comparison(ref_rows, own_rows, reference="mpc+oracle", planner="rules")


def test_other_bad_input_is_refused_in_one_line():
    """Repeated seeds, missing fields, empty rows and bad detect values each raise a one-line ConfigError."""
    rng = np.random.default_rng(15)
    rows = make_rows(rng, 5, 0.1, 20.0)
    with pytest.raises(ConfigError, match=re.escape("planner 'planner' has seed 0 twice")):
        P.paired_comparison(rows, [*rows, rows[0]])
    broken = [dict(r) for r in rows]
    del broken[2]["success"]
    with pytest.raises(ConfigError, match=re.escape("a row of planner 'planner' has no 'success' field")):
        P.paired_comparison(rows, broken)
    no_ttc = [{k: v for k, v in r.items() if k != "min_ttc_s"} for r in rows]
    with pytest.raises(ConfigError, match=re.escape("row 0 of planner 'planner' has no 'min_ttc_s' field")):
        P.paired_comparison(rows, no_ttc)
    with pytest.raises(ConfigError, match=re.escape("planner 'reference' has no episode rows")):
        P.paired_comparison([], rows)
    with pytest.raises(ConfigError, match=re.escape("detect['collision'] must be a difference in [-1, 1] other")):
        P.paired_comparison(rows, rows, detect={"collision": 0.0})
    with pytest.raises(ConfigError, match=re.escape("detect keys must be among")):
        P.paired_comparison(rows, rows, detect={"offroad": 0.1})
    for err in (lambda: P.mcnemar_sample_size(0.7, 0.6), lambda: P.mcnemar_exact_power(0.1, 0.1, 0)):
        with pytest.raises(ConfigError):
            err()
