"""``wmplan triage RUN_DIR``: triage every failure an evaluation or a stress test left in its folder.

Two kinds of folder are read:

* an ``evaluate --out`` folder: ``summary.json`` (the scenario in ``scenario_spec``, the run's seed and the
  planners' options) and ``episodes.parquet`` (one row per episode; the failures are the rows that collided or
  left the road);
* a ``stress`` output folder: ``failures/*.json``, each with the scenario file beside it, the planner, its options
  and the scene seed (stress episodes run with the run seed 0).

Each failure is triaged by :func:`wmplan.triage.failure.triage_failure`. The folder gains ``triage.json`` (per
failure the cause, the point of no return, what the planner believed and the replays' outcomes; the causes counted
per planner; the search budget; the caution) and ``triage/<failure>.png``, one figure per failure
(:mod:`wmplan.triage.figure`). Both are written atomically.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError, WmplanError
from wmplan.evaluate.compare import _options_for
from wmplan.io import atomic_write_bytes, atomic_write_json, read_json_object
from wmplan.scenario import Scenario, builtin_names, load_scenario, parse_scenario, scenario_hash
from wmplan.triage.failure import CAUSES, STAGES, triage_failure
from wmplan.triage.search import SearchBudget

TRIAGE_FILE = "triage.json"
FIGURE_DIR = "triage"


def _evaluate_scenario(run_dir: Path, summary: dict) -> Scenario:
    """The scenario of an evaluate folder: ``scenario_spec``, or a built-in of the recorded name and hash."""
    spec = summary.get("scenario_spec")
    if isinstance(spec, dict):
        return parse_scenario(spec, f"{run_dir / 'summary.json'} (scenario_spec)")
    name, digest = summary.get("scenario"), summary.get("scenario_hash")
    if isinstance(name, str) and name in builtin_names():
        scn = load_scenario(name)
        if digest is None or scenario_hash(scn) == digest:
            return scn
    raise ConfigError(
        f"{run_dir / 'summary.json'}: scenario_spec: missing, and the scenario {name!r} is not a "
        "built-in of the same content; run `wmplan evaluate --out` again (it records the scenario)"
    )


def evaluate_failures(run_dir: Path, overrides: dict[str, Any]) -> tuple[Scenario | None, list[dict]]:
    """The failures of an ``evaluate --out`` folder: (scenario, [{scenario, planner, options, seed, eval_seed,
    episode}])."""
    import pyarrow.parquet as pq

    summary = read_json_object(run_dir / "summary.json")
    path = run_dir / "episodes.parquet"
    try:
        rows = pq.read_table(path, columns=["planner", "seed", "collision", "offroad"]).to_pylist()
    except (OSError, ValueError, KeyError) as err:
        raise ConfigError(
            f"{path}: not an episodes table with planner, seed, collision, offroad ({type(err).__name__}: {err})"
        ) from None
    failed = [r for r in rows if r["collision"] or r["offroad"]]
    if not failed:
        return None, []
    scn = _evaluate_scenario(run_dir, summary)
    opts = summary.get("options") if isinstance(summary.get("options"), dict) else {}
    opts = {**opts, **overrides}
    seed = summary.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise ConfigError(f"{run_dir / 'summary.json'}: seed: must be an integer, got {seed!r}")
    return scn, [
        {
            "scenario": scn,
            "planner": str(r["planner"]),
            "options": _options_for(str(r["planner"]), opts),
            "seed": int(r["seed"]),
            "eval_seed": seed,
            "name": f"{r['planner']}-seed{int(r['seed'])}",
        }
        for r in failed
    ]


def stress_failures(run_dir: Path, overrides: dict[str, Any]) -> list[dict]:
    """The failures saved by ``wmplan stress`` in ``run_dir/failures``."""
    out = []
    for path in sorted((run_dir / "failures").glob("*.json")):
        info = read_json_object(path)
        try:
            scn = load_scenario(path.parent / str(info["scenario_file"]))
            planner, seed = str(info["planner"]), int(info["seed"])
            options = dict(info.get("planner_options") or {})
        except (KeyError, TypeError, ValueError) as err:
            raise ConfigError(f"{path}: not a failure record ({type(err).__name__}: {err})") from None
        options.update(overrides)
        out.append(
            {"scenario": scn, "planner": planner, "options": options, "seed": seed, "eval_seed": 0, "name": path.stem}
        )
    return out


def _progress(progress: bool | Callable[[int, int, str], None] | None, total: int):
    """(advance(label), close()) over ``total`` stages: a tqdm bar on stderr, a callback, or nothing."""
    if callable(progress) and not isinstance(progress, bool):
        done = [0]

        def step(label: str) -> None:
            done[0] += 1
            progress(done[0], total, label)  # type: ignore[operator]

        return step, lambda: None
    from tqdm import tqdm

    show = sys.stderr.isatty() if progress is None else bool(progress)
    bar = tqdm(total=total, desc="triage", unit="stage", file=sys.stderr, disable=not show, dynamic_ncols=True)

    def advance(label: str) -> None:
        bar.set_postfix_str(label, refresh=False)
        bar.update(1)

    return advance, bar.close


def triage_run(
    run_dir: str | Path,
    *,
    planner_options: dict[str, Any] | None = None,
    budget: SearchBudget | None = None,
    seed: int = 0,
    max_failures: int | None = None,
    figures: bool = True,
    progress: bool | Callable[[int, int, str], None] | None = None,
) -> dict:
    """Triage every failure of an evaluate or stress output folder; write ``triage.json`` and the figures there.

    Args:
        run_dir: an ``evaluate --out`` folder or a ``stress --out`` folder (module docstring).
        planner_options: replace the recorded planner options key by key (e.g. ``model``, ``deterministic``: a
            model folder that has moved).
        budget: the search's size (default :class:`~wmplan.triage.search.SearchBudget`).
        seed: seeds the searches.
        max_failures: triage at most this many failures (in the folder's order); None: all.
        figures: draw ``triage/<failure>.png`` per failure.
        progress: True for a progress bar on stderr, a callback ``(stages_done, stages_total, stage)``, or None
            (a bar when stderr is a terminal).

    Returns:
        The report written to ``RUN_DIR/triage.json``: ``source`` ('evaluate' or 'stress'), ``failures`` (one
        :func:`~wmplan.triage.failure.triage_failure` dict per failure, with ``name`` and ``figure``), ``counts``
        (planner -> cause -> number), ``budget``, ``seed``, ``seconds``, ``caution``.

    Raises:
        ConfigError: a missing folder, a folder of neither kind, or unreadable files (one line naming the file).
    """
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise ConfigError(f"{run_dir}: no such run folder" if not run_dir.exists() else f"{run_dir}: is not a folder")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ConfigError(f"seed must be an integer >= 0, got {seed!r}")
    if max_failures is not None and (
        isinstance(max_failures, bool) or not isinstance(max_failures, int) or max_failures < 1
    ):
        raise ConfigError(f"max_failures must be an integer >= 1, got {max_failures!r}")
    budget = budget or SearchBudget()
    overrides = dict(planner_options or {})
    if (run_dir / "summary.json").is_file() and (run_dir / "episodes.parquet").is_file():
        source = "evaluate"
        _scn, items = evaluate_failures(run_dir, overrides)
    elif (run_dir / "failures").is_dir():
        source = "stress"
        items = stress_failures(run_dir, overrides)
    else:
        raise ConfigError(
            f"{run_dir}: not an evaluate or stress output folder; expected summary.json and "
            "episodes.parquet (wmplan evaluate --out) or failures/*.json (wmplan stress --out)"
        )
    found = len(items)
    if max_failures is not None:
        items = items[:max_failures]
    t0 = time.perf_counter()
    advance, close = _progress(progress, len(items) * len(STAGES))
    results = []
    try:
        for k, item in enumerate(items):
            seen = [0]

            def stage(label: str, k: int = k, seen: list = seen) -> None:
                seen[0] += 1
                advance(f"failure {k + 1}/{len(items)}: {label}")

            try:
                res = triage_failure(
                    item["scenario"],
                    item["planner"],
                    item["seed"],
                    options=item["options"],
                    eval_seed=item["eval_seed"],
                    budget=budget,
                    triage_seed=seed,
                    progress=stage,
                )
            except WmplanError as err:
                raise ConfigError(f"{run_dir}: failure {item['name']}: {err}") from None
            for _ in range(len(STAGES) - seen[0]):  # stages a non-reproduced failure skipped
                advance(f"failure {k + 1}/{len(items)}")
            res = {"name": item["name"], "scenario": item["scenario"].name, **res, "figure": None}
            if figures and res.get("decisions"):
                from wmplan.triage.figure import triage_figure_png

                rel = f"{FIGURE_DIR}/{item['name']}.png"
                atomic_write_bytes(run_dir / rel, triage_figure_png(res))
                res["figure"] = rel
            results.append(res)
    finally:
        close()
    counts: dict[str, dict[str, int]] = {}
    for r in results:
        per = counts.setdefault(r["planner"], dict.fromkeys(CAUSES, 0))
        per[r["cause"]] += 1
    report = {
        "source": source,
        "run_dir": run_dir.name,
        "failures_found": found,
        "failures_triaged": len(results),
        "counts": counts,
        "failures": results,
        "budget": budget.to_dict(),
        "seed": seed,
        "seconds": round(time.perf_counter() - t0, 1),
        "definitions": {
            "prediction": "the same planner over the oracle's futures (traits known or re-drawn) avoided it",
            "planning": "no oracle replay avoided it, but a search over the ego's action sequences against "
            "the true simulator (drivers' events fixed) did",
            "past saving": f"no sequence found from {budget.lookback_s:g} s before the contact avoided it",
            "not reproduced": "the replay of the recorded episode did not fail",
            "point_of_no_return": "the latest decision from which some action sequence still avoids the "
            "failure (bisection over decision times), in seconds before the contact",
        },
        "caution": CAUTION,
    }
    atomic_write_json(run_dir / TRIAGE_FILE, report)
    return report


def format_triage(report: dict) -> str:
    """Terminal lines: the causes per planner, then one line per failure."""
    lines = [
        f"triage of {report['failures_triaged']} of {report['failures_found']} failure(s) "
        f"({report['source']} folder, {report['seconds']} s)"
    ]
    for planner, per in report["counts"].items():
        lines.append(f"  {planner}: " + ", ".join(f"{cause} {n}" for cause, n in per.items() if n))
    for f in report["failures"]:
        pnr = f.get("point_of_no_return") or {}
        if pnr.get("status") == "found":
            when = f"point of no return {pnr['before_contact_s']:.1f} s before the contact"
        elif pnr.get("status") == "before start":
            when = "no way out from the episode's start"
        else:
            when = "no point of no return"
        lines.append(
            f"  {f['name']}: {f['outcome']} at {f['contact_s']:.1f} s -> {f['cause']}; {when} "
            f"(triaged in {f['seconds']:.0f} s)"
        )
    return "\n".join(lines)
