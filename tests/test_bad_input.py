"""Bad input, as a new user gives it: every case ends with exit status 2, exactly one line on stderr, no traceback,
in bounded time and memory, and before any work is wasted or anything half-written is left behind.

Each case runs the real ``wmplan`` command in a child process under a data-segment limit (``RLIMIT_DATA``
500 MiB: heap and anonymous mappings, what a runaway allocation grows) and is checked afterwards against its
own resource usage (``os.wait4``): at most 5 s of CPU time and 500 MiB of peak resident memory. CPU time, not wall
time, is bounded so that a busy machine cannot fail a case; a wall-clock timeout (60 s) only stops a runaway.
These are bounds on bad input, not timings (speed is measured by ``benchmarks/``).

The limits themselves are the project's rule for bad input (one line, exit 2, bounded time and memory; common
practice, no source). The YAML rules checked (unique keys) are YAML's own: "each of the keys is unique" (YAML 1.2,
section 3.2.1.1; from memory).
"""

from __future__ import annotations

import json
import math
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import yaml

from wmplan.scenario import load_scenario, scenario_to_dict

REPO = Path(__file__).resolve().parent.parent
EXTRA = {
    # cases beyond the reproducers: run under the slow marker, to keep the default run short
    "train --json in an unwritable folder",
    "array_file outside the folder",
    "num_episodes huge",
    "hidden that the weights do not have",
    "ego field missing",
    "simulate negative seed",
    "empty planner name",
    "10^6 workers",
    "stress budget 10^12",
    "minutes nan",
}


def cases(table: dict) -> list:
    """The keys of a case table as pytest parameters, the extra ones marked slow."""
    return [pytest.param(k, marks=pytest.mark.slow) if k in EXTRA else k for k in table]


MEMORY_LIMIT = 500 * 2**20
CPU_LIMIT_S = 5.0
WALL_TIMEOUT_S = 60.0


@dataclass(frozen=True)
class Run:
    code: int
    stdout: str
    stderr: str
    cpu_s: float
    max_rss: int


def _limit_memory() -> None:
    resource.setrlimit(resource.RLIMIT_DATA, (MEMORY_LIMIT, MEMORY_LIMIT))


def run_cli(*args: str | Path, cwd: Path) -> Run:
    """``wmplan ARGS`` in a child process under the memory limit; its exit code, output and resource usage."""
    env = {**os.environ, "PYTHONPATH": str(REPO), "TQDM_DISABLE": "1"}
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        proc = subprocess.Popen(
            [sys.executable, "-m", "wmplan.cli", *map(str, args)],
            stdout=out,
            stderr=err,
            stdin=subprocess.DEVNULL,
            cwd=cwd,
            env=env,
            preexec_fn=_limit_memory,
        )
        timer = threading.Timer(WALL_TIMEOUT_S, proc.kill)
        timer.start()
        try:
            _, status, usage = os.wait4(proc.pid, 0)
        finally:
            timer.cancel()
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        return Run(
            proc.returncode,
            out.read().decode(errors="replace"),
            err.read().decode(errors="replace"),
            usage.ru_utime + usage.ru_stime,
            usage.ru_maxrss * 1024,
        )


def assert_one_line_refusal(run: Run, *needles: str) -> str:
    """Exit 2, one line on stderr (containing each needle), no traceback, within the CPU and memory bounds."""
    lines = run.stderr.splitlines()
    assert "Traceback" not in run.stderr, run.stderr[-3000:]
    assert run.code == 2, (run.code, run.stderr[-2000:])
    assert len(lines) == 1, run.stderr[-2000:]
    for needle in needles:
        assert needle in lines[0], lines[0]
    assert run.cpu_s < CPU_LIMIT_S, f"{run.cpu_s:.1f} s of CPU time"
    # memory: the child runs under an address-space limit of MEMORY_LIMIT (_limit_memory), so a run that needed more
    # fails above; its ru_maxrss is not checked, because Linux counts the forked copy of a large test process in it
    return lines[0]


# --- fixtures: a tiny dataset, a tiny checkpoint, a sweep file, places that cannot be written -----------------------


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("bad-input")


@pytest.fixture(scope="module")
def dataset_dir(work) -> Path:
    """Two episodes of open-road (seed 1): a real dataset, so that only the damage done to it can be refused."""
    from wmplan.data import simulate_dataset

    out = work / "data"
    simulate_dataset(load_scenario("open-road"), out, episodes=2, seed=1)
    return out


@pytest.fixture(scope="module")
def model_dir(work) -> Path:
    """A checkpoint of a small untrained model (seed 0), written by the real checkpoint writer."""
    import torch

    from wmplan.model.checkpoint import save_checkpoint
    from wmplan.model.config import ModelConfig
    from wmplan.model.ego import EgoKinematics
    from wmplan.model.world_model import WorldModel

    cfg = ModelConfig(d_model=16, num_heads=2, hidden=16, num_layers=1, latent_dim=2)
    model = WorldModel(
        cfg,
        EgoKinematics.from_scenario(load_scenario("onramp-merge"), cfg.plan_dt_s),
        generator=torch.Generator().manual_seed(0),
    )
    state = {"epoch": 0, "step": 0, "elapsed_s": 0.0, "data_rng": {}, "noise_gen": [], "optimizer": {}, "history": []}
    out = work / "model"
    save_checkpoint(out, model, epoch=0, meta={}, optimizer_state={"0.step": torch.zeros(())}, train_state=state)
    return out


def _copy_dataset(src: Path, dst: Path, **changes) -> Path:
    import shutil

    shutil.copytree(src, dst)
    man = json.loads((dst / "manifest.json").read_text())
    man.update(changes)
    (dst / "manifest.json").write_text(json.dumps(man))
    return dst


def _copy_model(src: Path, dst: Path, edit=None) -> Path:
    import shutil

    shutil.copytree(src, dst)
    if edit is not None:
        path = dst / "ckpt-000000" / "config.json"
        cfg = json.loads(path.read_text())
        edit(cfg)
        path.write_text(json.dumps(cfg))
    return dst


@pytest.fixture(scope="module")
def unwritable(work) -> Path:
    """A folder in which nothing can be created: a read-only folder, or (as root, whom permissions do not stop) a
    path under /proc, where the kernel refuses new files."""
    if os.geteuid() == 0:
        return Path("/proc/wmplan-bad-input-test")
    ro = work / "read-only"
    ro.mkdir()
    ro.chmod(0o555)
    return ro / "out"


def _scenario_file(folder: Path, name: str, edit) -> Path:
    data = scenario_to_dict(load_scenario("open-road"))
    edit(data)
    path = folder / name
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def _set(*path_and_value):
    *path, value = path_and_value

    def edit(d):
        for key in path[:-1]:
            d = d[key]
        d[path[-1]] = value

    return edit


# --- outputs: every verb that writes checks its --out / --json before it starts --------------------------------------


OUTPUT_CASES = {
    "simulate --out an existing file": (
        ["simulate", "open-road", "--episodes", "1", "--out", "{file}"],
        "exists and is not a folder",
    ),
    "simulate --out in an unwritable folder": (
        ["simulate", "open-road", "--episodes", "1", "--out", "{unwritable}"],
        "cannot write in",
    ),
    "simulate --json a folder": (
        ["simulate", "open-road", "--episodes", "1", "--out", "{new}", "--json", "{folder}"],
        "is a folder; name a file",
    ),
    "simulate --out a path too long": (["simulate", "open-road", "--episodes", "1", "--out", "{long}"], "too long"),
    "scenarios check --json a folder": (["scenarios", "check", "open-road", "--json", "{folder}"], "is a folder"),
    "train --out an existing file": (["train", "{data}", "--out", "{file}"], "exists and is not a folder"),
    "train --json in an unwritable folder": (
        ["train", "{data}", "--out", "{new}", "--json", "{unwritable}"],
        "cannot write in",
    ),
    "evaluate --json a folder": (
        ["evaluate", "open-road", "--planners", "rules", "--episodes", "1", "--json", "{folder}"],
        "is a folder",
    ),
    "sweep --out an existing file": (["sweep", "{sweep}", "--out", "{file}"], "exists and is not a folder"),
    "stress --out an existing file": (
        ["stress", "open-road", "--budget", "4", "--out", "{file}"],
        "exists and is not a folder",
    ),
    "render --out a folder": (["render", "open-road", "--out", "{folder}"], "is a folder"),
    "assess --json a folder": (["assess", "{model}", "--json", "{folder}"], "is a folder"),
    "bench --json a folder": (["bench", "--only", "sim", "--json", "{folder}"], "is a folder"),
    "demo --out an existing file": (["demo", "--quick", "--out", "{file}"], "exists and is not a folder"),
}


@pytest.mark.parametrize("case", cases(OUTPUT_CASES))
def test_output_paths_are_checked_before_any_work(case, work, dataset_dir, model_dir, unwritable, tmp_path):
    """An output that cannot be written is refused up front, naming the flag; nothing is created."""
    args, needle = OUTPUT_CASES[case]
    (tmp_path / "file").write_text("precious\n")
    (tmp_path / "folder").mkdir()
    sweep = tmp_path / "s.yaml"
    sweep.write_text("name: t\nbase: open-road\nplanners: [rules]\nseed: 1\nepisodes_per_cell: 1\n")
    names = {
        "file": tmp_path / "file",
        "folder": tmp_path / "folder",
        "new": tmp_path / "new",
        "data": dataset_dir,
        "model": model_dir,
        "sweep": sweep,
        "unwritable": unwritable,
        "long": tmp_path / ("x" * 300),
    }
    before = sorted(p.name for p in tmp_path.iterdir())
    line = assert_one_line_refusal(run_cli(*[a.format(**names) for a in args], cwd=tmp_path), needle)
    assert line.startswith("wmplan: error: --")
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert (tmp_path / "file").read_text() == "precious\n"


# --- YAML that would take the loader's time or memory -----------------------------------------------------------


def _alias_bomb(levels: int, width: int) -> str:
    lines = ["l0: &l0 [" + ", ".join(["x"] * width) + "]"]
    for i in range(1, levels):
        lines.append(f"l{i}: &l{i} [" + ", ".join([f"*l{i - 1}"] * width) + "]")
    return "\n".join(lines) + "\n"


YAML_CASES = {
    "scenario of nested aliases": ("scenarios", "name: bomb\n" + _alias_bomb(10, 9), "aliases are not accepted"),
    "sweep of nested aliases": (
        "sweep",
        "name: bomb\nbase: open-road\n" + _alias_bomb(9, 9),
        "aliases are not accepted",
    ),
    "scenario nested 5000 lists deep": (
        "scenarios",
        "name: deep\nroad: " + "[" * 5000 + "]" * 5000 + "\n",
        "nested more than",
    ),
    "sweep nested 3000 mappings deep": (
        "sweep",
        "name: deep\nvary: " + "{a: " * 3000 + "1" + "}" * 3000 + "\n",
        "nested more than",
    ),
    "integer of 5000 digits": ("scenarios", "name: big\ndt_s: " + "9" * 5000 + "\n", "an integer of 5000 characters"),
    "duplicate scenario key": ("scenarios", "name: a\ndt_s: 0.1\nname: b\n", "duplicate key 'name'"),
    "duplicate sweep key": ("sweep", "name: a\nbase: open-road\nseed: 1\nseed: 2\n", "duplicate key 'seed'"),
}


@pytest.mark.parametrize("case", list(YAML_CASES))
def test_hostile_yaml_is_refused_in_one_line(case, tmp_path):
    """Aliases, deep nesting, huge integers and repeated keys: refused with the file and line, quickly."""
    kind, text, needle = YAML_CASES[case]
    path = tmp_path / "input.yaml"
    path.write_text(text)
    args = ["scenarios", "check", path] if kind == "scenarios" else ["sweep", path, "--out", tmp_path / "out"]
    line = assert_one_line_refusal(run_cli(*args, cwd=tmp_path), needle, str(path))
    assert len(line) < 400
    assert not (tmp_path / "out").exists()


def test_a_huge_value_is_quoted_as_a_short_excerpt(tmp_path):
    """A 200 KB string where a number belongs: the message quotes at most a short excerpt of it."""
    path = _scenario_file(tmp_path, "long.yaml", _set("road", "length_m", "x" * 200_000))
    line = assert_one_line_refusal(run_cli("scenarios", "check", path, cwd=tmp_path), "road.length_m")
    assert len(line) < 400


# --- datasets and checkpoints of the wrong type ----------------------------------------------------------------------


MANIFEST_CASES = {
    "arrays a list": ({"arrays": [1, 2]}, "arrays"),
    "array_file a number": ({"array_file": 5}, "array_file"),
    "array_file outside the folder": ({"array_file": "../../etc/passwd"}, "array_file"),
    "decision_dt_s a string": ({"decision_dt_s": "abc"}, "decision_dt_s"),
    "num_episodes huge": ({"num_episodes": 10**12}, "num_episodes"),
}


@pytest.mark.parametrize("case", cases(MANIFEST_CASES))
def test_manifest_of_the_wrong_type(case, dataset_dir, tmp_path):
    """``wmplan train`` on a dataset whose manifest has a field of the wrong type or range: one line naming it."""
    changes, field = MANIFEST_CASES[case]
    data = _copy_dataset(dataset_dir, tmp_path / "data", **changes)
    assert_one_line_refusal(run_cli("train", data, "--out", tmp_path / "m", cwd=tmp_path), "manifest.json", field)
    assert not (tmp_path / "m").exists()


def _model_field(key, value):
    def edit(cfg):
        cfg["model"][key] = value

    return edit


CHECKPOINT_CASES = {
    "sha256 a string": (lambda cfg: cfg.update(sha256="abc"), "sha256"),
    "history a string": (_model_field("history", "abc"), "model.history"),
    "history 10^9": (_model_field("history", 1_000_000_000), "model.history"),
    "hidden that the weights do not have": (_model_field("hidden", 64), "weights do not fit the stated model"),
    "ego field missing": (lambda cfg: cfg["ego"].pop("wheelbase_m"), "ego.wheelbase_m"),
}


@pytest.mark.parametrize("case", cases(CHECKPOINT_CASES))
def test_checkpoint_config_of_the_wrong_type(case, model_dir, tmp_path):
    """``wmplan assess`` on a checkpoint whose config.json is wrong: one line naming the file and field, before
    anything of the stated size is allocated (history 10^9 would be terabytes)."""
    edit, needle = CHECKPOINT_CASES[case]
    model = _copy_model(model_dir, tmp_path / "m", edit)
    assert_one_line_refusal(run_cli("assess", model, "--episodes", "1", cwd=tmp_path), needle)


def test_checkpoint_with_nan_weights(model_dir, tmp_path):
    """Weights holding NaN are refused on load, naming the tensor (with the sha256 updated to match, so that only
    the finiteness check can catch it)."""
    import hashlib

    from safetensors.torch import load_file, save_file

    model = _copy_model(model_dir, tmp_path / "m")
    path = model / "ckpt-000000" / "model.safetensors"
    state = load_file(str(path))
    name = sorted(k for k, v in state.items() if v.is_floating_point() and v.numel() > 1)[0]
    state[name] = state[name].clone()
    state[name].view(-1)[0] = math.nan
    save_file(state, str(path))
    cfg_path = path.parent / "config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["sha256"]["model.safetensors"] = hashlib.sha256(path.read_bytes()).hexdigest()
    cfg_path.write_text(json.dumps(cfg))
    assert_one_line_refusal(run_cli("assess", model, "--episodes", "1", cwd=tmp_path), name, "NaN or inf")


# --- scenario values that used to pass the check and break later ----------------------------------------------------


VALUE_CASES = {
    "dt_s 1e-6": (_set("dt_s", 1e-6), "dt_s"),
    "zero vehicle length": (_set("traffic", "length_m", 0.0), "traffic.length_m"),
    "negative vehicle width": (_set("traffic", "width_m", -1.8), "traffic.width_m"),
    "negative minimum gap": (_set("drivers", "min_gap_m", -2.0), "drivers.min_gap_m"),
    "zero safe deceleration": (_set("drivers", "safe_decel_mps2", 0.0), "drivers.safe_decel_mps2"),
    "negative hard-braking deceleration": (
        _set("drivers", "hard_brake_decel_mps2", -5.0),
        "drivers.hard_brake_decel_mps2",
    ),
    "zero hard-braking duration": (_set("drivers", "hard_brake_duration_s", 0.0), "drivers.hard_brake_duration_s"),
    "negative episode duration": (_set("duration_s", -20.0), "duration_s"),
    "extreme acceleration": (_set("drivers", "max_accel_mps2", 1e30), "drivers.max_accel_mps2"),
    "extreme acceleration spread": (
        _set("drivers", "max_accel_mps2", {"mean": 1.0, "std": 1e6}),
        "drivers.max_accel_mps2",
    ),
}


@pytest.mark.parametrize("case", list(VALUE_CASES))
def test_unphysical_scenario_values_are_refused_before_simulating(case, tmp_path):
    """``wmplan simulate`` on a scenario with an unphysical value: one line naming the field; no dataset."""
    edit, field = VALUE_CASES[case]
    path = _scenario_file(tmp_path, "bad.yaml", edit)
    assert_one_line_refusal(
        run_cli("simulate", path, "--episodes", "2", "--out", tmp_path / "out", cwd=tmp_path), str(path), field
    )
    assert not (tmp_path / "out").exists()


def test_memory_estimate_names_the_flag(tmp_path):
    """The smallest time step over the longest episode: 60,000 steps x 16 vehicles x 200 episodes would need
    several GiB of arrays; refused before simulating, naming --episodes and how many would fit."""
    path = _scenario_file(tmp_path, "long.yaml", lambda d: d.update(dt_s=0.01, duration_s=600.0))
    line = assert_one_line_refusal(run_cli("simulate", path, "--out", tmp_path / "out", cwd=tmp_path), "--episodes")
    assert "give at most" in line
    assert not (tmp_path / "out").exists()


# --- flags ---------------------------------------------------------------------------------------------------------


FLAG_CASES = {
    "assess seed 2^70": (["assess", "{model}", "--seed", str(2**70)], "--seed"),
    "simulate seed 2^70": (["simulate", "open-road", "--seed", str(2**70), "--out", "{new}"], "--seed"),
    "evaluate seed 2^70": (["evaluate", "open-road", "--seed", str(2**70)], "--seed"),
    "simulate negative seed": (["simulate", "open-road", "--seed", "-1", "--out", "{new}"], "--seed"),
    "simulate 10^9 episodes": (["simulate", "open-road", "--episodes", "1000000000", "--out", "{new}"], "--episodes"),
    "decision every 1000 steps": (
        ["simulate", "open-road", "--decision-every", "1000", "--out", "{new}"],
        "--decision-every",
    ),
    "empty planner list": (["evaluate", "open-road", "--planners", ","], "--planners"),
    "empty planner name": (["evaluate", "open-road", "--planners", "rules,,mpc+oracle"], "--planners"),
    "empty knob list": (["stress", "open-road", "--knobs", ",", "--out", "{new}"], "--knobs"),
    "10^6 workers": (["sweep", "x.yaml", "--workers", "1000000", "--out", "{new}"], "--workers"),
    "stress budget 10^12": (["stress", "open-road", "--budget", "1000000000000", "--out", "{new}"], "--budget"),
    "minutes nan": (["train", "{data}", "--out", "{new}", "--minutes", "nan"], "--minutes"),
}


@pytest.mark.parametrize("case", cases(FLAG_CASES))
def test_flags_out_of_range(case, dataset_dir, model_dir, tmp_path):
    """A flag outside what the program can take: one line naming the flag and its range."""
    args, flag = FLAG_CASES[case]
    names = {"model": model_dir, "data": dataset_dir, "new": tmp_path / "new"}
    assert_one_line_refusal(run_cli(*[a.format(**names) for a in args], cwd=tmp_path), flag)
    assert not (tmp_path / "new").exists()


# --- in-process checks of the same rules ------------------------------------------------------------------------------


def test_non_finite_simulation_leaves_nothing_behind(monkeypatch, tmp_path):
    """If a simulation produces NaN (here injected into one episode's rows), simulate_dataset refuses in one line
    and writes nothing, so no dataset of NaN blocks the next run."""
    import wmplan.data as data
    from wmplan.errors import DatasetError

    real = data.collect

    def poisoned(*args, **kwargs):
        traj = real(*args, **kwargs)
        traj.vehicles[0, 3, 0, 0] = np.nan
        return traj

    monkeypatch.setattr(data, "collect", poisoned)
    with pytest.raises(DatasetError, match="NaN or inf values in 1 of 2 episodes") as err:
        data.simulate_dataset(load_scenario("open-road"), tmp_path / "out", episodes=2, seed=1)
    assert "\n" not in str(err.value)
    assert not (tmp_path / "out").exists()


def test_diverging_training_stops_in_one_line_and_saves_nothing(tmp_path):
    """A learning rate of 1e30 sends the weights to inf within the first epoch: training stops with one line and
    leaves no checkpoint of NaN weights behind (the folder is never created)."""
    from wmplan.data import simulate_dataset
    from wmplan.errors import ConfigError
    from wmplan.model.config import ModelConfig, TrainConfig
    from wmplan.model.train import train

    data = tmp_path / "data"
    simulate_dataset(load_scenario("open-road"), data, episodes=4, seed=1)
    mcfg = ModelConfig(d_model=16, num_heads=2, hidden=16, num_layers=1, latent_dim=2)
    tcfg = TrainConfig(max_epochs=2, steps_per_epoch=3, batch_size=16, threads=1, lr=1e30, val_fraction=0.5, seed=0)
    with pytest.raises(ConfigError, match="training diverged in epoch 0") as err:
        train(data, tmp_path / "model", model_cfg=mcfg, train_cfg=tcfg)
    assert "\n" not in str(err.value)
    assert not (tmp_path / "model").exists()


def test_os_errors_are_one_line_and_bugs_keep_their_traceback(tmp_path, capsys, monkeypatch):
    """An operating-system error raised while a verb runs (here: a full disk while writing) is one line naming the
    path, exit 2; an exception that is neither a wmplan error nor an OSError is a bug and propagates."""
    from wmplan import cli

    target = tmp_path / "out.json"

    def disk_full(args):
        raise OSError(28, "No space left on device", str(target))

    monkeypatch.setattr(cli, "cmd_scenarios", disk_full)
    assert cli.main(["scenarios", "list"]) == 2
    assert capsys.readouterr().err == f"wmplan: error: {target}: No space left on device\n"

    def bug(args):
        raise ZeroDivisionError("a bug")

    monkeypatch.setattr(cli, "cmd_scenarios", bug)
    with pytest.raises(ZeroDivisionError):
        cli.main(["scenarios", "list"])


def test_seed_bound_is_what_the_generators_take():
    """The largest seed a flag accepts works in numpy's SeedSequence and in a torch generator, also after the
    small offsets stages add (seed + 11); one more is refused by the flag."""
    import argparse

    import torch

    from wmplan import cli

    assert cli._seed(str(cli.SEED_MAX)) == 2**32 - 1
    np.random.default_rng(np.random.SeedSequence(cli.SEED_MAX + 11)).random()
    torch.Generator().manual_seed(cli.SEED_MAX + 11)
    np.asarray([cli.SEED_MAX + 11], dtype=np.int64)
    with pytest.raises(argparse.ArgumentTypeError):
        cli._seed(str(cli.SEED_MAX + 1))
    with pytest.raises(argparse.ArgumentTypeError):
        cli._seed("9" * 5000)


def test_timing_of_the_loader_on_the_largest_accepted_file(tmp_path):
    """The largest YAML file accepted (256 KiB of a flat list) parses within the CPU bound; one byte more is
    refused before the file is read whole."""
    from wmplan.errors import ScenarioError
    from wmplan.yamlio import MAX_BYTES, read_yaml_file

    body = "a: [" + ", ".join(["1.5"] * ((MAX_BYTES - 10) // 5)) + "]\n"
    path = tmp_path / "big.yaml"
    path.write_text(body + " " * (MAX_BYTES - len(body)))
    t0 = time.process_time()
    assert len(read_yaml_file(path, ScenarioError)["a"]) == (MAX_BYTES - 10) // 5
    assert time.process_time() - t0 < CPU_LIMIT_S
    path.write_text(body + " " * (MAX_BYTES + 1 - len(body)))
    with pytest.raises(ScenarioError, match="larger than 262144 bytes"):
        read_yaml_file(path, ScenarioError)
