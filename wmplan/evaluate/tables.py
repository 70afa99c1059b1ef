"""Tables of closed-loop results with 95% intervals, calibration, and the files an evaluation leaves on disk.

``OUT/episodes.parquet``: one row per episode and planner (columns: :mod:`wmplan.evaluate.rows`).
``OUT/calibration.parquet``: one row per decision of a risk-predicting planner (predicted, happened).
``OUT/summary.json``: ``{"results": {planner: {...}}, "calibration": {planner: {...}}, ...}``.
All written atomically.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np

from wmplan.evaluate.rows import rows_table
from wmplan.evaluate.stats import (
    brier_score,
    expected_calibration_error,
    mean_ci,
    reliability_bins,
)
from wmplan.intervals import wilson_interval
from wmplan.io import atomic_write_bytes, atomic_write_json
from wmplan.sim.engine import CONTACT_SIDES


def _rate(flags: np.ndarray) -> tuple[float, list[float]]:
    n = len(flags)
    k = int(np.sum(flags))
    lo, hi = wilson_interval(k, n)
    return k / n, [float(lo), float(hi)]


def _mean(values: np.ndarray) -> tuple[float, list[float]]:
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if len(v) < 2:
        m = float(v.mean()) if len(v) else math.nan
        return m, [math.nan, math.nan]
    ci = mean_ci(v)
    return float(ci.mean), [float(ci.low), float(ci.high)]


def summarise_planner(rows: list[dict]) -> dict:
    """Rates with Wilson 95% intervals and means with t intervals for one planner's episodes.

    Collisions are also counted by the side of the ego that was touched (``collisions_by_contact_side``: front,
    rear, left, right; see :func:`wmplan.sim.engine.contact_sides`). Besides collisions, leaving the road and
    success, the timeouts (episodes that ran out of time without reaching the goal, colliding or leaving the road)
    and how many of them ended outside the goal's lanes (a stall before the merge; rows without ``in_goal_lane``
    count as inside)."""
    col = np.array([r["collision"] for r in rows])
    off = np.array([r["offroad"] for r in rows])
    suc = np.array([r["success"] for r in rows])
    # timed out: neither reached the goal nor ended by a collision or by leaving the road
    timeout = ~col & ~off & ~suc
    stalled = timeout & ~np.array([r.get("in_goal_lane", True) for r in rows], dtype=bool)
    coll_rate, coll_ci = _rate(col)
    off_rate, off_ci = _rate(off)
    succ_rate, succ_ci = _rate(suc)
    timeout_rate, timeout_ci = _rate(timeout)
    near_rate, near_ci = _rate(np.array([r["near_miss"] for r in rows], dtype=bool))
    speed, speed_ci = _mean(np.array([r["mean_speed_mps"] for r in rows]))
    prog, prog_ci = _mean(np.array([r["progress_m"] for r in rows]))
    jerk, jerk_ci = _mean(np.array([r["rms_jerk_mps3"] for r in rows]))
    ttc = np.array([r["min_ttc_s"] for r in rows])
    dec = np.array([r["decision_ms"] for r in rows])
    sides = [r.get("contact_side", "") for r in rows if r["collision"]]
    return {
        "episodes": len(rows),
        "collision_rate": coll_rate,
        "collision_ci95": coll_ci,
        "collisions_by_contact_side": {k: sides.count(k) for k in CONTACT_SIDES if k in sides},
        "offroad_rate": off_rate,
        "offroad_ci95": off_ci,
        "success_rate": succ_rate,
        "success_ci95": succ_ci,
        "timeout_rate": timeout_rate,
        "timeout_ci95": timeout_ci,
        "timeouts_outside_goal_lanes": int(stalled.sum()),
        "mean_speed_mps": speed,
        "mean_speed_ci95": speed_ci,
        "progress_m": prog,
        "progress_ci95": prog_ci,
        "rms_jerk_mps3": jerk,
        "rms_jerk_ci95": jerk_ci,
        "min_ttc_s_median": float(np.median(ttc)),
        "near_miss_rate": near_rate,
        "near_miss_ci95": near_ci,
        "decision_ms_median": float(np.median(dec)),
    }


RISKY_P = 0.01
"""Predicted P(collision) above which a decision counts as one where risk was predicted at all."""


def calibration(predicted: list[float], happened: list[int], num_bins: int = 10) -> dict:
    """Brier score, expected calibration error and reliability bins of predicted collision probabilities, and
    how many decisions predicted a probability above RISKY_P and how many of those a collision followed (with few
    such decisions the calibration measures little)."""
    p = np.asarray(predicted, dtype=np.float64)
    y = np.asarray(happened, dtype=np.float64)
    if len(p) == 0:
        return {"decisions": 0}
    bins = reliability_bins(p, y, num_bins)
    clean = [{k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in b.items()} for b in bins]
    # "positives": decisions followed by a collision within the horizon; with none or few, a small ECE only says
    # that the predictions were small, not that they were calibrated where it matters
    risky = p > RISKY_P
    return {
        "decisions": int(len(p)),
        "positives": int(y.sum()),
        "decisions_p_above_0_01": int(risky.sum()),
        "positives_p_above_0_01": int(y[risky].sum()),
        "brier": float(brier_score(p, y)),
        "ece": float(expected_calibration_error(p, y, num_bins)),
        "num_bins": num_bins,
        "mean_predicted": float(p.mean()),
        "observed_rate": float(y.mean()),
        "bins": clean,
    }


def write_parquet(path: Path, rows: list[dict]) -> None:
    """Rows as a Parquet table (the caution and row version in its metadata), atomically."""
    import pyarrow.parquet as pq

    table = rows_table(rows)
    buf = io.BytesIO()
    pq.write_table(table, buf)
    atomic_write_bytes(Path(path), buf.getvalue())


def write_outputs(out_dir: Path, summary: dict, rows: list[dict], calib_rows: list[dict]) -> None:
    """Write ``episodes.parquet``, ``calibration.parquet`` (if any records) and ``summary.json`` into ``out_dir``,
    atomically."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    write_parquet(out_dir / "episodes.parquet", rows)
    if calib_rows:
        write_parquet(out_dir / "calibration.parquet", calib_rows)
    atomic_write_json(out_dir / "summary.json", summary)


def format_table(results: dict[str, dict], calib: dict[str, dict] | None = None) -> str:
    """The terminal table: one row per planner, rates with their 95% intervals; with ``calib`` (planner ->
    :func:`calibration` output) also the ECE and, beside it, how many decisions were followed by a collision."""
    w = max([24, *(len(name) + 2 for name in results)])
    head = (
        f"{'planner':<{w}}{'n':>5}  {'collision [95% CI]':<22}{'success [95% CI]':<22}{'off-road':>9}"
        f"{'timeout':>9}{'speed m/s':>11}{'decision ms':>13}"
    )
    if calib is not None:
        head += f"{'ECE (positives)':>18}"
    lines = [head, "-" * len(head)]
    for name, r in results.items():
        c, s = r["collision_ci95"], r["success_ci95"]
        line = (
            f"{name:<{w}}{r['episodes']:>5}  {r['collision_rate']:.3f} [{c[0]:.3f}, {c[1]:.3f}]   "
            f"{r['success_rate']:.3f} [{s[0]:.3f}, {s[1]:.3f}]   {r['offroad_rate']:>7.3f}"
            f"{r.get('timeout_rate', math.nan):>9.3f}{r['mean_speed_mps']:>11.1f}{r['decision_ms_median']:>13.1f}"
        )
        if calib is not None:
            cal = calib.get(name, {})
            line += (
                f"{cal['ece']:>10.4f} ({cal.get('positives', '?')})".rjust(18) if cal.get("decisions") else f"{'-':>18}"
            )
        lines.append(line)
    sides = [
        f"{name} {_sides_text(r['collisions_by_contact_side'])}"
        for name, r in results.items()
        if r.get("collisions_by_contact_side")
    ]
    if sides:
        lines.append("collisions by the side of the ego touched: " + "; ".join(sides))
    return "\n".join(lines)


def _sides_text(counts: dict[str, int]) -> str:
    """``{"front": 2, "rear": 1}`` -> ``"front 2, rear 1"``."""
    return ", ".join(f"{k} {v}" for k, v in counts.items())
