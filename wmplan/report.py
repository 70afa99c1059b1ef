"""The run report: one self-contained HTML page and one Markdown file from what a run left in its folder.

:func:`build_report` reads whichever of these files exist in ``RUN_DIR`` and skips the rest with a note:

| file                                   | section                                                          |
|----------------------------------------|------------------------------------------------------------------|
| ``scenario.yaml`` or ``data/manifest.json`` | the scenario and its key numbers (and the dataset's counts)  |
| ``latent/metrics.csv``, ``deterministic/metrics.csv`` | training curves (with ``curve.csv`` beside them:  |
|                                        | the finer curve); a note at the top when the time cap cut training |
|                                        | short (from the checkpoint's ``config.json``)                    |
| ``assess.json``                        | the forward models' assessment (``wmplan assess --json``)        |
| ``futures.npz``                        | fans of sampled futures at one decision (arrays ``history``,     |
|                                        | ``model_rows``, optional ``oracle_rows``, ``deterministic_rows``, |
|                                        | ``anchor_pose``)                                                 |
| ``evaluate/summary.json`` (or          | the closed-loop table with 95% intervals, and calibration        |
| ``summary.json`` when ``RUN_DIR`` is   |                                                                  |
| an ``evaluate --out`` folder)          |                                                                  |
| ``candidates.npz``                     | one decision's candidate plans (``ego_paths``, ``costs``,        |
|                                        | ``p_collision``, ``chosen``, optional ``futures``, ``current``,   |
|                                        | ``anchor_pose``; :func:`wmplan.viz.futures.candidate_arrays`)    |
| ``scene.png``, ``episode.gif``         | a moment and an animation of an episode                          |
| ``triage.json`` (or ``evaluate/``,     | the failure triage (``wmplan triage``): causes per planner, each |
| ``stress/triage.json``)                | failure's point of no return, its figure                         |

It writes ``RUN_DIR/report.html`` (figures embedded as base64 PNG and GIF, a small inline style sheet, no external
assets) and ``RUN_DIR/report.md`` (figures as PNG files in ``RUN_DIR/figures/``, the GIF and scene picture linked
where they are). Every file is written atomically. Both end with the cautions: the report describes a simplified
traffic model and certifies nothing about a real vehicle.
"""

from __future__ import annotations

import base64
import html
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from wmplan.caution import CAUTION, CAUTION_DETAIL
from wmplan.errors import ConfigError, WmplanError
from wmplan.io import atomic_write_bytes, atomic_write_text, read_json_object

CAUTIONS = (CAUTION_DETAIL, CAUTION)

ASSESS_METRICS = (
    (
        "min_ade_k6_m",
        "minADE, K = 6 [m]",
        "best of 6 sampled futures per object: mean distance to the true track over the horizon; lower is better",
    ),
    (
        "min_fde_k6_m",
        "minFDE, K = 6 [m]",
        "best of 6: distance to the true position at the end of the horizon; lower is better",
    ),
    (
        "nll",
        "NLL [nats]",
        "negative log-likelihood of each true position (x, y) per object and step under the "
        "predictive distribution; lower is better",
    ),
    (
        "coverage_90",
        "coverage of 90% intervals [1]",
        "share of true coordinates inside the central 90% predictive "
        "interval; 0.90 is calibrated, less is overconfident",
    ),
    (
        "energy_distance",
        "energy distance to oracle [m]",
        "distance between the distribution of predicted futures and "
        "the true simulator's (drivers' traits known); 0 is equal",
    ),
    (
        "collision_prob_gap",
        "|ΔP(collision)| vs oracle [1]",
        "mean absolute gap between predicted and true collision "
        "probability of the same plans (traits known); lower is "
        "better",
    ),
    (
        "collision_prob_gap_contested",
        "|ΔP(collision)|, contested pairs [1]",
        "the same gap over the (state, plan) pairs whose true collision probability is neither near 0 nor "
        "near 1 (see below)",
    ),
    (
        "energy_distance_resampled",
        "energy distance, traits re-drawn [m]",
        "as above, against an oracle that re-draws the drivers' hidden traits",
    ),
    (
        "collision_prob_gap_resampled",
        "|ΔP(collision)|, traits re-drawn [1]",
        "as above, against the oracle that re-draws the traits",
    ),
    (
        "collision_prob_mean",
        "mean predicted P(collision) [1]",
        "average predicted collision probability over the assessed states and plans",
    ),
    ("num_objects", "objects assessed [count]", "objects behind the displacement numbers"),
)
"""(key of ``assess.json``, column heading with unit, one-line explanation) of each assessment metric."""

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: #222; margin: 0; background: #f6f6f3; }
main { max-width: 1060px; margin: 0 auto; padding: 1.2em 1.6em 3em; background: #fff; }
h1 { font-size: 1.55em; margin: 0.4em 0 0.2em; border-bottom: 3px solid #c8460c; padding-bottom: 0.25em; }
h2 { font-size: 1.22em; margin-top: 1.8em; color: #2e3946; border-bottom: 1px solid #cdd1d6; }
h3 { font-size: 1.02em; margin-top: 1.2em; color: #2e3946; }
p.meta { color: #56677a; font-size: 0.9em; margin-top: 0; }
table { border-collapse: collapse; margin: 0.6em 0 1em; font-size: 0.9em; }
th, td { border: 1px solid #cdd1d6; padding: 0.28em 0.6em; vertical-align: top; }
th { background: #eceee4; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
figure { margin: 1em 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #e3e5e8; }
figcaption { font-size: 0.88em; color: #56677a; margin-top: 0.3em; }
.note { color: #56677a; font-style: italic; }
.caution { border-left: 5px solid #c8460c; background: #fdf3ee; padding: 0.5em 1em; }
.warn { border-left: 5px solid #b58900; background: #fdf8e4; padding: 0.5em 1em; }
ul.skipped { color: #56677a; font-size: 0.9em; }
""".strip()


# --- the document: a few kinds of blocks, rendered twice ----------------------------------------------------------


@dataclass
class _Heading:
    level: int
    text: str


@dataclass
class _Para:
    text: str
    css: str = ""


@dataclass
class _Table:
    header: list[str]
    rows: list[list[str]]
    numeric: list[bool] = field(default_factory=list)


@dataclass
class _Image:
    name: str
    """File name: under ``figures/`` for a drawn figure, or relative to the run folder for an existing file."""
    data: bytes
    mime: str
    caption: str
    existing: bool = False
    """True: the file already lies in the run folder (linked from the Markdown, not copied)."""


@dataclass
class _List:
    items: list[str]
    css: str = ""


@dataclass
class _Doc:
    blocks: list = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    sections: list[str] = field(default_factory=list)

    def add(self, *blocks) -> None:
        self.blocks.extend(blocks)

    def skip(self, text: str) -> None:
        self.skipped.append(text)
        self.blocks.append(_Para(text, css="note"))


def _fmt(value: object, digits: int = 3) -> str:
    """A number for a table: fixed decimals, integers as integers, missing or non-finite as an en dash."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "–" if value is None else str(value)
    if not math.isfinite(x):
        return "–"
    if x != 0 and abs(x) < 10 ** (-digits):
        return f"{x:.2g}"
    return f"{x:.{digits}f}"


def _ci(value: object, ci: object, digits: int = 3) -> str:
    """``rate [low, high]``, or the rate alone when the interval is missing."""
    text = _fmt(value, digits)
    if isinstance(ci, (list, tuple)) and len(ci) == 2 and all(_fmt(c) != "–" for c in ci):
        return f"{text} [{_fmt(ci[0], digits)}, {_fmt(ci[1], digits)}]"
    return text


# --- reading the run folder ---------------------------------------------------------------------------------------


def _read_npz(path: Path) -> dict[str, np.ndarray]:
    try:
        with np.load(path, allow_pickle=False) as npz:
            return {k: np.asarray(npz[k]) for k in npz.files}
    except (OSError, ValueError, EOFError) as err:
        raise ConfigError(f"{path}: not a readable .npz of plain arrays ({err.__class__.__name__}: {err})") from None


def _figure(name: str, fig, caption: str) -> _Image:
    from wmplan.viz.plots import figure_png

    data = figure_png(fig)
    fig.clear()
    return _Image(name=f"figures/{name}.png", data=data, mime="image/png", caption=caption)


def _load_scenario(run_dir: Path, doc: _Doc):
    """The run's scenario and the dataset manifest (either may be None)."""
    from wmplan.scenario import load_scenario, parse_scenario

    scenario, manifest = None, None
    yaml_path = run_dir / "scenario.yaml"
    man_path = run_dir / "data" / "manifest.json"
    if yaml_path.is_file():
        try:
            scenario = load_scenario(yaml_path)
        except WmplanError as err:
            doc.skip(f"scenario.yaml could not be read: {err}")
    if man_path.is_file():
        try:
            manifest = read_json_object(man_path)
            entries = manifest.get("scenarios")
            if scenario is None and isinstance(manifest.get("scenario"), dict):
                scenario = parse_scenario(manifest["scenario"], f"{man_path} (scenario)")
            elif scenario is None and isinstance(entries, list) and len(entries) == 1 and isinstance(entries[0], dict):
                scenario = parse_scenario(entries[0].get("scenario"), f"{man_path} (scenarios.0.scenario)")
        except WmplanError as err:
            doc.skip(f"data/manifest.json could not be read: {err}")
            manifest = None
    return scenario, manifest


# --- sections -----------------------------------------------------------------------------------------------------


def _scenario_section(doc: _Doc, scenario, manifest: dict | None) -> None:
    doc.add(_Heading(2, "Scenario"))
    if scenario is None and manifest is None:
        doc.skip("No scenario.yaml and no data/manifest.json in this run: the scenario is not described.")
        return
    if scenario is not None:
        doc.sections.append("scenario")
        doc.add(_Para(f"{scenario.name}: {scenario.description}" if scenario.description else scenario.name))
        road, traffic, drivers, ego = scenario.road, scenario.traffic, scenario.drivers, scenario.ego
        lanes = ", ".join(f"lane {i}: {a:.0f}–{b:.0f} m" for i, (a, b) in enumerate(road.lane_bounds_m()))
        rows = [
            ["road", f"{road.length_m:.0f} m long, {road.num_lanes} lanes of {road.lane_width_m:.2f} m ({lanes})"],
            ["speed limit", f"{road.speed_limit_mps:.1f} m/s ({road.speed_limit_mps * 3.6:.0f} km/h)"],
            ["episode", f"{scenario.duration_s:.1f} s in steps of {scenario.dt_s:.2f} s"],
            [
                "traffic",
                f"up to {traffic.max_vehicles} vehicles; density per lane "
                f"{', '.join(f'{d:g}' for d in traffic.density_veh_per_km)} veh/km",
            ],
            [
                "drivers",
                f"desired speed {drivers.desired_speed_mps.mean:.1f} ± {drivers.desired_speed_mps.std:.1f} m/s, "
                f"time headway {drivers.time_headway_s.mean:.2f} s, yield probability "
                f"{drivers.yield_prob.mean:.2f}, hard braking {drivers.hard_brake_rate_per_min:g} per minute",
            ],
            [
                "ego",
                f"starts in lane {ego.lane} at x = {ego.x_m:.0f} m, {ego.speed_mps:.1f} m/s; goal: x = "
                f"{ego.goal.x_m:.0f} m in lane(s) {', '.join(str(v) for v in ego.goal.lanes)}",
            ],
        ]
        doc.add(_Table(["", "value"], rows))
    if manifest is not None:
        doc.sections.append("dataset")
        out = manifest.get("outcomes") if isinstance(manifest.get("outcomes"), dict) else {}
        rows = [
            ["episodes", _fmt(manifest.get("num_episodes"))],
            ["decisions per episode", _fmt(manifest.get("num_decisions"))],
            ["decision step [s]", _fmt(manifest.get("decision_dt_s"), 2)],
            ["share driven by the exploring policy [1]", _fmt(manifest.get("policy_mix"), 2)],
            ["seed", _fmt(manifest.get("seed"))],
        ]
        words = {
            "collided": "episodes with a collision",
            "offroad": "episodes that left the road",
            "reached_goal": "episodes that reached the goal",
        }
        rows += [[words.get(k, k.replace("_", " ")), _fmt(v)] for k, v in out.items()]
        doc.add(_Heading(3, "Training data (data/manifest.json)"), _Table(["", "value"], rows, [False, True]))
        entries = manifest.get("scenarios")
        if isinstance(entries, list) and len(entries) > 1 and all(isinstance(e, dict) for e in entries):
            per = []
            for e in entries:
                eo = e.get("outcomes") if isinstance(e.get("outcomes"), dict) else {}
                per.append(
                    [
                        str(e.get("name")),
                        _fmt(e.get("num_episodes")),
                        _fmt(e.get("num_decisions")),
                        *[_fmt(eo.get(k)) for k in ("reached_goal", "collided", "offroad")],
                        str(e.get("hash", ""))[:12],
                    ]
                )
            doc.add(
                _Para("The dataset holds several scenarios; one model is trained on all of them."),
                _Table(
                    ["scenario", "episodes", "decisions", "goal reached", "collisions", "off-road", "hash"],
                    per,
                    [False, True, True, True, True, True, False],
                ),
            )


def _model_section(doc: _Doc, run_dir: Path, params) -> None:
    from wmplan.viz.futures import futures_figure
    from wmplan.viz.plots import read_metrics_csv, training_figure

    doc.add(_Heading(2, "Forward model"))
    names = [name for name in MODEL_FOLDERS if (run_dir / name / "metrics.csv").is_file()]
    if names:
        try:
            runs = {
                name: read_metrics_csv(run_dir / name / "metrics.csv")
                + (read_metrics_csv(run_dir / name / "curve.csv") if (run_dir / name / "curve.csv").is_file() else [])
                for name in names
            }
            fig = training_figure(runs, title="Training curves (" + " and ".join(runs) + " model)")
            doc.add(
                _Heading(3, "Training"),
                _figure(
                    "training",
                    fig,
                    "Training (solid) and validation (dashed) values against the epochs done: the losses every "
                    "tenth of an epoch where curve.csv holds them (validation on a fixed subset of held-out "
                    "windows), the other values once per epoch from metrics.csv.",
                ),
            )
            doc.sections.append("training")
        except WmplanError as err:
            doc.skip(f"Training curves skipped: {err}")
    else:
        doc.skip("No latent/metrics.csv or deterministic/metrics.csv: no training curves.")

    path = run_dir / "assess.json"
    if path.is_file():
        try:
            _assessment(doc, read_json_object(path))
        except WmplanError as err:
            doc.skip(f"Assessment skipped: {err}")
    else:
        doc.skip("No assess.json: the models' assessment is not shown.")

    path = run_dir / "futures.npz"
    if path.is_file():
        try:
            arr = _read_npz(path)
            missing = [k for k in ("history", "model_rows") if k not in arr]
            if missing:
                raise ConfigError(f"{path}: missing array(s) {', '.join(missing)}")
            pose = arr.get("anchor_pose")
            fig = futures_figure(
                arr["history"],
                arr["model_rows"],
                arr.get("oracle_rows"),
                params if pose is not None else None,
                deterministic_rows=arr.get("deterministic_rows"),
                anchor_pose=pose,
            )
            doc.add(
                _Heading(3, "Sampled futures at one decision"),
                _figure(
                    "futures",
                    fig,
                    "Futures sampled from the learned model (violet) against the true simulator's (teal) "
                    "and the least-squares model's single prediction (dark grey, dashed); ego in deep orange.",
                ),
            )
            doc.sections.append("futures")
        except WmplanError as err:
            doc.skip(f"Futures figure skipped: {err}")


SCENARIO_TABLE = (
    ("latent_min_ade_k6_m", "latent minADE [m]"),
    ("latent_min_fde_k6_m", "latent minFDE [m]"),
    ("constant_velocity_min_fde_k6_m", "constant velocity minFDE [m]"),
    ("deterministic_min_fde_k6_m", "least squares minFDE [m]"),
    ("fde_ratio_constant_velocity", "latent / constant velocity [1]"),
    ("fde_ratio_deterministic", "latent / least squares [1]"),
    ("latent_coverage_90", "coverage of 90% intervals [1]"),
    ("latent_nll", "NLL [nats]"),
    ("latent_energy_distance", "energy distance to oracle [m]"),
    ("latent_collision_prob_gap", "|ΔP(collision)| vs oracle [1]"),
    ("latent_collision_prob_gap_contested", "|ΔP(collision)|, contested pairs [1]"),
    ("contested_pairs", "contested pairs [count]"),
)
"""(key of a row of ``assess.json`` ``table``, column heading with unit) of the per-scenario assessment table."""


def _scenario_table(doc: _Doc, data: dict) -> None:
    table = data["table"]
    if not all(isinstance(r, dict) and isinstance(r.get("scenario"), str) for r in table):
        raise ConfigError("assess.json: 'table' must be a list of rows, each with a 'scenario' name")
    doc.add(_Heading(3, "Assessment per scenario (assess.json)"))
    facts = [
        f"{label} {data[key]}"
        for key, label in (("heldout_episodes", "held-out episodes per scenario"), ("seed", "seed"))
        if key in data
    ]
    doc.add(
        _Para(
            "One model for every scenario: the latent model's best-of-6 errors against constant velocity and "
            "the least-squares model on fresh episodes of each scenario, the ratios of the final errors (below 1: "
            "the latent model is better), the coverage of its 90% intervals (0.90 is calibrated) and its "
            "likelihood and distance to the oracle's futures" + ("; " + "; ".join(facts) if facts else "") + "."
        )
    )
    rows = [[r["scenario"], *[_fmt(r.get(key)) for key, _ in SCENARIO_TABLE]] for r in table]
    doc.add(_Table(["scenario", *[label for _, label in SCENARIO_TABLE]], rows, [False, *[True] * len(SCENARIO_TABLE)]))
    doc.sections.append("assessment_by_scenario")


def _trained_on(run_dir: Path) -> list[str]:
    """Names of the scenarios in the run's dataset manifest (``data/manifest.json``), [] when unknown."""
    path = run_dir / "data" / "manifest.json"
    try:
        manifest = read_json_object(path) if path.is_file() else {}
    except WmplanError:
        return []
    entries = manifest.get("scenarios")
    if isinstance(entries, list):
        names = [e.get("name") for e in entries if isinstance(e, dict)]
        if names and all(isinstance(n, str) for n in names):
            return names
    scenario = manifest.get("scenario")
    return [scenario["name"]] if isinstance(scenario, dict) and isinstance(scenario.get("name"), str) else []


MODEL_FOLDERS = ("latent", "deterministic")
"""The model folders of a run whose training the report shows."""


def training_cut_notes(run_dir: Path | str) -> list[str]:
    """One sentence per model of the run whose training stopped before its planned epochs.

    Read from the newest checkpoint's ``config.json`` in ``RUN_DIR/latent`` and ``RUN_DIR/deterministic``
    (``epoch``, ``train.max_epochs``, ``train.steps_per_epoch``, ``train.minutes``, ``stopped_by_time_cap``; for
    checkpoints written before that flag, ``metrics.elapsed_s`` past the cap): a run the cap stopped says so, one
    short of its epochs otherwise was interrupted. Folders without a readable checkpoint give no sentence.
    """
    from wmplan.model.checkpoint import checkpoint_folder

    notes = []
    for name in MODEL_FOLDERS:
        try:
            cfg = read_json_object(checkpoint_folder(Path(run_dir) / name) / "config.json")
        except WmplanError:
            continue
        train = cfg.get("train") if isinstance(cfg.get("train"), dict) else {}
        metrics = cfg.get("metrics") if isinstance(cfg.get("metrics"), dict) else {}
        done, planned = cfg.get("epoch"), train.get("max_epochs")
        if not all(isinstance(v, int) and not isinstance(v, bool) for v in (done, planned)):
            continue
        done += 1
        if done >= planned:
            continue
        per_epoch, minutes, elapsed = train.get("steps_per_epoch"), train.get("minutes"), metrics.get("elapsed_s")
        steps = (
            f" ({done * per_epoch:,} of {planned * per_epoch:,} optimiser steps)"
            if isinstance(per_epoch, int) and not isinstance(per_epoch, bool)
            else ""
        )
        capped = cfg.get("stopped_by_time_cap")
        if not isinstance(capped, bool):
            capped = isinstance(minutes, (int, float)) and isinstance(elapsed, (int, float)) and elapsed > 60 * minutes
        why = f"the {minutes:g}-minute time cap cut its training short" if capped else "its training was interrupted"
        notes.append(
            f"The {name} model is undertrained: {why} after {done} of {planned} planned epochs{steps}, before its "
            "learning rate finished its decay; its numbers in this report are those of that shorter training."
        )
    return notes


def _assessment(doc: _Doc, data: dict) -> None:
    if isinstance(data.get("table"), list) and data["table"]:
        _scenario_table(doc, data)
        if "predictors" not in data:  # several scenarios: each one's details stay in by_scenario
            return
    preds = data.get("predictors")
    if not isinstance(preds, dict) or not preds or not all(isinstance(v, dict) for v in preds.values()):
        raise ConfigError("assess.json: 'predictors' must map each predictor name to a dict of metrics")
    names = list(preds)
    known = [m for m in ASSESS_METRICS if any(m[0] in preds[n] for n in names)]
    extra = sorted(
        {
            k
            for n in names
            for k, v in preds[n].items()
            if k not in {m[0] for m in ASSESS_METRICS} and isinstance(v, (int, float))
        }
    )
    rows = [[label, *[_fmt(preds[n].get(key)) for n in names], text] for key, label, text in known]
    rows += [[key, *[_fmt(preds[n].get(key)) for n in names], "(no description)"] for key in extra]
    doc.add(_Heading(3, "Assessment against held-out episodes and the oracle (assess.json)"))
    facts = []
    for key, label in (
        ("scenario", "scenario"),
        ("heldout_episodes", "held-out episodes"),
        ("heldout_windows", "windows"),
        ("oracle_states", "oracle states"),
        ("oracle_samples", "oracle futures per plan"),
        ("seed", "seed"),
    ):
        if key in data:
            facts.append(f"{label} {data[key]}")
    if facts:
        doc.add(_Para("; ".join(facts) + "."))
    doc.add(_Table(["metric", *names, "what it measures"], rows, [False, *[True] * len(names), False]))
    oracle = data.get("oracle_collision_prob_mean")
    if isinstance(oracle, dict):
        doc.add(
            _Para(
                "True collision probability of the assessed plans (oracle): "
                + ", ".join(f"{k} {_fmt(v)}" for k, v in oracle.items())
                + "."
            )
        )
    contested = data.get("contested")
    if isinstance(contested, dict) and isinstance(contested.get("band"), list) and len(contested["band"]) == 2:
        lo, hi = contested["band"]
        doc.add(
            _Para(
                f"Contested pairs: the oracle (traits known, {contested.get('oracle_samples')} futures per plan) "
                f"screened {contested.get('screened_states')} states ({contested.get('drawn')}); "
                f"{contested.get('states')} had a plan whose true P(collision) lies in [{lo}, {hi}], "
                f"{contested.get('pairs')} pairs in all"
                + (
                    "."
                    if contested.get("pairs")
                    else ": none, so the contested gap is not measured for this scenario and these amounts."
                )
            )
        )
    doc.sections.append("assessment")


EVALUATE_FILES = ("evaluate/summary.json", "summary.json")
"""Where a run keeps its closed-loop summary: in ``evaluate/``, or at the top of a ``wmplan evaluate --out`` folder."""


def _evaluate_summary_path(run_dir: Path) -> Path:
    """The first of :data:`EVALUATE_FILES` in ``run_dir`` that is a file; ``evaluate/summary.json`` when none is.

    A top-level ``summary.json`` counts only when ``episodes.parquet`` sits beside it (as ``wmplan evaluate`` leaves
    them), so a summary of another command is not read as a closed-loop one."""
    top = run_dir / "summary.json"
    if (
        not (run_dir / "evaluate" / "summary.json").is_file()
        and top.is_file()
        and (run_dir / "episodes.parquet").is_file()
    ):
        return top
    return run_dir / "evaluate" / "summary.json"


def _closed_loop_section(doc: _Doc, run_dir: Path, params) -> dict | None:
    from wmplan.viz.plots import closed_loop_figure

    doc.add(_Heading(2, "Closed loop"))
    path = _evaluate_summary_path(run_dir)
    summary = None
    if not path.is_file():
        doc.skip("No evaluate/summary.json: no closed-loop results.")
    else:
        try:
            summary = read_json_object(path)
            results = summary.get("results")
            if not isinstance(results, dict) or not results or not all(isinstance(r, dict) for r in results.values()):
                raise ConfigError(f"{path}: 'results' must map each planner to its summary")
            facts = [
                f"{label} {summary[k]}"
                for k, label in (("scenario", "scenario"), ("episodes", "episodes"), ("seed", "seed"))
                if k in summary
            ]
            if facts:
                doc.add(
                    _Para(
                        "Episodes in the true simulator, "
                        + "; ".join(facts)
                        + ". Rates with Wilson 95% intervals, means with t intervals."
                    )
                )
            trained_on = _trained_on(run_dir)
            if trained_on and summary.get("scenario") and summary["scenario"] not in trained_on:
                doc.add(
                    _Para(
                        f"The forward models were trained on {', '.join(trained_on)}; the closed loop runs on "
                        f"{summary['scenario']}, which their training data did not include.",
                        css="note",
                    )
                )
            header = [
                "planner",
                "episodes",
                "collision [95% CI]",
                "success [95% CI]",
                "off-road [95% CI]",
                "mean speed [m/s]",
                "progress [m]",
                "near miss [95% CI]",
                "median min TTC [s]",
                "decision [ms, median]",
                "collisions by side touched",
            ]
            rows = [
                [
                    name,
                    _fmt(r.get("episodes")),
                    _ci(r.get("collision_rate"), r.get("collision_ci95")),
                    _ci(r.get("success_rate"), r.get("success_ci95")),
                    _ci(r.get("offroad_rate"), r.get("offroad_ci95")),
                    _ci(r.get("mean_speed_mps"), r.get("mean_speed_ci95"), 1),
                    _ci(r.get("progress_m"), r.get("progress_ci95"), 0),
                    _ci(r.get("near_miss_rate"), r.get("near_miss_ci95")),
                    _fmt(r.get("min_ttc_s_median"), 2),
                    _fmt(r.get("decision_ms_median"), 1),
                    ", ".join(f"{k} {v}" for k, v in (r.get("collisions_by_contact_side") or {}).items()) or "-",
                ]
                for name, r in results.items()
            ]
            doc.add(_Table(header, rows, [False] + [True] * (len(header) - 2) + [False]))
            _comparisons(doc, summary)
            fig = closed_loop_figure(results)
            doc.add(
                _figure(
                    "closed_loop",
                    fig,
                    "Collision and success rates per planner; bars end at the rate, whiskers at the 95% interval.",
                )
            )
            doc.sections.append("closed_loop")
        except WmplanError as err:
            doc.skip(f"Closed-loop results skipped: {err}")
            summary = None
    path = run_dir / "candidates.npz"
    if path.is_file():
        _candidates(doc, path, params)
    return summary


def _comparisons(doc: _Doc, summary: dict) -> None:
    """The paired comparisons with the reference planner, with the no-power notes in words."""
    from wmplan.evaluate.paired import TABLE_HEADER, TABLE_METHODS, clear_differences, comparison_rows
    from wmplan.viz.plots import paired_difference_figure

    comparisons = summary.get("comparisons")
    if not isinstance(comparisons, dict) or not comparisons:
        return
    try:
        rows, notes = comparison_rows(comparisons)
        clear = clear_differences(comparisons)
    except (KeyError, TypeError, ValueError) as err:
        raise ConfigError(
            f"evaluate/summary.json: 'comparisons' is not as `wmplan evaluate` writes it ({err!r})"
        ) from None
    doc.add(
        _Heading(3, f"Paired comparisons with {summary.get('reference')}"),
        _Para(
            "Every planner met the same scene seeds, so each is compared with the reference pair by pair. "
            + TABLE_METHODS
        ),
        _Table(list(TABLE_HEADER), rows, [False, False] + [True] * (len(TABLE_HEADER) - 2)),
    )
    if notes:
        doc.add(_List([f"[{i}] {note}" for i, note in enumerate(notes, start=1)]))
    if clear:
        doc.add(
            _Para(
                f"Differences to {summary.get('reference')} whose 95% interval excludes zero (planner minus reference):"
            ),
            _List([d["text"] for d in clear]),
        )
    else:
        doc.add(
            _Para(
                f"No difference to {summary.get('reference')} has a 95% interval that excludes zero: on these "
                "episodes the data cannot tell the planners apart."
            )
        )
    doc.add(
        _figure(
            "paired_differences",
            paired_difference_figure(summary),
            "Each planner's paired differences to the reference with their 95% intervals (filled where the "
            "interval excludes zero; 'no power' where no episode told the two apart on that outcome).",
        )
    )
    doc.sections.append("paired_differences")


def _candidates(doc: _Doc, path: Path, params) -> None:
    from wmplan.viz.futures import candidates_figure

    try:
        arr = _read_npz(path)
        missing = [k for k in ("ego_paths", "costs", "p_collision", "chosen") if k not in arr]
        if missing:
            raise ConfigError(f"{path}: missing array(s) {', '.join(missing)}")
        pose = arr.get("anchor_pose")
        fig = candidates_figure(
            arr["ego_paths"],
            arr["costs"],
            arr["p_collision"],
            arr["chosen"][()],
            arr.get("futures"),
            current=arr.get("current"),
            params=params if pose is not None else None,
            anchor_pose=pose,
        )
        doc.add(
            _Heading(3, "One decision: candidate plans and their risk"),
            _figure(
                "candidates",
                fig,
                "Candidate paths of the ego coloured by predicted P(collision), the chosen one outlined "
                "in black, the predicted futures of the chosen plan in violet; below, cost against P(collision).",
            ),
        )
        doc.sections.append("candidates")
    except WmplanError as err:
        doc.skip(f"Candidates figure skipped: {err}")


def _calibration_section(doc: _Doc, summary: dict | None) -> None:
    from wmplan.viz.plots import reliability_figure

    doc.add(_Heading(2, "Calibration of predicted risk"))
    calib = summary.get("calibration") if summary is not None else None
    usable = (
        {k: v for k, v in calib.items() if isinstance(v, dict) and v.get("bins")} if isinstance(calib, dict) else {}
    )
    if not usable:
        doc.skip("No calibration records in evaluate/summary.json (no planner predicted risk, or no evaluation).")
        return
    doc.add(
        _Para(
            "At every decision a planner predicts the collision probability of the plan it chose; this compares "
            "those predictions with whether a collision followed within the planning horizon. Brier score "
            "(Brier 1950) and expected calibration error (equal-width bins) are lower-is-better."
        )
    )
    rows = [
        [
            name,
            _fmt(c.get("decisions")),
            _fmt(c.get("decisions_p_above_0_01")),
            _fmt(c.get("positives_p_above_0_01")),
            _fmt(c.get("positives")),
            _fmt(c.get("brier"), 4),
            _fmt(c.get("ece"), 4),
            _fmt(c.get("mean_predicted"), 4),
            _fmt(c.get("observed_rate"), 4),
        ]
        for name, c in usable.items()
    ]
    doc.add(
        _Table(
            [
                "planner",
                "decisions",
                "with P > 0.01",
                "of those followed by a collision",
                "followed by a collision (all)",
                "Brier",
                "ECE",
                "mean predicted P",
                "observed rate",
            ],
            rows,
            [False] + [True] * 8,
        )
    )
    if all(not c.get("positives") for c in usable.values()):
        doc.add(
            _Para(
                "No decision was followed by a collision within its horizon: the calibration measures "
                "nothing here beyond the predictions being small."
            )
        )
    try:
        fig = reliability_figure(usable, title="Reliability of predicted collision probability")
        doc.add(
            _figure(
                "reliability",
                fig,
                "Observed collision frequency against mean predicted probability per bin, "
                "with Wilson 95% intervals; the dashed diagonal is perfect calibration. Below: decisions per "
                "bin.",
            )
        )
        doc.sections.append("calibration")
    except WmplanError as err:
        doc.skip(f"Reliability diagram skipped: {err}")


TRIAGE_FILES = ("triage.json", "evaluate/triage.json", "stress/triage.json")
TRIAGE_CAUSES = ("prediction", "planning", "past saving", "not reproduced")


def _triage_section(doc: _Doc, run_dir: Path) -> None:
    """The causes of the failures counted per planner, one row per failure, and the failures' figures."""
    found = [run_dir / name for name in TRIAGE_FILES if (run_dir / name).is_file()]
    if not found:
        return
    path = found[0]
    doc.add(_Heading(2, "Failure triage"))
    try:
        data = read_json_object(path)
        counts, failures = data.get("counts"), data.get("failures")
        if not isinstance(counts, dict) or not isinstance(failures, list):
            raise ConfigError(f"{path}: expected 'counts' (planner -> cause -> number) and 'failures' (a list)")
        defs = data.get("definitions") if isinstance(data.get("definitions"), dict) else {}
        doc.add(
            _Para(
                f"{_fmt(data.get('failures_triaged'))} of {_fmt(data.get('failures_found'))} failure(s) of "
                f"this {data.get('source', '')} run ({path.relative_to(run_dir)}), each replayed with the "
                "oracle's futures and searched for a way out against the true simulator, the drivers' random "
                "events fixed as they happened."
            ),
            _List(
                [
                    f"{cause}: {defs[cause]}"
                    for cause in (*TRIAGE_CAUSES, "point_of_no_return")
                    if isinstance(defs.get(cause), str)
                ]
            ),
        )
        doc.add(
            _Table(
                ["planner", *TRIAGE_CAUSES],
                [
                    [str(p), *(_fmt((c or {}).get(cause, 0)) for cause in TRIAGE_CAUSES)]
                    for p, c in counts.items()
                    if isinstance(c, dict)
                ],
                [False] + [True] * len(TRIAGE_CAUSES),
            )
        )
        rows = []
        for f in failures:
            if not isinstance(f, dict):
                continue
            pnr = f.get("point_of_no_return") if isinstance(f.get("point_of_no_return"), dict) else {}
            when = (
                f"{_fmt(pnr.get('before_contact_s'), 1)} s before"
                if pnr.get("status") == "found"
                else "before the start"
                if pnr.get("status") == "before start"
                else "–"
            )
            reps = f.get("replays") if isinstance(f.get("replays"), dict) else {}
            oracle = ", ".join(
                f"{k[len('oracle_') :]}: {v.get('outcome')}"
                for k, v in reps.items()
                if k.startswith("oracle_") and isinstance(v, dict)
            )
            rows.append(
                [
                    str(f.get("planner")),
                    _fmt(f.get("seed")),
                    str(f.get("outcome")),
                    _fmt(f.get("contact_s"), 1),
                    str(f.get("cause")),
                    when,
                    oracle or "–",
                ]
            )
        doc.add(
            _Table(
                ["planner", "scene seed", "outcome", "contact [s]", "cause", "point of no return", "oracle replays"],
                rows,
                [False, True, False, True, False, True, False],
            )
        )
        shown = 0
        for f in failures:
            fig = f.get("figure") if isinstance(f, dict) else None
            fig_path = path.parent / fig if isinstance(fig, str) else None
            if fig_path is None or not fig_path.is_file() or shown >= 6:
                continue
            rel = fig_path.relative_to(run_dir).as_posix()
            doc.add(
                _Image(
                    name=rel,
                    data=fig_path.read_bytes(),
                    mime="image/png",
                    existing=True,
                    caption=(
                        f"{f.get('name')}: believed (violet) and true (teal) P(collision) of the chosen plan "
                        "per decision; "
                        "the shaded band runs from the point of no return to the contact (cross)."
                    ),
                )
            )
            shown += 1
        doc.sections.append("triage")
    except WmplanError as err:
        doc.skip(f"Failure triage skipped: {err}")


def _media_section(doc: _Doc, run_dir: Path) -> None:
    found = [
        (name, mime, caption)
        for name, mime, caption in (
            ("scene.png", "image/png", "One moment of an episode seen from above (scene.png)."),
            ("episode.gif", "image/gif", "An episode, animated (episode.gif)."),
        )
        if (run_dir / name).is_file()
    ]
    doc.add(_Heading(2, "Scene and episode"))
    if not found:
        doc.skip("No scene.png or episode.gif in this run.")
        return
    for name, mime, caption in found:
        doc.add(_Image(name=name, data=(run_dir / name).read_bytes(), mime=mime, caption=caption, existing=True))
    doc.sections.append("media")


# --- rendering ----------------------------------------------------------------------------------------------------


def _html(doc: _Doc, title: str, meta: str) -> str:
    e = html.escape
    out = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{e(title)}</title>",
        f"<style>\n{_CSS}\n</style>",
        "</head>",
        "<body>",
        "<main>",
        f"<h1>{e(title)}</h1>",
        f'<p class="meta">{e(meta)}</p>',
    ]
    for b in doc.blocks:
        if isinstance(b, _Heading):
            out.append(f"<h{b.level}>{e(b.text)}</h{b.level}>")
        elif isinstance(b, _Para):
            cls = f' class="{b.css}"' if b.css else ""
            out.append(f"<p{cls}>{e(b.text)}</p>")
        elif isinstance(b, _List):
            cls = f' class="{b.css}"' if b.css else ""
            out.append(f"<ul{cls}>" + "".join(f"<li>{e(i)}</li>" for i in b.items) + "</ul>")
        elif isinstance(b, _Table):
            numeric = b.numeric or [False] * len(b.header)
            out.append("<table><thead><tr>" + "".join(f"<th>{e(h)}</th>" for h in b.header) + "</tr></thead><tbody>")
            for row in b.rows:
                cells = "".join(
                    f'<td class="num">{e(c)}</td>' if numeric[i] else f"<td>{e(c)}</td>" for i, c in enumerate(row)
                )
                out.append(f"<tr>{cells}</tr>")
            out.append("</tbody></table>")
        elif isinstance(b, _Image):
            src = f"data:{b.mime};base64,{base64.b64encode(b.data).decode('ascii')}"
            out.append(
                f'<figure><img src="{src}" alt="{e(b.caption)}"><figcaption>{e(b.caption)}</figcaption></figure>'
            )
    out += ["</main>", "</body>", "</html>", ""]
    return "\n".join(out)


def _md_cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def _markdown(doc: _Doc, title: str, meta: str) -> str:
    out = [f"# {title}", "", f"_{meta}_", ""]
    for b in doc.blocks:
        if isinstance(b, _Heading):
            out += ["#" * b.level + " " + b.text, ""]
        elif isinstance(b, _Para):
            out += [f"_{b.text}_" if b.css == "note" else f"> **{b.text}**" if b.css == "warn" else b.text, ""]
        elif isinstance(b, _List):
            out += [f"- {i}" for i in b.items] + [""]
        elif isinstance(b, _Table):
            numeric = b.numeric or [False] * len(b.header)
            out.append("| " + " | ".join(_md_cell(h) or " " for h in b.header) + " |")
            out.append("|" + "|".join("---:" if n else "---" for n in numeric) + "|")
            out += ["| " + " | ".join(_md_cell(c) for c in row) + " |" for row in b.rows]
            out.append("")
        elif isinstance(b, _Image):
            out += [f"![{b.caption}]({b.name})", "", f"_{b.caption}_", ""]
    return "\n".join(out)


# --- entry points -------------------------------------------------------------------------------------------------


def _document(run_dir: Path) -> _Doc:
    from wmplan.sim.params import SimParams

    doc = _Doc()
    scenario, manifest = _load_scenario(run_dir, doc)
    params = SimParams.from_scenario(scenario) if scenario is not None else None
    for note in training_cut_notes(run_dir):
        doc.add(_Para(note, css="warn"))
    _scenario_section(doc, scenario, manifest)
    _model_section(doc, run_dir, params)
    summary = _closed_loop_section(doc, run_dir, params)
    _calibration_section(doc, summary)
    _triage_section(doc, run_dir)
    _media_section(doc, run_dir)
    doc.add(_Heading(2, "Cautions"))
    for text in CAUTIONS:
        doc.add(_Para(text, css="caution"))
    return doc


def _write(run_dir: Path | str) -> tuple[Path, Path, _Doc]:
    run_dir = Path(run_dir)
    if not run_dir.exists():
        raise ConfigError(f"{run_dir}: no such run folder")
    if not run_dir.is_dir():
        raise ConfigError(f"{run_dir}: is a file, not a run folder")
    doc = _document(run_dir)
    if not doc.sections:
        raise ConfigError(
            f"{run_dir}: nothing to report; expected one of scenario.yaml, data/manifest.json, "
            "latent/metrics.csv, assess.json, evaluate/summary.json (or summary.json beside episodes.parquet), "
            "futures.npz, scene.png"
        )
    if doc.skipped:
        doc.add(_Heading(2, "Not in this run"), _List(doc.skipped, css="skipped"))
    title = f"wmplan run report: {run_dir.resolve().name}"
    meta = (
        f"Run folder {run_dir.resolve()}; written {datetime.now(timezone.utc).strftime('%Y-%m-%d %H:%M UTC')}. "
        + CAUTION
    )
    for b in doc.blocks:
        if isinstance(b, _Image) and not b.existing:
            atomic_write_bytes(run_dir / b.name, b.data)
    html_path, md_path = run_dir / "report.html", run_dir / "report.md"
    atomic_write_text(html_path, _html(doc, title, meta))
    atomic_write_text(md_path, _markdown(doc, title, meta))
    return html_path, md_path, doc


def build_report(run_dir: Path | str) -> tuple[Path, Path]:
    """Write ``RUN_DIR/report.html`` and ``RUN_DIR/report.md`` from what the run left there.

    Args:
        run_dir: the run folder (see the module docstring for the files it may hold).

    Returns:
        The paths of the HTML and the Markdown report.

    Raises:
        ConfigError: ``run_dir`` does not exist, is not a folder, or holds nothing the report can use.
    """
    html_path, md_path, _ = _write(run_dir)
    return html_path, md_path


def cli_report(run_dir: Path | str) -> dict:
    """What ``wmplan report RUN_DIR`` runs: build the report and describe what was written.

    Returns:
        ``{"html": path, "markdown": path, "figures": [PNG files written under figures/], "sections": [names of
        the pieces with content], "skipped": [one line per missing or unreadable piece]}``, paths as strings.
    """
    html_path, md_path, doc = _write(run_dir)
    figures = [str(Path(run_dir) / b.name) for b in doc.blocks if isinstance(b, _Image) and not b.existing]
    return {
        "html": str(html_path),
        "markdown": str(md_path),
        "figures": figures,
        "sections": list(doc.sections),
        "skipped": list(doc.skipped),
    }
