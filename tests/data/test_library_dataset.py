"""Datasets of several scenarios: one folder, one manifest listing each scenario, episodes as single runs make them.

Contract (issue "Planners and one forward model for the whole scenario library", item 1; common practice, no
source: docs/references.md#practice-determinism): ``wmplan simulate S1 S2 ... --episodes N`` writes one dataset
whose manifest lists every scenario with its content hash and episode count; each scenario's episodes are the very
arrays a single-scenario rollout of the same scene seeds gives (padding aside), whatever the batch size; training
windows from the mixed dataset equal those cut from each scenario alone; datasets of the earlier one-scenario
schema still load; scenarios that cannot share a dataset or a model are refused in one line.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from wmplan.data import collect, episode_seeds, load_dataset, simulate_dataset
from wmplan.data.store import MANIFEST_FILE
from wmplan.data.windows import Windows, WindowSpec, anchor_index
from wmplan.errors import ConfigError, DatasetError
from wmplan.scenario import builtin_names, load_scenario, parse_scenario, scenario_hash, scenario_to_dict
from wmplan.sim.features import F_VALID
from wmplan.sim.params import SimParams

REPO = Path(__file__).resolve().parents[2]
FIVE = ("onramp-merge", "cut-in", "lane-drop", "stop-and-go", "open-road")
EPISODES = 8
SEED = 4


def run_cli(*args, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(REPO), "TQDM_DISABLE": "1"}
    return subprocess.run(
        [sys.executable, "-m", "wmplan.cli", *map(str, args)], cwd=cwd, env=env, capture_output=True, text=True
    )


@pytest.fixture(scope="module")
def five(tmp_path_factory) -> Path:
    """The issue's command: five built-ins, 8 episodes each, into one folder."""
    work = tmp_path_factory.mktemp("library")
    out = work / "D"
    run = run_cli("simulate", *FIVE, "--episodes", EPISODES, "--seed", SEED, "--out", out, cwd=work)
    assert run.returncode == 0, run.stderr[-2000:]
    return out


def test_the_manifest_lists_each_scenario_with_hash_and_count(five):
    """Five entries in the order given, each with the built-in's content hash, 8 episodes and its own episode
    length and vehicle slots; the totals add up and the arrays are padded to the largest."""
    man = json.loads((five / MANIFEST_FILE).read_text())
    entries = man["scenarios"]
    assert [e["name"] for e in entries] == list(FIVE)
    for e in entries:
        scn = load_scenario(e["name"])
        assert e["hash"] == scenario_hash(scn)
        assert e["num_episodes"] == EPISODES
        assert e["num_decisions"] == round(scn.duration_s / scn.dt_s) // 2
        assert e["num_vehicles"] == scn.traffic.max_vehicles
    assert man["num_episodes"] == EPISODES * len(FIVE)
    assert man["num_decisions"] == max(e["num_decisions"] for e in entries)
    assert man["num_vehicles"] == max(e["num_vehicles"] for e in entries)
    assert man["arrays"]["vehicles"]["shape"] == [EPISODES * len(FIVE), man["num_decisions"] + 1, 20, 8]
    for key in ("collided", "offroad", "reached_goal"):
        assert man["outcomes"][key] == sum(e["outcomes"][key] for e in entries)


def test_each_scenario_holds_what_a_single_rollout_of_its_seeds_gives(five):
    """Scenario i's episodes are ``collect`` on scene seeds i*8 .. i*8+7 of the dataset seed, bit for bit; the
    padded slots are invalid with identity -1, and the ego is not alive in padded decisions."""
    ds = load_dataset(five)
    seeds = episode_seeds(SEED, EPISODES * len(FIVE))
    for i, scn in enumerate(ds.scenarios):
        eps = ds.scenario_episodes(i)
        assert eps.tolist() == list(range(i * EPISODES, (i + 1) * EPISODES))
        ref = collect(SimParams.from_scenario(scn), seeds[eps])
        t1, v = ref.vehicles.shape[1:3]
        np.testing.assert_array_equal(ds.traj.vehicles[eps, :t1, :v], ref.vehicles)
        np.testing.assert_array_equal(ds.traj.vehicle_id[eps, :t1, :v], ref.vehicle_id)
        np.testing.assert_array_equal(ds.traj.actions[eps, : t1 - 1], ref.actions)
        np.testing.assert_array_equal(ds.traj.alive[eps, :t1], ref.alive)
        np.testing.assert_array_equal(ds.traj.seeds[eps], seeds[eps])
        assert (ds.traj.vehicles[eps, :, v:, F_VALID] == 0).all() and (ds.traj.vehicle_id[eps, :, v:] == -1).all()
        assert not ds.traj.alive[eps, t1:].any() and (ds.traj.actions[eps, t1 - 1 :] == 0).all()


def test_windows_of_the_mixed_dataset_equal_those_of_each_scenario_alone(five, tmp_path):
    """Every window (rows, road context from its own scenario, actions) cut from the mixed dataset equals the one
    cut from a dataset of that scenario alone made with the same seeds; no window reaches into padding."""
    ds = load_dataset(five)
    spec = WindowSpec()
    mixed = Windows(ds, spec)
    for name in ("cut-in", "stop-and-go"):
        which = FIVE.index(name)
        alone_dir = tmp_path / name
        # the same scene seeds as the mixed dataset gave this scenario: a dataset of every scenario up to it
        simulate_dataset([load_scenario(n) for n in FIVE[: which + 1]], alone_dir, episodes=EPISODES, seed=SEED)
        alone = load_dataset(alone_dir)
        local = alone.scenario_episodes(which)
        idx_alone = anchor_index(alone, spec, local)
        idx_mixed = anchor_index(ds, spec, ds.scenario_episodes(which))
        np.testing.assert_array_equal(idx_alone, idx_mixed)
        a, b = Windows(alone, spec).batch(idx_alone), mixed.batch(idx_mixed)
        for key in ("history", "future", "road", "actions", "ego_speed_mps", "ego_steer_rad"):
            np.testing.assert_array_equal(getattr(a, key), getattr(b, key), err_msg=f"{name} {key}")
        t_last = ds.manifest["scenarios"][which]["num_decisions"]
        assert (idx_mixed[:, 1] + spec.horizon <= t_last).all()


def test_the_dataset_does_not_depend_on_the_batch_size(tmp_path):
    """Batches of 3 scenes and of 256 give the same arrays (the same sha256)."""
    scns = [load_scenario(n) for n in ("short-gap-cut-in", "cut-in")]
    a = simulate_dataset(scns, tmp_path / "a", episodes=5, seed=2, batch_size=3)
    b = simulate_dataset(scns, tmp_path / "b", episodes=5, seed=2, batch_size=256)
    assert a.manifest["array_sha256"] == b.manifest["array_sha256"]


def test_one_scenario_gives_the_data_of_a_plain_rollout_and_all_gives_every_builtin(tmp_path):
    """A one-scenario dataset holds ``collect`` on ``episode_seeds(seed, n)`` (as before the library datasets);
    ``simulate all`` lists the eight built-ins, the three hidden-intent scenarios among them."""
    scn = load_scenario("short-gap-cut-in")
    ds = simulate_dataset(scn, tmp_path / "one", episodes=3, seed=9)
    ref = collect(SimParams.from_scenario(scn), episode_seeds(9, 3))
    np.testing.assert_array_equal(ds.traj.vehicles, ref.vehicles)
    assert ds.scenario.name == "short-gap-cut-in"
    run = run_cli("simulate", "all", "--episodes", 1, "--out", tmp_path / "all", cwd=tmp_path)
    assert run.returncode == 0, run.stderr[-2000:]
    names = [e["name"] for e in json.loads((tmp_path / "all" / MANIFEST_FILE).read_text())["scenarios"]]
    assert names == list(builtin_names()) and len(names) == 8
    assert {"short-gap-cut-in", "lane-drop-turns", "courtesy-stop"} <= set(names)


def test_a_dataset_of_schema_version_1_still_loads(tmp_path):
    """A manifest of the one-scenario schema (scenario fields at the top) loads with the same arrays; one edited
    field of it is refused in one line naming it."""
    scn = load_scenario("open-road")
    new = simulate_dataset(scn, tmp_path / "v1", episodes=2, seed=1)
    man = json.loads((tmp_path / "v1" / MANIFEST_FILE).read_text())
    entry = man.pop("scenarios")[0]
    man.update(schema_version=1, scenario_name=entry["name"], scenario_hash=entry["hash"], scenario=entry["scenario"])
    (tmp_path / "v1" / MANIFEST_FILE).write_text(json.dumps(man))
    old = load_dataset(tmp_path / "v1")
    assert old.scenario == scn and old.scenarios == (scn,)
    np.testing.assert_array_equal(old.traj.vehicles, new.traj.vehicles)
    man["scenario_hash"] = "0" * 64
    (tmp_path / "v1" / MANIFEST_FILE).write_text(json.dumps(man))
    with pytest.raises(DatasetError, match=r"manifest.json: scenario_hash: does not match"):
        load_dataset(tmp_path / "v1")


def test_scenarios_that_cannot_share_a_dataset_are_refused(tmp_path):
    """A scenario given twice, or two simulator steps, is a one-line ConfigError before any simulation; on the
    command line 'all' stands alone and a repeated name is named."""
    scn = load_scenario("open-road")
    with pytest.raises(ConfigError, match="given twice"):
        simulate_dataset([scn, scn], tmp_path / "x", episodes=1)
    body = scenario_to_dict(load_scenario("cut-in"))
    body["dt_s"] = 0.05
    other = parse_scenario(body, "test")
    with pytest.raises(ConfigError, match="different simulator steps"):
        simulate_dataset([scn, other], tmp_path / "x", episodes=1)
    assert not (tmp_path / "x").exists()
    for args, needle in (
        (["all", "cut-in"], "'all' stands alone"),
        (["cut-in", "lane-drop,cut-in"], "cut-in given twice"),
    ):
        run = run_cli("simulate", *args, "--out", tmp_path / "y", cwd=tmp_path)
        assert run.returncode == 2 and "Traceback" not in run.stderr, run.stderr[-2000:]
        assert len(run.stderr.splitlines()) == 1 and needle in run.stderr, run.stderr


def test_training_reads_every_scenario_and_refuses_two_egos(five, tmp_path):
    """A tiny model trains on the mixed dataset (its metadata lists the five scenarios with their episode counts);
    a dataset whose scenarios differ in the ego's braking limit is refused in one line naming the field."""
    from tests.model.model_helpers import tiny_model_config, tiny_train_config
    from wmplan.model.checkpoint import load_model
    from wmplan.model.train import train

    res = train(five, tmp_path / "m", model_cfg=tiny_model_config(), train_cfg=tiny_train_config(max_epochs=1))
    meta = load_model(tmp_path / "m")[1]
    listed = meta["dataset"]["scenarios"]
    assert [s["name"] for s in listed] == list(FIVE) and all(s["num_episodes"] == EPISODES for s in listed)
    assert np.isfinite(res.history[-1]["val/min_fde_k6_m"])
    body = scenario_to_dict(load_scenario("cut-in"))
    body.setdefault("limits", {})["max_brake_mps2"] = 6.0
    soft = parse_scenario(body, "test")
    simulate_dataset([load_scenario("open-road"), soft], tmp_path / "two", episodes=2, seed=1)
    with pytest.raises(ConfigError, match=r"differ in the ego's max_brake_mps2"):
        train(tmp_path / "two", tmp_path / "m2", model_cfg=tiny_model_config(), train_cfg=tiny_train_config())
