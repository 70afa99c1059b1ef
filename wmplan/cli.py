"""The ``wmplan`` command: turns flags into calls of the Python API.

Every verb prints human-readable output, most take ``--json FILE`` for scripting, and bad input ends in one line on
stderr (``wmplan: error: ...``) and exit status 2 — never a traceback. Ctrl-C exits with status 130.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import math
import os
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path

from wmplan.errors import ConfigError, WmplanError, one_line

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130
REPO_ROOT = Path(__file__).resolve().parent.parent


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {one_line(message, 600)} (see `{self.prog} --help`)\n")


def _progress(total: int, desc: str) -> tuple[Callable[[int], None], Callable[[], None]]:
    """A tqdm progress bar on stderr; returns (advance, close)."""
    from tqdm.auto import tqdm

    bar = tqdm(
        total=total,
        desc=desc,
        unit="step",
        leave=False,
        dynamic_ncols=True,
        file=sys.stderr,
        mininterval=0.5,
        disable=None,
    )
    return bar.update, bar.close


def _progress_factory(label: str, total: int) -> tuple[Callable[[int], None], Callable[[], None]]:
    return _progress(total, label)


def _write_json(path: str | None, payload: dict) -> None:
    if path:
        from wmplan.io import atomic_write_json

        atomic_write_json(Path(path), payload)


SEED_MAX = 2**32 - 1
"""Largest seed a flag accepts: 32 bits, taken alike by numpy's SeedSequence and torch's generators (also after the
small offsets some stages add to it) and by the int64 seed arrays of the simulator."""
MAX_EPISODES = 100_000
MAX_ASSESS_EPISODES = 4096
MAX_BUDGET = 1_000_000
MAX_WORKERS = 64
MAX_THREADS = 64
MAX_BATCH = 4096
MAX_DECISION_EVERY = 50
MAX_EPOCHS = 10_000
MAX_MINUTES = 7 * 24 * 60.0


def _int_in(minimum: int, maximum: int) -> Callable[[str], int]:
    """argparse type: an integer in [``minimum``, ``maximum``]."""

    def parse(text: str) -> int:
        try:
            value = int(text.strip()) if len(text) <= 40 else None
        except ValueError:
            value = None
        if value is None:
            raise argparse.ArgumentTypeError(
                f"invalid integer {one_line(repr(text), 60)}; give a whole number in [{minimum}, {maximum}]"
            )
        if not minimum <= value <= maximum:
            raise argparse.ArgumentTypeError(f"must lie in [{minimum}, {maximum}], got {value}")
        return value

    return parse


_seed = _int_in(0, SEED_MAX)
SEED_HELP = f"0 to {SEED_MAX} (2^32 - 1)"


def _float_in(low: float, high: float, *, low_open: bool = False) -> Callable[[str], float]:
    """argparse type: a finite number in [low, high] (or (low, high] with ``low_open``)."""

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"invalid number {one_line(repr(text), 60)}") from None
        if not (math.isfinite(value) and (low < value if low_open else low <= value) and value <= high):
            raise argparse.ArgumentTypeError(f"must lie in {'(' if low_open else '['}{low:g}, {high:g}], got {value}")
        return value

    return parse


_fraction = _float_in(0.0, 1.0)


def _name_list(text: str) -> str:
    """argparse type: a comma-separated list of distinct, non-empty names (returned as given)."""
    names = [n.strip() for n in text.split(",")]
    if not any(names):
        raise argparse.ArgumentTypeError(
            f"names nothing ({one_line(repr(text), 60)}); give one or more names separated by commas"
        )
    if not all(names):
        raise argparse.ArgumentTypeError(f"has an empty name in {one_line(repr(text), 80)}")
    if len(set(names)) != len(names):
        raise argparse.ArgumentTypeError(f"names something twice in {one_line(repr(text), 80)}")
    return text


# --- outputs, checked before any work --------------------------------------------------------------------------------

_TEMP_NAME_ROOM = 24  # the atomic writers' temporary names add a dot and a suffix of about this length


def _nearest_existing(path: Path) -> Path:
    probe = path
    while not os.path.lexists(probe) and probe != probe.parent:
        probe = probe.parent
    return probe


def check_output(path: str | Path, kind: str, flag: str) -> None:
    """Refuse an output path that cannot be written, before any work starts.

    Args:
        path: the path given on the command line.
        kind: ``"file"`` (written atomically, replacing an existing file) or ``"dir"`` (a folder created if
            missing, then filled).
        flag: the flag that named it, for the message.

    Raises:
        ConfigError: one line naming the flag, the path and what is wrong (a folder where a file is wanted or the
            reverse, a parent that is not a folder, no write permission, a name or path too long).
    """
    p = Path(os.path.abspath(path))
    name_max = 255
    path_max = 4096
    base = _nearest_existing(p)
    try:
        name_max = os.pathconf(base if base.is_dir() else base.parent, "PC_NAME_MAX")
        path_max = os.pathconf(base if base.is_dir() else base.parent, "PC_PATH_MAX")
    except (OSError, ValueError):
        pass
    if len(os.fsencode(str(p))) + _TEMP_NAME_ROOM >= path_max:
        raise ConfigError(
            f"{flag} {one_line(str(path), 120)}: the path is too long ({len(str(p))} characters; "
            f"this file system takes at most {path_max - _TEMP_NAME_ROOM - 1})"
        )
    for part in p.parts[1:]:
        if len(os.fsencode(part)) + _TEMP_NAME_ROOM > name_max:
            raise ConfigError(
                f"{flag} {one_line(str(path), 120)}: the name {one_line(part, 40)!r} is too long "
                f"({len(os.fsencode(part))} bytes; at most {name_max - _TEMP_NAME_ROOM} here)"
            )
    if os.path.lexists(p):
        if kind == "file" and p.is_dir():
            raise ConfigError(f"{flag} {path}: is a folder; name a file")
        if kind == "dir" and not p.is_dir():
            raise ConfigError(f"{flag} {path}: exists and is not a folder; name a folder")
        _probe_write(p if kind == "dir" else p.parent, flag, path)
        return
    if not base.is_dir():
        raise ConfigError(f"{flag} {path}: {base} is not a folder, so nothing can be created under it")
    _probe_write(base, flag, path)


def _probe_write(folder: Path, flag: str, path: str | Path) -> None:
    """Create and remove an empty temporary file in ``folder``: the one test that permissions, read-only file
    systems and special folders all answer truthfully."""
    import tempfile

    try:
        fd, tmp = tempfile.mkstemp(prefix=".wmplan-probe-", dir=folder)
    except OSError as err:
        raise ConfigError(
            f"{flag} {one_line(str(path), 200)}: cannot write in {one_line(str(folder), 200)} "
            f"({err.strerror or err.__class__.__name__})"
        ) from None
    os.close(fd)
    os.unlink(tmp)


def _check_outputs(args: argparse.Namespace) -> None:
    """Check every output flag of the verb (``outputs`` in its parser defaults) before it runs."""
    for attr, kind in getattr(args, "outputs", ()):
        value = getattr(args, attr, None)
        if value:
            check_output(value, kind, "--" + attr.replace("_", "-") if attr != "run_dir" else "RUN_DIR")


# --- scenarios -------------------------------------------------------------------------------------------------------


def cmd_scenarios(args: argparse.Namespace) -> int:
    """The ``wmplan scenarios`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.scenario import (
        builtin_names,
        load_scenario,
        scenario_hash,
        scenario_to_dict,
        scenario_to_yaml,
    )

    if args.action == "list":
        rows = []
        for name in builtin_names():
            scn = load_scenario(name)
            rows.append(
                {
                    "name": name,
                    "lanes": scn.road.num_lanes,
                    "duration_s": scn.duration_s,
                    "description": scn.description,
                }
            )
        if args.json:
            _write_json(args.json, {"scenarios": rows})
        width = max(len(r["name"]) for r in rows)
        for r in rows:
            print(f"{r['name']:<{width}}  {r['lanes']} lanes  {r['duration_s']:>5.1f} s  {r['description']}")
        return 0
    if args.action == "show":
        if not args.targets:
            raise ConfigError("wmplan scenarios show: name a scenario, e.g. `wmplan scenarios show onramp-merge`")
        for target in args.targets:
            scn = load_scenario(target)
            if args.json:
                _write_json(args.json, scenario_to_dict(scn))
            print(f"# {scn.name} (content hash {scenario_hash(scn)[:12]}), every default written out")
            print(scenario_to_yaml(scn), end="")
        return 0
    # check
    if not args.targets:
        raise ConfigError("wmplan scenarios check: name one or more scenario files")
    results = []
    for target in args.targets:
        scn = load_scenario(target)  # raises a one-line ScenarioError on the first bad file
        results.append({"file": target, "name": scn.name, "hash": scenario_hash(scn)})
        print(f"ok  {target}  ({scn.name}, hash {scenario_hash(scn)[:12]})")
    _write_json(args.json, {"checked": results})
    return 0


# --- simulate --------------------------------------------------------------------------------------------------------


def cmd_simulate(args: argparse.Namespace) -> int:
    """The ``wmplan simulate`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.data import decisions_per_episode, simulate_dataset
    from wmplan.data.store import MANIFEST_FILE

    scns = _scenario_list(args.scenarios, "simulate SCENARIO")
    names = ", ".join(s.name for s in scns)
    out = Path(args.out)
    if (out / MANIFEST_FILE).exists() and not args.overwrite:
        raise ConfigError(f"{out}: already holds a dataset; pass --overwrite to replace it or choose another --out")
    if out.exists() and not out.is_dir():
        raise ConfigError(f"{out}: exists and is not a folder")
    total = sum(decisions_per_episode(s, args.decision_every) for s in scns) * args.episodes
    advance, close = _progress(total, f"simulate {names}")
    t0 = time.perf_counter()
    try:
        ds = simulate_dataset(
            scns,
            out,
            episodes=args.episodes,
            seed=args.seed,
            batch_size=args.batch_size,
            policy_mix=args.policy_mix,
            decision_every=args.decision_every,
            progress=advance,
        )
    finally:
        close()
    secs = time.perf_counter() - t0
    m = ds.manifest
    summary = {
        "out": str(out),
        "scenario": names,
        "scenarios": [
            {k: e[k] for k in ("name", "hash", "num_episodes", "num_decisions", "outcomes")} for e in m["scenarios"]
        ],
        "episodes": m["num_episodes"],
        "seed": args.seed,
        "decisions_per_episode": m["num_decisions"],
        "seconds": round(secs, 2),
        "outcomes": m["outcomes"],
    }
    _write_json(args.json, summary)
    o = m["outcomes"]
    print(
        f"wrote {m['num_episodes']} episodes of {names} ({m['num_decisions']} decisions of {m['decision_dt_s']} s "
        f"each at most) to {out} in {secs:.1f} s; goal reached {o['reached_goal']}, collisions {o['collided']}, "
        f"off-road {o['offroad']}"
    )
    if len(scns) > 1:
        for e in m["scenarios"]:
            eo = e["outcomes"]
            print(
                f"  {e['name']:<20} {e['num_episodes']:>6} episodes x {e['num_decisions']:>3} decisions  "
                f"hash {e['hash'][:12]}  goal reached {eo['reached_goal']}, collisions {eo['collided']}, "
                f"off-road {eo['offroad']}"
            )
    return 0


def _scenario_list(items: Sequence[str], what: str) -> list:
    """Scenarios from names or YAML files; ``all`` (alone) means every built-in, and each item may itself be a
    comma-separated list. Raises ConfigError naming a repeated or empty entry."""
    from wmplan.scenario import builtin_names, load_scenario

    names = [n.strip() for item in items for n in item.split(",")]
    if names == ["all"]:
        names = list(builtin_names())
    if not all(names):
        raise ConfigError(f"{what}: an empty name in {' '.join(items)!r}; give names or files")
    if "all" in names:
        raise ConfigError(f"{what}: 'all' stands alone (every built-in scenario); got {' '.join(items)!r}")
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise ConfigError(f"{what}: {', '.join(twice)} given twice; give each scenario once")
    return [load_scenario(n) for n in names]


# --- render ----------------------------------------------------------------------------------------------------------


def cmd_render(args: argparse.Namespace) -> int:
    """The ``wmplan render`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.viz.anim import render_to_file

    path = render_to_file(args.scenario, Path(args.out), seed=args.seed, step=args.step)
    print(f"wrote {path}")
    return 0


# --- bench -----------------------------------------------------------------------------------------------------------

BENCHMARKS = {
    "sim": "sim_throughput.py",
    "model": "model_throughput.py",
    "plan": "plan_latency.py",
    "sweep": "sweep_scaling.py",
    "stress": "stress_batching.py",
    "triage": "triage_cost.py",
}


def _load_benchmark(file_name: str):
    path = REPO_ROOT / "benchmarks" / file_name
    if not path.is_file():
        return None
    spec = importlib.util.spec_from_file_location(f"wmplan_bench_{path.stem}", path)
    module = importlib.util.module_from_spec(spec)
    assert spec.loader is not None
    spec.loader.exec_module(module)
    return module


def cmd_bench(args: argparse.Namespace) -> int:
    """The ``wmplan bench`` verb: run it from parsed flags; returns the exit status."""
    wanted = [w.strip() for w in args.only.split(",")] if args.only else list(BENCHMARKS)
    unknown = [w for w in wanted if w not in BENCHMARKS]
    if unknown:
        raise ConfigError(f"--only: unknown benchmark(s) {unknown}; choose from {', '.join(BENCHMARKS)}")
    results: dict[str, object] = {}
    for name in wanted:
        module = _load_benchmark(BENCHMARKS[name])
        if module is None:
            results[name] = {"skipped": f"benchmarks/{BENCHMARKS[name]} is not in this checkout"}
            continue
        print(f"running benchmark {name} ...", file=sys.stderr)
        results[name] = module.run(quick=args.quick)
    _write_json(args.json, results)
    print(json.dumps(results, indent=2))
    return 0


# --- train, assess ----------------------------------------------------------------------------------------------


def cmd_train(args: argparse.Namespace) -> int:
    """The ``wmplan train`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.model.config import ModelConfig, TrainConfig
    from wmplan.model.train import train

    mcfg = ModelConfig(deterministic=args.deterministic)
    tcfg = TrainConfig(
        seed=args.seed,
        **({"minutes": args.minutes} if args.minutes is not None else {}),
        **({"max_epochs": args.epochs} if args.epochs else {}),
    )
    total = tcfg.max_epochs * tcfg.steps_per_epoch
    from tqdm.auto import tqdm

    bar = tqdm(
        total=total,
        desc="train " + ("deterministic" if args.deterministic else "latent"),
        unit="step",
        leave=False,
        file=sys.stderr,
        dynamic_ncols=True,
        mininterval=0.5,
        disable=None,
    )

    def progress(n: int, running: dict) -> None:
        bar.update(n)
        bar.set_postfix({k.split("/")[-1]: f"{v:.3g}" for k, v in running.items() if k != "loss/total"}, refresh=False)

    if args.resume:
        from wmplan.model.checkpoint import load_training_state

        _, _, st = load_training_state(Path(args.out))
        bar.update(int(st["step"]))
    from wmplan.benchkit import load_avg

    load_start = load_avg()  # the machine's state, recorded with the time (the training budget is wall-clock)
    t0 = time.perf_counter()
    try:
        res = train(args.data_dir, args.out, model_cfg=mcfg, train_cfg=tcfg, resume=args.resume, progress=progress)
    except KeyboardInterrupt:
        bar.close()
        print(
            f"wmplan: interrupted; the last finished epoch is saved in {args.out}; continue with --resume",
            file=sys.stderr,
        )
        return EXIT_INTERRUPTED
    bar.close()
    last = res.history[-1] if res.history else {}
    summary = {
        "out": str(res.out_dir),
        "epochs": len(res.history),
        "seconds": round(time.perf_counter() - t0, 1),
        "cores": os.cpu_count(),
        "torch_threads": tcfg.threads,
        "load_avg_1min_at_start": load_start,
        "load_avg_1min_at_end": load_avg(),
        "stopped_by_time_budget": res.stopped_early,
        "num_parameters": res.model.num_parameters(),
        "last_epoch": last,
    }
    _write_json(args.json, summary)
    keys = [k for k in ("val/nll", "val/mse", "val/min_fde_k6_m") if k in last]
    shown = ", ".join(f"{k} {last[k]:.3f}" for k in keys)
    print(
        f"trained {'deterministic' if args.deterministic else 'latent'} model ({res.model.num_parameters()} "
        f"parameters) for {len(res.history)} epochs in {summary['seconds']} s -> {res.out_dir}; {shown}"
    )
    if res.stopped_early:
        print(
            f"wmplan: stopped by the {tcfg.minutes:g}-minute cap after {len(res.history)} of {tcfg.max_epochs} "
            f"epochs, before the learning rate finished its decay "
            "(a larger --minutes or fewer --epochs lets it finish)",
            file=sys.stderr,
        )
    return 0


def cmd_assess(args: argparse.Namespace) -> int:
    """The ``wmplan assess`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.caution import CAUTION
    from wmplan.model.assess import assess_scenarios, format_scenario_table

    scns = _scenario_list(args.scenario, "assess --scenario")
    result = assess_scenarios(
        args.model_dir,
        scns,
        deterministic_dir=args.deterministic,
        episodes=args.episodes,
        seed=args.seed,
        progress=lambda msg: print(f"[assess] {msg}", file=sys.stderr, flush=True),
    )
    _write_json(args.json, result)
    keys = ["min_ade_k6_m", "min_fde_k6_m", "nll", "coverage_90", "energy_distance", "collision_prob_gap"]
    keys.append("collision_prob_gap_contested")
    for name in result["scenarios"]:
        one = result["by_scenario"][name]
        con = one["contested"]
        print(
            f"{name}: contested pairs (oracle P(collision) in [{con['band'][0]}, {con['band'][1]}]): {con['pairs']} "
            f"in {con['states']} of {con['screened_states']} screened states"
        )
        print(f"  {'predictor':<18}" + "".join(f"{k:>30}" for k in keys))
        for pred, row in one["predictors"].items():
            print(f"  {pred:<18}" + "".join(f"{'-':>30}" if row.get(k) is None else f"{row[k]:>30.3f}" for k in keys))
    print(format_scenario_table(result["table"]))
    print(CAUTION)
    return 0


# --- evaluate -----------------------------------------------------------------------------------------------------


def cmd_evaluate(args: argparse.Namespace) -> int:
    """The ``wmplan evaluate`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.caution import CAUTION
    from wmplan.evaluate.compare import compare_planners
    from wmplan.evaluate.paired import comparison_table
    from wmplan.evaluate.tables import format_table
    from wmplan.scenario import load_scenario

    scn = load_scenario(args.scenario)
    names = [n.strip() for n in args.planners.split(",") if n.strip()]
    options = {"sampler": args.sampler, "risk": args.risk, "epsilon": args.epsilon, "threads": args.threads}
    if args.model:
        options["model"] = args.model
    if args.deterministic:
        options["deterministic"] = args.deterministic
    detect = {"collision": args.detect} if args.detect is not None else None
    summary, _rows = compare_planners(
        scn,
        names,
        episodes=args.episodes,
        seed=args.seed,
        options=options,
        batch_size=args.batch_size,
        out_dir=Path(args.out) if args.out else None,
        progress=_progress_factory,
        reference=args.reference,
        detect=detect,
        log=lambda line: print(f"[evaluate] {line}", file=sys.stderr, flush=True),
    )
    _write_json(args.json, summary)
    print(format_table(summary["results"]))
    if summary["comparisons"]:
        print()
        print(f"paired comparisons with {summary['reference']} (the same {args.episodes} scene seeds):")
        print(comparison_table(summary["comparisons"]))
    for name, c in summary["calibration"].items():
        if c.get("decisions"):
            print(
                f"calibration {name}: Brier {c['brier']:.4f}, ECE {c['ece']:.4f} over {c['decisions']} decisions; "
                f"{c['decisions_p_above_0_01']} predicted P > 0.01, {c['positives_p_above_0_01']} of them followed "
                f"by a collision ({c['positives']} in all)"
            )
    print(CAUTION)
    return 0


# --- sweep, stress, report -------------------------------------------------------------------------------------


def cmd_sweep(args: argparse.Namespace) -> int:
    """The ``wmplan sweep`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.caution import CAUTION
    from wmplan.sweep.runner import format_summary, run_sweep

    summary = run_sweep(args.file, args.out, workers=args.workers, scheduler=args.scheduler, progress=True)
    _write_json(args.json, summary)
    print(format_summary(summary, Path(args.out)))
    print(CAUTION)
    return 0


def cmd_stress(args: argparse.Namespace) -> int:
    """The ``wmplan stress`` verb: run it from parsed flags; returns the exit status."""
    import functools

    from wmplan.caution import CAUTION
    from wmplan.stress.knobs import select_knobs
    from wmplan.stress.runner import run_stress
    from wmplan.viz.anim import animate_failure

    knobs = select_knobs(args.knobs) if args.knobs is not None else None
    options = {}
    if args.model:
        options["model"] = args.model
    if args.deterministic:
        options["deterministic"] = args.deterministic
    animate = None
    if not args.no_animation:
        animate = functools.partial(animate_failure, options=options)
    report = run_stress(
        args.scenario,
        args.planner,
        args.budget,
        args.out,
        args.seed,
        workers=args.workers,
        scheduler=args.scheduler,
        planner_options=options or None,
        animate=animate,
        progress=True,
        knobs=knobs,
    )
    _write_json(args.json, report)
    fp, mc = report["failure_prob"], report["plain_mc"]

    def num(v) -> str:
        return "n/a" if v is None else f"{v:.3g}"

    def interval(d: dict) -> str:
        ci = d.get("ci95") or [None, None]
        return f"{num(d.get('estimate'))} [{num(ci[0])}, {num(ci[1])}]"

    print(
        f"stress {args.planner} on {args.scenario}: {report['failures_found']} distinct failure(s) saved in {args.out}"
    )
    print(f"  failure probability (importance sampling): {interval(fp)}, ESS {num(fp.get('ess'))}")
    print(f"  plain Monte Carlo, same budget:            {interval(mc)}")
    if args.triage:
        from wmplan.triage import format_triage, triage_run

        print(format_triage(triage_run(args.out, planner_options=options or None, progress=True)))
    print(CAUTION)
    return 0


def cmd_triage(args: argparse.Namespace) -> int:
    """The ``wmplan triage`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.caution import CAUTION
    from wmplan.triage import format_triage, triage_run

    options = {k: v for k, v in (("model", args.model), ("deterministic", args.deterministic)) if v}
    report = triage_run(
        args.run_dir, planner_options=options, seed=args.seed, max_failures=args.max_failures, progress=True
    )
    _write_json(args.json, report)
    print(format_triage(report))
    print(f"wrote {Path(args.run_dir) / 'triage.json'}")
    print(CAUTION)
    return 0


def cmd_replay(args: argparse.Namespace) -> int:
    """The ``wmplan replay`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.stress.search import is_failure, replay_episode
    from wmplan.viz.anim import animate_failure

    options = {k: v for k, v in (("model", args.model), ("deterministic", args.deterministic)) if v}
    info, row = replay_episode(args.failure, options)
    what = row.get("outcome") or ("collision" if row["collision"] else "off-road" if row["offroad"] else "no failure")
    again = is_failure(row)
    print(
        f"{args.failure}: {info['planner']} on {info['scenario_file']}, seed {info['seed']}: "
        f"{'fails again' if again else 'does NOT fail again'} ({what} at t = {row['time_s']:.1f} s)"
    )
    if args.out:
        folder = Path(args.failure).parent
        merged = {**(info.get("planner_options") or {}), **options}
        path = animate_failure(
            folder / info["scenario_file"], int(info["seed"]), info["planner"], Path(args.out), options=merged
        )
        print(f"wrote {path}")
    return 0 if again else 1


def cmd_report(args: argparse.Namespace) -> int:
    """The ``wmplan report`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.report import cli_report

    info = cli_report(Path(args.run_dir))
    print(f"wrote {info['html']} and {info['markdown']}")
    for note in info.get("skipped", []):
        print(f"  skipped: {note}")
    return 0


# --- demo ------------------------------------------------------------------------------------------------------------


def cmd_demo(args: argparse.Namespace) -> int:
    """The ``wmplan demo`` verb: run it from parsed flags; returns the exit status."""
    from wmplan.caution import CAUTION
    from wmplan.demo import run_demo

    report = run_demo(Path(args.out), quick=args.quick, seed=args.seed)
    print(f"demo finished; see {report}")
    print(CAUTION)
    return 0


# --- parser ----------------------------------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    """The ``wmplan`` argument parser: every verb, its flags with their bounds, and what each verb writes."""
    from wmplan.caution import CAUTION

    p = _Parser(
        prog="wmplan",
        description=(
            "Learned stochastic world models of lane traffic, sampling MPC over their futures, and collision-risk "
            "evaluation with confidence intervals. " + CAUTION
        ),
    )
    sub = p.add_subparsers(dest="verb", metavar="VERB", parser_class=_Parser)
    sub.required = True

    sp = sub.add_parser("scenarios", help="list, show or check scenario files")
    sp.add_argument("action", choices=["list", "show", "check"])
    sp.add_argument("targets", nargs="*", help="scenario names or YAML files (show, check)")
    sp.add_argument("--json", metavar="FILE", help="also write the result as JSON")
    sp.set_defaults(func=cmd_scenarios, outputs=(("json", "file"),))

    sp = sub.add_parser("simulate", help="roll out episodes with behaviour policies into a dataset folder")
    sp.add_argument(
        "scenarios",
        nargs="+",
        metavar="SCENARIO",
        help="built-in scenario names or YAML files, or 'all' for every built-in: one dataset holds them all",
    )
    sp.add_argument(
        "--episodes",
        type=_int_in(1, MAX_EPISODES),
        default=200,
        help=f"number of episodes of each scenario, 1 to {MAX_EPISODES} (default 200)",
    )
    sp.add_argument("--seed", type=_seed, default=0, help=f"dataset seed, {SEED_HELP} (default 0)")
    sp.add_argument("--out", required=True, metavar="DIR", help="dataset folder to write")
    sp.add_argument(
        "--batch-size",
        type=_int_in(1, MAX_BATCH),
        default=256,
        help=f"scenes simulated at once, 1 to {MAX_BATCH} (default 256)",
    )
    sp.add_argument(
        "--policy-mix",
        type=_fraction,
        default=0.5,
        help="share of episodes driven by the exploring policy rather than the rules (default 0.5)",
    )
    sp.add_argument(
        "--decision-every",
        type=_int_in(1, MAX_DECISION_EVERY),
        default=2,
        help=f"simulator steps per recorded decision, 1 to {MAX_DECISION_EVERY} (default 2, i.e. 0.2 s)",
    )
    sp.add_argument("--overwrite", action="store_true", help="replace a dataset already in --out")
    sp.add_argument("--json", metavar="FILE", help="write a summary as JSON")
    sp.set_defaults(func=cmd_simulate, outputs=(("out", "dir"), ("json", "file")))

    sp = sub.add_parser("render", help="draw one episode of a scenario as a PNG (one moment) or GIF (animation)")
    sp.add_argument("scenario", help="built-in scenario name or YAML file")
    sp.add_argument("--out", required=True, metavar="FILE", help="FILE.png or FILE.gif (FILE.mp4 where ffmpeg exists)")
    sp.add_argument("--seed", type=_seed, default=0, help=f"{SEED_HELP} (default 0)")
    sp.add_argument(
        "--step", type=_int_in(0, 10**6), default=None, help="simulator step to draw in a PNG (default: middle)"
    )
    sp.set_defaults(func=cmd_render, outputs=(("out", "file"),))

    sp = sub.add_parser("train", help="train the forward model (or its deterministic baseline) on a dataset")
    sp.add_argument("data_dir", help="dataset folder written by `wmplan simulate`")
    sp.add_argument("--out", required=True, metavar="MODEL_DIR")
    sp.add_argument(
        "--minutes",
        type=_float_in(0.0, MAX_MINUTES, low_open=True),
        default=None,
        help="wall-clock cap: training stops after the epoch that crosses it (default 4.5; at most a week)",
    )
    sp.add_argument(
        "--epochs",
        type=_int_in(1, MAX_EPOCHS),
        default=None,
        help=f"epochs of 200 steps; the learning rate decays over them, 1 to {MAX_EPOCHS} (default 16)",
    )
    sp.add_argument("--seed", type=_seed, default=0, help=f"{SEED_HELP} (default 0)")
    sp.add_argument("--deterministic", action="store_true", help="train the least-squares baseline without latent")
    sp.add_argument("--resume", action="store_true", help="continue from the newest checkpoint in --out")
    sp.add_argument("--json", metavar="FILE", help="write a summary as JSON")
    sp.set_defaults(func=cmd_train, outputs=(("out", "dir"), ("json", "file")))

    sp = sub.add_parser("assess", help="compare the forward models with constant velocity and the oracle")
    sp.add_argument("model_dir", help="latent model folder")
    sp.add_argument(
        "--scenario",
        nargs="+",
        default=["onramp-merge"],
        metavar="SCENARIO",
        help="built-in names or YAML files (space- or comma-separated), or 'all' for every built-in: one row "
        "per scenario (default onramp-merge)",
    )
    sp.add_argument("--deterministic", metavar="DIR", default=None, help="deterministic model folder")
    sp.add_argument(
        "--episodes",
        type=_int_in(1, MAX_ASSESS_EPISODES),
        default=96,
        help=f"held-out episodes, 1 to {MAX_ASSESS_EPISODES} (default 96)",
    )
    sp.add_argument("--seed", type=_seed, default=0, help=f"{SEED_HELP} (default 0)")
    sp.add_argument("--json", metavar="FILE")
    sp.set_defaults(func=cmd_assess, outputs=(("json", "file"),))

    sp = sub.add_parser("evaluate", help="closed-loop evaluation of planners in the true simulator")
    sp.add_argument("scenario", help="built-in scenario name or YAML file")
    sp.add_argument(
        "--planners",
        type=_name_list,
        default="rules,mpc+latent,mpc+deterministic,mpc+constant-velocity,mpc+oracle",
        help="comma-separated: rules, mpc+latent, mpc+deterministic, mpc+constant-velocity, mpc+oracle, "
        "a plug-in planner module:factory, or mpc+module:factory (the sampling planner over a "
        "plug-in predictor)",
    )
    sp.add_argument("--model", metavar="MODEL_DIR", help="latent model (for mpc+latent)")
    sp.add_argument("--deterministic", metavar="DIR", help="least-squares model (for mpc+deterministic)")
    sp.add_argument(
        "--episodes",
        type=_int_in(1, MAX_EPISODES),
        default=200,
        help=f"episodes per planner, 1 to {MAX_EPISODES} (default 200)",
    )
    sp.add_argument("--seed", type=_seed, default=0, help=f"{SEED_HELP} (default 0)")
    sp.add_argument("--sampler", choices=["cem", "mppi"], default="cem")
    sp.add_argument(
        "--risk",
        choices=["penalty", "chance"],
        default="penalty",
        help="collision risk as a weighted penalty or as a chance constraint P(collision) <= epsilon",
    )
    sp.add_argument(
        "--epsilon",
        type=_float_in(0.0, 1.0, low_open=True),
        default=0.05,
        help="chance-constraint level, in (0, 1] (default 0.05)",
    )
    sp.add_argument(
        "--batch-size",
        type=_int_in(1, MAX_BATCH),
        default=50,
        help=f"episodes planned together, 1 to {MAX_BATCH} (default 50)",
    )
    sp.add_argument(
        "--threads", type=_int_in(1, MAX_THREADS), default=2, help=f"torch threads, 1 to {MAX_THREADS} (default 2)"
    )
    sp.add_argument(
        "--reference",
        metavar="PLANNER",
        default=None,
        help="compare every other planner with this one, pair by pair on the same seeds (default: "
        "mpc+oracle when it runs, else rules)",
    )
    sp.add_argument(
        "--detect",
        type=_float_in(-1.0, 1.0),
        default=None,
        metavar="DIFF",
        help="size the power for this collision-rate difference (planner minus reference, e.g. 0.02) "
        "instead of the observed one",
    )
    sp.add_argument("--out", metavar="DIR", help="write episodes.parquet, calibration.parquet, summary.json")
    sp.add_argument("--json", metavar="FILE", help="write the summary JSON")
    sp.set_defaults(func=cmd_evaluate, outputs=(("out", "dir"), ("json", "file")))

    sp = sub.add_parser("sweep", help="run a sweep file over scenario variants and planners (resumable)")
    sp.add_argument("file", help="sweep YAML file")
    sp.add_argument("--out", required=True, metavar="DIR")
    sp.add_argument(
        "--workers",
        type=_int_in(1, MAX_WORKERS),
        default=1,
        help=f"local worker processes, 1 to {MAX_WORKERS} (default 1)",
    )
    sp.add_argument("--scheduler", metavar="ADDRESS", help="run on a Dask cluster, e.g. tcp://127.0.0.1:8786")
    sp.add_argument("--json", metavar="FILE", help="also write the summary JSON here")
    sp.set_defaults(func=cmd_sweep, outputs=(("out", "dir"), ("json", "file")))

    sp = sub.add_parser("stress", help="search for failures and estimate their probability by importance sampling")
    sp.add_argument("scenario")
    sp.add_argument("--planner", default="rules", help="a planner name or plug-in import path, as for evaluate")
    sp.add_argument("--model", metavar="MODEL_DIR", help="latent model (for mpc+latent)")
    sp.add_argument("--deterministic", metavar="DIR", help="least-squares model (for mpc+deterministic)")
    sp.add_argument(
        "--budget",
        type=_int_in(1, MAX_BUDGET),
        default=2000,
        help=f"episodes per estimator, 1 to {MAX_BUDGET} (default 2000)",
    )
    sp.add_argument("--seed", type=_seed, default=0, help=f"{SEED_HELP} (default 0)")
    sp.add_argument("--workers", type=_int_in(1, MAX_WORKERS), default=1, help=f"1 to {MAX_WORKERS} (default 1)")
    sp.add_argument("--scheduler", metavar="ADDRESS")
    sp.add_argument("--no-animation", action="store_true", help="do not draw the saved failures")
    sp.add_argument(
        "--knobs",
        metavar="NAMES",
        type=_name_list,
        help="vary only these scenario knobs, comma-separated (default all: "
        "density, yield_prob, hard_brake_rate, desired_speed, ego_speed, ego_brake)",
    )
    sp.add_argument(
        "--triage",
        action="store_true",
        help="then triage the saved failures (as `wmplan triage DIR`: triage.json and figures)",
    )
    sp.add_argument("--out", required=True, metavar="DIR")
    sp.add_argument("--json", metavar="FILE")
    sp.set_defaults(func=cmd_stress, outputs=(("out", "dir"), ("json", "file")))

    sp = sub.add_parser(
        "replay", help="run a failure saved by `wmplan stress` again; exit 0 if it fails again, 1 if not"
    )
    sp.add_argument("failure", help="the failure's .json record (or the .yaml beside it)")
    sp.add_argument("--model", metavar="MODEL_DIR", help="use this latent model instead of the recorded folder")
    sp.add_argument("--deterministic", metavar="DIR", help="use this least-squares model instead of the recorded one")
    sp.add_argument("--out", metavar="FILE", help="also draw the replayed episode: FILE.gif (or .mp4 with ffmpeg)")
    sp.set_defaults(func=cmd_replay, outputs=(("out", "file"),))

    sp = sub.add_parser(
        "triage",
        help="was each failure of an evaluate or stress folder the prediction's, the "
        "plan's, or past saving? writes RUN_DIR/triage.json and a figure per failure",
    )
    sp.add_argument("run_dir", help="an `evaluate --out` or `stress --out` folder")
    sp.add_argument("--model", metavar="MODEL_DIR", help="use this latent model instead of the recorded folder")
    sp.add_argument("--deterministic", metavar="DIR", help="use this least-squares model instead of the recorded one")
    sp.add_argument(
        "--max-failures",
        type=_int_in(1, MAX_EPISODES),
        default=None,
        metavar="N",
        help=f"triage at most N failures, 1 to {MAX_EPISODES} (default all)",
    )
    sp.add_argument("--seed", type=_seed, default=0, help=f"seed of the searches, {SEED_HELP} (default 0)")
    sp.add_argument("--json", metavar="FILE", help="also write the triage report here")
    sp.set_defaults(func=cmd_triage, outputs=(("json", "file"), ("run_dir", "dir")))

    sp = sub.add_parser("report", help="write report.html and report.md from what a run left in RUN_DIR")
    sp.add_argument("run_dir")
    sp.set_defaults(func=cmd_report, outputs=(("run_dir", "dir"),))

    sp = sub.add_parser("bench", help="run the benchmarks and print their JSON")
    sp.add_argument("--json", metavar="FILE", help="write all results to FILE")
    sp.add_argument(
        "--only", metavar="LIST", type=_name_list, help=f"comma-separated subset of: {', '.join(BENCHMARKS)}"
    )
    sp.add_argument("--quick", action="store_true", help="short runs (for a smoke test, not for numbers)")
    sp.set_defaults(func=cmd_bench, outputs=(("json", "file"),))

    sp = sub.add_parser("demo", help="run the whole job end to end and write a report")
    sp.add_argument("--out", default="demo-out", metavar="DIR")
    sp.add_argument("--seed", type=_seed, default=0, help=f"{SEED_HELP} (default 0)")
    sp.add_argument("--quick", action="store_true", help="a small, fast version (for tests)")
    sp.set_defaults(func=cmd_demo, outputs=(("out", "dir"),))
    return p


def os_error_line(err: OSError) -> str:
    """One line for an operating-system error on an input or output: the path(s) and the system's reason."""
    reason = err.strerror or err.__class__.__name__
    paths = [str(f) for f in (err.filename, err.filename2) if f is not None]
    if not paths:
        return one_line(f"{reason} ({err.__class__.__name__}: {err})", 600)
    return one_line(f"{' -> '.join(paths)}: {reason}", 600)


def main(argv: Sequence[str] | None = None) -> int:
    """Run one verb. Expected failures (wmplan's errors, and operating-system errors on inputs and outputs) end with
    one line on stderr and exit status 2; anything else is a bug and keeps its traceback. Tunes the allocator first
    (wmplan/_alloc.py; WMPLAN_MALLOC_TUNING=0 opts out)."""
    from wmplan._alloc import tune_malloc

    tune_malloc()
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        _check_outputs(args)
        return int(args.func(args) or 0)
    except WmplanError as err:
        print(f"wmplan: error: {one_line(str(err), 1000)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as err:
        print(f"wmplan: error: {os_error_line(err)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("wmplan: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
