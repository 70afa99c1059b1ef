"""Trajectory datasets on disk: ``DIR/trajectories.npz`` plus ``DIR/manifest.json``.

The manifest says what the arrays are and where they came from: a format tag and schema version, the full
scenario (and its content hash), the dataset seed and every episode's scene seed, counts, feature names and units,
the shape and dtype of every array, and the sha256 of the array file. Both files are written atomically (a
temporary file, then a rename), the arrays first, so a reader never sees a manifest without its arrays.
:func:`load_dataset` checks all of it and names the problem in one line; it never unpickles anything.
"""

from __future__ import annotations

import hashlib
import json
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from wmplan.data.collect import POLICIES, Trajectories
from wmplan.errors import DatasetError, ScenarioError
from wmplan.io import atomic_write_bytes, atomic_write_json
from wmplan.scenario import Scenario, parse_scenario, scenario_hash, scenario_to_dict
from wmplan.sim.features import ACTION_NAMES, ACTION_UNITS, VEHICLE_FEATURES, VEHICLE_UNITS

FORMAT = "wmplan-trajectories"
SCHEMA_VERSION = 1
ARRAY_FILE = "trajectories.npz"
MANIFEST_FILE = "manifest.json"


@dataclass(frozen=True, eq=False)
class Dataset:
    """A loaded dataset: the arrays, the scenario that made them and the manifest."""

    path: Path
    scenario: Scenario
    manifest: dict
    traj: Trajectories

    @property
    def decision_dt_s(self) -> float:
        return float(self.manifest["decision_dt_s"])


def _npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    import io

    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def write_dataset(out_dir: Path, scenario: Scenario, traj: Trajectories, *, seed: int, policy_mix: float,
                  decision_every: int) -> Path:
    """Write arrays and manifest to ``out_dir`` (created if needed), atomically; returns the manifest path."""
    out_dir = Path(out_dir)
    arrays = traj.as_dict()
    blob = _npz_bytes(arrays)
    manifest = {
        "format": FORMAT,
        "schema_version": SCHEMA_VERSION,
        "scenario_name": scenario.name,
        "scenario_hash": scenario_hash(scenario),
        "scenario": scenario_to_dict(scenario),
        "seed": int(seed),
        "episode_seeds": [int(s) for s in traj.seeds],
        "num_episodes": traj.num_episodes,
        "num_decisions": int(traj.actions.shape[1]),
        "num_vehicles": int(traj.vehicles.shape[2]),
        "decision_every": int(decision_every),
        "decision_dt_s": float(decision_every * scenario.dt_s),
        "policy_mix": float(policy_mix),
        "policies": list(POLICIES),
        "vehicle_features": list(VEHICLE_FEATURES),
        "vehicle_units": list(VEHICLE_UNITS),
        "action_names": list(ACTION_NAMES),
        "action_units": list(ACTION_UNITS),
        "arrays": {k: {"shape": list(v.shape), "dtype": str(v.dtype)} for k, v in arrays.items()},
        "array_file": ARRAY_FILE,
        "array_sha256": hashlib.sha256(blob).hexdigest(),
        "outcomes": {
            "collided": int(traj.collided.sum()),
            "offroad": int(traj.offroad.sum()),
            "reached_goal": int(traj.reached_goal.sum()),
        },
    }
    atomic_write_bytes(out_dir / ARRAY_FILE, blob)
    atomic_write_json(out_dir / MANIFEST_FILE, manifest)
    return out_dir / MANIFEST_FILE


def load_dataset(path: Path | str, *, expect_scenario: Scenario | None = None, verify_hash: bool = True) -> Dataset:
    """Load and check a dataset folder (or its manifest file); one-line :class:`DatasetError` on any problem."""
    path = Path(path)
    folder = path.parent if path.name == MANIFEST_FILE else path
    man_path = folder / MANIFEST_FILE
    if not folder.is_dir():
        raise DatasetError(f"{folder}: no such dataset folder")
    if not man_path.is_file():
        raise DatasetError(f"{man_path}: missing manifest; is {folder} a folder made by `wmplan simulate`?")
    try:
        manifest = json.loads(man_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as err:
        raise DatasetError(f"{man_path}: not valid JSON ({err.__class__.__name__}: {err}); the file is corrupt") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        got = manifest.get("format") if isinstance(manifest, dict) else type(manifest).__name__
        raise DatasetError(f"{man_path}: format: expected {FORMAT!r}, got {got!r}; not a wmplan dataset")
    if manifest.get("schema_version") != SCHEMA_VERSION:
        raise DatasetError(
            f"{man_path}: schema_version: this wmplan reads version {SCHEMA_VERSION}, the file has "
            f"{manifest.get('schema_version')!r}; re-create it with `wmplan simulate`"
        )
    for key in ("scenario", "scenario_hash", "arrays", "array_sha256", "decision_dt_s", "num_episodes"):
        if key not in manifest:
            raise DatasetError(f"{man_path}: {key}: missing from the manifest")
    try:
        scenario = parse_scenario(manifest["scenario"], f"{man_path} (scenario)")
    except ScenarioError as err:
        raise DatasetError(str(err)) from None
    if scenario_hash(scenario) != manifest["scenario_hash"]:
        raise DatasetError(f"{man_path}: scenario_hash: does not match the scenario stored beside it; the manifest was edited")
    if expect_scenario is not None and scenario_hash(expect_scenario) != manifest["scenario_hash"]:
        raise DatasetError(
            f"{man_path}: scenario: the data were made with scenario {manifest.get('scenario_name')!r} "
            f"(hash {manifest['scenario_hash'][:12]}), not the expected {expect_scenario.name!r} "
            f"(hash {scenario_hash(expect_scenario)[:12]})"
        )
    arr_path = folder / manifest.get("array_file", ARRAY_FILE)
    if not arr_path.is_file():
        raise DatasetError(f"{arr_path}: missing array file named by the manifest")
    blob = arr_path.read_bytes()
    if verify_hash and hashlib.sha256(blob).hexdigest() != manifest["array_sha256"]:
        raise DatasetError(f"{arr_path}: sha256 differs from the manifest's; the file is truncated or was changed")
    try:
        import io

        with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as err:
        raise DatasetError(f"{arr_path}: cannot read the arrays ({err.__class__.__name__}); the file is truncated or corrupt") from None
    for name in Trajectories.ARRAYS:
        spec = manifest["arrays"].get(name)
        if name not in arrays or spec is None:
            raise DatasetError(f"{arr_path}: {name}: array missing")
        if list(arrays[name].shape) != list(spec["shape"]) or str(arrays[name].dtype) != spec["dtype"]:
            raise DatasetError(
                f"{arr_path}: {name}: shape {list(arrays[name].shape)} dtype {arrays[name].dtype}, manifest says "
                f"{spec['shape']} {spec['dtype']}"
            )
    traj = Trajectories(**{k: arrays[k] for k in Trajectories.ARRAYS})
    e_n, t1, v_n, f_n = traj.vehicles.shape
    if f_n != len(VEHICLE_FEATURES) or manifest.get("vehicle_features") != list(VEHICLE_FEATURES):
        raise DatasetError(f"{man_path}: vehicle_features: expected {list(VEHICLE_FEATURES)}, got {manifest.get('vehicle_features')}")
    if traj.actions.shape != (e_n, t1 - 1, 2) or traj.alive.shape != (e_n, t1) or traj.vehicle_id.shape != (e_n, t1, v_n):
        raise DatasetError(f"{arr_path}: arrays disagree in shape with vehicles {list(traj.vehicles.shape)}")
    if not np.isfinite(traj.vehicles).all() or not np.isfinite(traj.actions).all():
        raise DatasetError(f"{arr_path}: vehicles/actions: hold NaN or inf values")
    return Dataset(path=folder, scenario=scenario, manifest=manifest, traj=traj)
