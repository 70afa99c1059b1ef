"""Figures of results: reliability diagrams, training curves and the closed-loop comparison of planners.

Numbers and dicts in (as the evaluation and training write them to disk), a ``matplotlib.figure.Figure`` on its own
Agg canvas out: no pyplot, no global state, no torch. Every axis is labelled with its unit (``[1]`` for a
dimensionless share or probability). Planner colours come from ``wmplan.viz.style.PLANNER_COLOURS`` in the order
the planners are given.

* :func:`reliability_figure`: predicted collision probability against what happened, per bin, with Wilson 95%
  intervals, the diagonal, and the number of decisions per bin below; one or several planners.
* :func:`training_figure`: the curves of ``metrics.csv`` and ``curve.csv`` (``wmplan.model.train``) in small
  multiples.
* :func:`closed_loop_figure`: collision and success rates per planner with their 95% intervals.
* :func:`figure_png`: a Figure as PNG bytes.

Sweep heatmaps live in :mod:`wmplan.sweep.plots`.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from wmplan.errors import ConfigError
from wmplan.viz import style

# --- helpers ------------------------------------------------------------------------------------------------------


def figure_png(fig: Figure, *, dpi: float = 110.0) -> bytes:
    """The figure as PNG bytes (tight bounding box; no time stamp in the file, so equal figures give equal bytes)."""
    if fig.canvas is None or not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight", facecolor="white", metadata={"Software": None})
    return buf.getvalue()


def _number(value: object) -> float:
    """A finite float or NaN (None, text and non-finite values become NaN)."""
    if isinstance(value, bool) or value is None:
        return math.nan
    try:
        out = float(value)
    except (TypeError, ValueError):
        return math.nan
    return out if math.isfinite(out) else math.nan


def _style_axes(ax) -> None:
    ax.tick_params(labelsize=style.FONT_SIZE_PT - 1, colors=style.TEXT_COLOUR)
    ax.grid(alpha=0.3, linewidth=0.6)
    for spine in ("top", "right"):
        ax.spines[spine].set_visible(False)


def _colour(i: int) -> str:
    return style.PLANNER_COLOURS[i % len(style.PLANNER_COLOURS)]


# --- reliability diagram ------------------------------------------------------------------------------------------


def _calibration_sets(bins: object) -> dict[str, dict]:
    """Normalise the accepted inputs to ``{name: {"bins": [...], "brier": float|None, "ece": float|None}}``."""

    def one(entry: object, name: str) -> dict:
        if isinstance(entry, Mapping) and "bins" in entry:
            return {
                "bins": list(entry["bins"]),
                "brier": entry.get("brier"),
                "ece": entry.get("ece"),
                "decisions": entry.get("decisions"),
            }
        if isinstance(entry, Sequence) and not isinstance(entry, (str, bytes)):
            return {"bins": list(entry), "brier": None, "ece": None, "decisions": None}
        raise ConfigError(
            f"reliability_figure: {name} must be a list of bins (reliability_bins) or a dict with "
            f"'bins' (report.calibration), got {type(entry).__name__}"
        )

    if isinstance(bins, Mapping) and "bins" not in bins:
        sets = {
            str(k): one(v, f"bins[{k!r}]") for k, v in bins.items() if not (isinstance(v, Mapping) and "bins" not in v)
        }  # entries without bins: no decisions
    else:
        sets = {"": one(bins, "bins")}
    for name, entry in sets.items():
        for i, b in enumerate(entry["bins"]):
            if not isinstance(b, Mapping) or not {"low", "high", "count"} <= set(b):
                raise ConfigError(
                    f"reliability_figure: bin {i} of {name or 'bins'} must be a dict with low, high, "
                    f"count, mean_pred and freq (as wmplan.evaluate.stats.reliability_bins gives)"
                )
    if not sets or not any(e["bins"] for e in sets.values()):
        raise ConfigError("reliability_figure: no bins to draw; pass reliability_bins(...) or a calibration dict")
    return sets


def reliability_figure(
    bins: object,
    *,
    title: str | None = None,
    brier: float | None = None,
    ece: float | None = None,
    width_in: float = 6.4,
) -> Figure:
    """Reliability diagram of predicted collision probabilities.

    Args:
        bins: one planner's bins, a list of dicts with ``low``, ``high``, ``count``, ``mean_pred`` and ``freq`` as
            :func:`wmplan.evaluate.stats.reliability_bins` returns (empty bins may hold NaN or None); or one
            planner's calibration dict with ``bins``, ``brier`` and ``ece`` (as
            :func:`wmplan.evaluate.tables.calibration` returns and ``summary.json`` stores); or a dict of several
            planners' lists or calibration dicts, drawn overlaid.
        title: text above the diagram; for one planner the Brier score and the ECE follow it when known.
        brier, ece: the scores of a single planner given as a plain list of bins.
        width_in: figure width in inches.

    Returns:
        A Figure with two panels: observed frequency against mean predicted probability per non-empty bin (points
        with Wilson 95% intervals on the observed frequency, joined by lines; the diagonal is perfect
        calibration), and the number of decisions per bin below (log scale when the counts span decades).
    """
    from wmplan.intervals import wilson_interval

    sets = _calibration_sets(bins)
    if len(sets) == 1:
        entry = next(iter(sets.values()))
        entry["brier"] = entry["brier"] if brier is None else brier
        entry["ece"] = entry["ece"] if ece is None else ece
    fig = Figure(figsize=(width_in, width_in * 1.22), layout="constrained", facecolor="white")
    FigureCanvasAgg(fig)
    ax, ax_n = fig.subplots(2, 1, sharex=True, height_ratios=[3.0, 1.1])
    ax.plot(
        [0, 1],
        [0, 1],
        color=style.DIAGONAL_COLOUR,
        linestyle="--",
        linewidth=1.0,
        label="perfectly calibrated",
        zorder=1.0,
    )
    num_sets = len(sets)
    all_counts = []
    entry_scores: list[str] = []
    for i, (name, entry) in enumerate(sets.items()):
        colour = _colour(i)
        rows = entry["bins"]
        low = np.array([_number(b["low"]) for b in rows])
        high = np.array([_number(b["high"]) for b in rows])
        count = np.array([int(_number(b["count"])) if math.isfinite(_number(b["count"])) else 0 for b in rows])
        pred = np.array([_number(b.get("mean_pred")) for b in rows])
        freq = np.array([_number(b.get("freq")) for b in rows])
        ok = (count > 0) & np.isfinite(pred) & np.isfinite(freq)
        label = name or "predicted"
        scores = []
        if entry.get("brier") is not None and math.isfinite(_number(entry["brier"])):
            scores.append(f"Brier {float(entry['brier']):.4f}")
        if entry.get("ece") is not None and math.isfinite(_number(entry["ece"])):
            scores.append(f"ECE {float(entry['ece']):.4f}")
        if num_sets > 1 and scores:
            label = f"{label} ({', '.join(scores)})"
        if ok.any():
            k = np.round(freq[ok] * count[ok])
            lo, hi = wilson_interval(k, count[ok])
            yerr = np.vstack([np.maximum(freq[ok] - lo, 0.0), np.maximum(hi - freq[ok], 0.0)])
            ax.errorbar(
                pred[ok],
                freq[ok],
                yerr=yerr,
                color=colour,
                marker="o",
                markersize=5,
                linewidth=1.4,
                capsize=3,
                elinewidth=1.0,
                label=label,
                zorder=3.0 + 0.1 * i,
            )
        width = (high - low) / (num_sets + 0.5)
        left = low + (i + 0.25) * width
        ax_n.bar(left, count, width=width, align="edge", color=colour, alpha=0.75, label=label)
        all_counts.append(count)
        if num_sets == 1:
            entry_scores = scores
    ax.set_xlim(0.0, 1.0)
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel("observed collision frequency [1]", fontsize=style.FONT_SIZE_PT)
    handles, labels = ax.get_legend_handles_labels()
    fig.legend(
        handles,
        labels,
        loc="outside lower center",
        ncol=1 if num_sets > 1 else 2,
        fontsize=style.FONT_SIZE_PT - 0.5,
        frameon=False,
    )
    _style_axes(ax)
    counts = np.concatenate(all_counts)
    positive = counts[counts > 0]
    if positive.size and positive.max() / positive.min() >= 30:
        ax_n.set_yscale("log")
    ax_n.set_xlabel("predicted collision probability [1]", fontsize=style.FONT_SIZE_PT)
    ax_n.set_ylabel("decisions [count]", fontsize=style.FONT_SIZE_PT)
    _style_axes(ax_n)
    head = title or "Reliability of predicted collision probability"
    if num_sets == 1 and entry_scores:
        head = f"{head}\n{', '.join(entry_scores)}"
    ax.set_title(head, fontsize=style.FONT_SIZE_PT + 1, color=style.TEXT_COLOUR, loc="left")
    return fig


# --- training curves ----------------------------------------------------------------------------------------------

TRAINING_PANELS = (
    ("loss/nll", "val/nll", "Gaussian NLL of the future", "NLL [nats per object]"),
    ("loss/kl", "val/kl", "KL(posterior || prior)", "KL [nats per object]"),
    ("loss/mse", "val/mse", "squared error (least squares)", "MSE [m²]"),
    ("val/min_fde_k6_m", None, "best-of-6 final displacement (validation)", "minFDE, K = 6 [m]"),
    ("sched/kl_weight", None, "KL weight (warm-up schedule)", "KL weight [1]"),
)
"""(training key, validation key drawn dashed beside it, panel title, y label) of each small multiple; a panel is
drawn when some run logged its key."""


def read_metrics_csv(path: Path | str) -> list[dict[str, float]]:
    """Rows of a ``metrics.csv`` written by :func:`wmplan.model.train.train`, numbers as floats (NaN if empty).

    Raises:
        ConfigError: the file is missing, empty or has no ``epoch`` column.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError(f"{path}: cannot read the training metrics ({err.__class__.__name__})") from None
    reader = csv.DictReader(io.StringIO(text))
    if reader.fieldnames is None or "epoch" not in reader.fieldnames:
        raise ConfigError(f"{path}: not a metrics.csv of wmplan training (no 'epoch' column in the header)")
    rows = [{k: _number(v) for k, v in row.items() if k is not None} for row in reader]
    if not rows:
        raise ConfigError(f"{path}: holds a header but no epochs")
    return rows


def _runs(history: object) -> dict[str, list[dict]]:
    if isinstance(history, (str, Path)):
        return {"": read_metrics_csv(history)}
    if isinstance(history, Mapping):
        return {
            str(k): (read_metrics_csv(v) if isinstance(v, (str, Path)) else [dict(r) for r in v])
            for k, v in history.items()
        }
    if isinstance(history, Sequence):
        return {"": [dict(r) for r in history]}
    raise ConfigError(
        f"training_figure: history must be rows (list of dicts), a metrics.csv path or a dict of "
        f"those, got {type(history).__name__}"
    )


def _curve_points(rows: list[dict], key: str) -> tuple[list[dict], np.ndarray]:
    """The rows that draw ``key`` and their x values (epochs done): the fine curve's rows (``curve.csv``, which carry
    ``epochs_done``) when they logged ``key``, else the per-epoch rows (``metrics.csv``) at the end of their epoch."""
    fine = [r for r in rows if math.isfinite(_number(r.get("epochs_done")))]
    if any(math.isfinite(_number(r.get(key))) for r in fine):
        return fine, np.array([_number(r["epochs_done"]) for r in fine])
    coarse = [r for r in rows if not math.isfinite(_number(r.get("epochs_done")))]
    return coarse, np.array([_number(r.get("epoch", j)) for j, r in enumerate(coarse)]) + 1.0  # epochs from 1


def training_figure(history: object, *, title: str | None = None, width_in: float = 10.0) -> Figure:
    """Training curves in small multiples.

    Args:
        history: per-epoch rows (dicts with ``epoch`` and the keys of ``wmplan.model.train``), or a path to a
            ``metrics.csv``, or a dict of run name -> rows or path (e.g. ``{"latent": ..., "deterministic": ...}``),
            drawn in the same panels in different colours. Rows of the finer curve (``curve.csv``: they carry
            ``epochs_done``) may be mixed in: a key they logged is drawn from them, point by point.
        title: text above the panels.
        width_in: figure width in inches.

    Returns:
        A Figure with one panel per key of :data:`TRAINING_PANELS` that some run logged: the training value (solid)
        and the validation value (dashed) against the epochs done.
    """
    runs = _runs(history)
    if not runs or not any(runs.values()):
        raise ConfigError("training_figure: no epochs to draw")
    panels = [
        p
        for p in TRAINING_PANELS
        if any(any(math.isfinite(_number(r.get(p[0]))) for r in rows) for rows in runs.values())
    ]
    if not panels:
        raise ConfigError(f"training_figure: none of the keys {[p[0] for p in TRAINING_PANELS]} was logged")
    ncol = 2 if len(panels) > 1 else 1
    nrow = (len(panels) + ncol - 1) // ncol
    fig = Figure(figsize=(width_in, 0.6 + 2.5 * nrow), layout="constrained", facecolor="white")
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrow, ncol, squeeze=False).ravel()
    for ax in axes[len(panels) :]:
        ax.set_visible(False)
    for ax, (key, val_key, heading, ylabel) in zip(axes, panels, strict=False):
        last_epoch = 1.0
        for i, (name, all_rows) in enumerate(runs.items()):
            colour = _colour(i)
            for k, dash, marker, suffix in ((key, "-", "o", "train"), (val_key, "--", "s", "validation")):
                if k is None:
                    continue
                rows, epoch = _curve_points(all_rows, k)
                y = np.array([_number(r.get(k)) for r in rows])
                ok = np.isfinite(y) & np.isfinite(epoch)
                if not ok.any():
                    continue
                label = " ".join(w for w in (name, suffix if val_key else "") if w) or None
                ax.plot(
                    epoch[ok],
                    y[ok],
                    dash,
                    color=colour,
                    marker=marker if ok.sum() < 12 else None,
                    markersize=4,
                    markerfacecolor=colour if marker == "o" else "white",
                    linewidth=1.4,
                    label=label,
                )
                last_epoch = max(last_epoch, float(np.nanmax(epoch[ok])))
        ax.set_title(heading, fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR, loc="left")
        ax.set_xlabel("epochs done [count]", fontsize=style.FONT_SIZE_PT)
        ax.set_ylabel(ylabel, fontsize=style.FONT_SIZE_PT)
        ax.set_xlim(0.0, max(last_epoch, 1.0) + 0.5)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True, min_n_ticks=1))
        _style_axes(ax)
        if ax.get_legend_handles_labels()[1]:
            ax.legend(fontsize=style.FONT_SIZE_PT - 1.5)
    fig.suptitle(
        title or "Training curves", fontsize=style.FONT_SIZE_PT + 1, color=style.TEXT_COLOUR, x=0.01, ha="left"
    )
    return fig


# --- closed-loop comparison ---------------------------------------------------------------------------------------


def _interval(entry: Mapping, key: str) -> tuple[float, float, float]:
    rate = _number(entry.get(f"{key}_rate"))
    ci = entry.get(f"{key}_ci95") or [math.nan, math.nan]
    lo, hi = (_number(v) for v in list(ci)[:2]) if len(ci) >= 2 else (math.nan, math.nan)
    return rate, lo, hi


def closed_loop_figure(results: Mapping, *, title: str | None = None, width_in: float = 10.0) -> Figure:
    """Collision rate and success rate per planner, with their 95% intervals, as horizontal bars.

    Args:
        results: ``{planner: {collision_rate, collision_ci95, success_rate, success_ci95, episodes, ...}}`` as
            :func:`wmplan.evaluate.tables.summarise_planner` gives, or a whole ``summary.json`` dict holding it
            under ``"results"``.
        title: text above the panels.
        width_in: figure width in inches.

    Returns:
        A Figure with two panels sharing the planner axis: bars at the rates, error bars at the interval ends
        (Wilson 95% in the evaluation), each bar labelled with its rate and interval.
    """
    if isinstance(results, Mapping) and isinstance(results.get("results"), Mapping):
        results = results["results"]
    if not isinstance(results, Mapping) or not results:
        raise ConfigError("closed_loop_figure: results must be a non-empty dict {planner: summary}")
    names = list(results)
    for name in names:
        if not isinstance(results[name], Mapping) or "collision_rate" not in results[name]:
            raise ConfigError(
                f"closed_loop_figure: results[{name!r}] has no collision_rate; pass the evaluation's "
                "per-planner summaries"
            )
    fig = Figure(figsize=(width_in, 1.3 + 0.48 * len(names)), layout="constrained", facecolor="white")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 2, sharey=True)
    ypos = np.arange(len(names))[::-1]
    colours = [_colour(i) for i in range(len(names))]
    for ax, key, heading in (
        (axes[0], "collision", "collision rate (lower is better)"),
        (axes[1], "success", "success rate (higher is better)"),
    ):
        vals = np.array([_interval(results[n], key) for n in names])  # (P, 3)
        rate, lo, hi = vals[:, 0], vals[:, 1], vals[:, 2]
        has_ci = np.isfinite(lo) & np.isfinite(hi)
        shown = np.nan_to_num(rate)
        ax.barh(ypos, shown, color=colours, alpha=0.8, height=0.6)
        err = np.vstack(
            [np.where(has_ci, np.maximum(shown - lo, 0), 0), np.where(has_ci, np.maximum(hi - shown, 0), 0)]
        )
        ax.errorbar(shown, ypos, xerr=err, fmt="none", ecolor=style.TEXT_COLOUR, capsize=4, elinewidth=1.1)
        top = float(np.nanmax(np.concatenate([hi[has_ci], shown, [0.05]])))
        for y, r, low, high, ok in zip(ypos, rate, lo, hi, has_ci, strict=True):
            text = "n/a" if not math.isfinite(r) else (f"{r:.3f} [{low:.3f}, {high:.3f}]" if ok else f"{r:.3f}")
            end = high if ok else (max(r, 0.0) if math.isfinite(r) else 0.0)
            ax.text(end + 0.02 * top, y, text, va="center", fontsize=style.FONT_SIZE_PT - 1, color=style.TEXT_COLOUR)
        top = min(top, 1.0)
        ax.set_xlim(0.0, 1.5 * top)  # room for the labels right of the bars
        ticks = ax.get_xticks()
        ax.set_xticks(ticks[(ticks >= 0) & (ticks <= top + 1e-9)])
        ax.set_xlabel(f"{key} rate, share of episodes [1]", fontsize=style.FONT_SIZE_PT)
        ax.set_title(heading, fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR, loc="left")
        _style_axes(ax)
        ax.grid(axis="y", visible=False)
    episodes = [results[n].get("episodes") for n in names]
    labels = [f"{n}\n(n = {e})" if isinstance(e, int) else n for n, e in zip(names, episodes, strict=True)]
    axes[0].set_yticks(ypos, labels, fontsize=style.FONT_SIZE_PT - 0.5)
    axes[0].set_ylabel("planner", fontsize=style.FONT_SIZE_PT)
    fig.suptitle(
        title or "Closed loop in the true simulator: rates with 95% intervals",
        fontsize=style.FONT_SIZE_PT + 1,
        color=style.TEXT_COLOUR,
        x=0.01,
        ha="left",
    )
    return fig


# --- paired differences with the reference ------------------------------------------------------------------------


def paired_difference_figure(
    comparisons: Mapping, *, reference: str | None = None, title: str | None = None, width_in: float = 10.0
) -> Figure:
    """Each planner's paired differences to the reference planner, with their 95% intervals, and the caution.

    Args:
        comparisons: ``{planner: comparison}`` as :func:`wmplan.evaluate.paired.paired_comparison` gives (the
            differences of :data:`wmplan.evaluate.paired.DIFFERENCES` but progress, with their intervals,
            ``n_pairs``, ``reference`` and ``<outcome>_power``), or a whole ``summary.json`` dict holding it under
            ``"comparisons"`` (then each planner keeps its colour of :func:`closed_loop_figure`).
        reference: the reference's name for the title (default: the comparisons' own ``reference``).
        title: text above the panels.
        width_in: figure width in inches.

    Returns:
        A Figure with one panel per difference (planner minus reference): a point at the difference and a
        whisker over its interval, filled where the interval excludes zero and hollow where it does not; "no
        power" in words where no pair told the two planners apart on that outcome; a line at zero; the caution
        as its footer (:func:`wmplan.caution.caution_footer`).
    """
    from wmplan.caution import caution_footer
    from wmplan.evaluate.paired import DIFFERENCES, excludes_zero

    panels = [d for d in DIFFERENCES if d[0] != "progress_diff_m"]

    order: list = []
    if isinstance(comparisons, Mapping) and isinstance(comparisons.get("comparisons"), Mapping):
        reference = reference or comparisons.get("reference")
        order = list(comparisons.get("planners") or [])
        comparisons = comparisons["comparisons"]
    if not isinstance(comparisons, Mapping) or not comparisons:
        raise ConfigError("paired_difference_figure: comparisons must be a non-empty dict {planner: comparison}")
    names = list(comparisons)
    for name in names:
        entry = comparisons[name]
        if not isinstance(entry, Mapping) or not all(p[0] in entry and p[1] in entry for p in panels):
            raise ConfigError(
                f"paired_difference_figure: comparisons[{name!r}] lacks the differences and intervals of "
                "wmplan.evaluate.paired.paired_comparison"
            )
    reference = reference or str(comparisons[names[0]].get("reference", "the reference"))
    fig = Figure(figsize=(width_in, 1.9 + 1.05 * len(names)), layout="constrained", facecolor="white")
    FigureCanvasAgg(fig)
    fig.get_layout_engine().set(rect=(0.0, 0.05, 1.0, 0.95))  # room for the caution below
    axes = fig.subplots(1, len(panels), sharey=True)
    ypos = np.arange(len(names))[::-1].astype(float)
    for ax, (key, ci_key, outcome, quantity, unit) in zip(axes, panels, strict=True):
        reading = {"collision": "lower is safer", "near_miss": "lower is safer", "success": "higher is better"}.get(
            outcome, "higher is faster"
        )
        ax.axvline(0.0, color=style.DIAGONAL_COLOUR, linewidth=1.0, linestyle="--", zorder=1.0)
        ends = [0.0]
        for i, (y, name) in enumerate(zip(ypos, names, strict=True)):
            entry = comparisons[name]
            colour = _colour(order.index(name) if name in order else i)  # as in closed_loop_figure
            power = entry.get(f"{outcome}_power") if outcome else None
            if isinstance(power, Mapping) and power.get("no_power"):
                ax.text(
                    0.0,
                    y,
                    " no power ",
                    ha="center",
                    va="center",
                    fontsize=style.FONT_SIZE_PT - 1.5,
                    color=style.TEXT_COLOUR,
                    bbox={"facecolor": "white", "edgecolor": colour, "linewidth": 0.8},
                )
                continue
            value = _number(entry.get(key))
            ci = entry.get(ci_key)
            if not math.isfinite(value):
                continue
            low, high = (_number(v) for v in ci) if isinstance(ci, Sequence) and len(ci) == 2 else (value, value)
            strong = excludes_zero(ci)
            if math.isfinite(low) and math.isfinite(high):
                ax.plot([low, high], [y, y], color=colour, linewidth=2.2 if strong else 1.3, solid_capstyle="butt")
                ax.plot([low, high], [y, y], "|", color=colour, markersize=9)
                ends += [low, high]
            ax.plot(
                value,
                y,
                "o",
                markersize=7,
                color=colour,
                markerfacecolor=colour if strong else "white",
                markeredgewidth=1.6,
                zorder=3.0,
            )
            ends.append(value)
            digits = 3 if outcome else 2
            text = f"{value:+.{digits}f}" + (
                f" [{low:+.{digits}f}, {high:+.{digits}f}]" if math.isfinite(low) and math.isfinite(high) else ""
            )
            ax.annotate(
                text,
                (value, y),
                xytext=(0, 7),
                textcoords="offset points",
                ha="center",
                va="bottom",
                fontsize=style.FONT_SIZE_PT - 1.5,
                color=style.TEXT_COLOUR,
                fontweight="bold" if strong else "normal",
            )
        span = max(abs(min(ends)), abs(max(ends)), 0.02 if outcome else 0.2)
        ax.set_xlim(-1.25 * span, 1.25 * span)
        ax.set_ylim(-0.7, len(names) - 0.3)
        ax.set_xlabel(f"difference [{unit.strip() or '1'}]", fontsize=style.FONT_SIZE_PT)
        ax.set_title(f"{quantity}\n({reading})", fontsize=style.FONT_SIZE_PT, color=style.TEXT_COLOUR, loc="left")
        _style_axes(ax)
        ax.grid(axis="y", visible=False)
    labels = [
        f"{n}\n({comparisons[n].get('n_pairs')} pairs)" if isinstance(comparisons[n].get("n_pairs"), int) else n
        for n in names
    ]
    axes[0].set_yticks(ypos, labels, fontsize=style.FONT_SIZE_PT - 0.5)
    fig.suptitle(
        title
        or f"Paired differences to {reference} on the same episode seeds (planner minus {reference}), 95% intervals;"
        " filled: the interval excludes zero",
        fontsize=style.FONT_SIZE_PT + 0.5,
        color=style.TEXT_COLOUR,
        x=0.01,
        ha="left",
    )
    caution_footer(fig)
    return fig
