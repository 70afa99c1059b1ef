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
import math
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from wmplan.data.collect import POLICIES, Trajectories
from wmplan.errors import DatasetError, ScenarioError, format_validation_error
from wmplan.io import atomic_write_bytes, atomic_write_json
from wmplan.scenario import Scenario, parse_scenario, scenario_hash, scenario_to_dict
from wmplan.sim.features import ACTION_NAMES, ACTION_UNITS, VEHICLE_FEATURES, VEHICLE_UNITS

FORMAT = "wmplan-trajectories"
SCHEMA_VERSION = 1
ARRAY_FILE = "trajectories.npz"
MANIFEST_FILE = "manifest.json"
MAX_DATASET_BYTES = 2 * 2**30
"""Largest dataset (the arrays, uncompressed) written or read: writing holds about three times as much (the
batches, their concatenation and the compressed file), reading about twice."""
MAX_MANIFEST_BYTES = 256 * 2**20
DTYPES = ("float32", "int32", "int64", "int8", "bool")

Sha256 = Annotated[str, Field(pattern=r"^[0-9a-f]{64}$")]
Count = Annotated[int, Field(ge=0, le=2**40)]


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", strict=True, allow_inf_nan=False)


class ArraySpec(_Frozen):
    """Shape and dtype of one stored array."""

    shape: list[Count] = Field(min_length=1, max_length=4)
    dtype: Literal[DTYPES]  # type: ignore[valid-type]


class Outcomes(_Frozen):
    """How the episodes of a dataset ended: counts of collisions, leaving the road and reaching the goal."""

    collided: Count
    offroad: Count
    reached_goal: Count


class Manifest(_Frozen):
    """``manifest.json`` of a dataset folder: types, ranges and the arrays' shapes against the counts.

    Parsed before anything is read or allocated from it; the scenario in it is checked by the scenario schema.
    """

    format: Literal["wmplan-trajectories"]
    schema_version: Literal[1]
    scenario_name: str = Field(min_length=1, max_length=64)
    scenario_hash: Sha256
    scenario: dict
    seed: int = Field(ge=0, le=2**63 - 1)
    episode_seeds: list[Annotated[int, Field(ge=0, le=2**63 - 1)]]
    num_episodes: int = Field(ge=1, le=2**31)
    num_decisions: int = Field(ge=1, le=2**31)
    num_vehicles: int = Field(ge=1, le=256)
    decision_every: int = Field(ge=1, le=100_000)
    decision_dt_s: float = Field(gt=0.0, le=3600.0)
    policy_mix: float = Field(ge=0.0, le=1.0)
    policies: list[str]
    vehicle_features: list[str]
    vehicle_units: list[str]
    action_names: list[str]
    action_units: list[str]
    arrays: dict[str, ArraySpec]
    array_file: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$")
    """A file name in the dataset folder (no folders: the manifest cannot point outside it)."""
    array_sha256: Sha256
    outcomes: Outcomes

    @model_validator(mode="after")
    def _shapes_agree(self) -> Manifest:
        e, t, v = self.num_episodes, self.num_decisions, self.num_vehicles
        want = {
            "vehicles": (e, t + 1, v, len(VEHICLE_FEATURES)),
            "vehicle_id": (e, t + 1, v),
            "actions": (e, t, 2),
            "alive": (e, t + 1),
            "collided": (e,),
            "offroad": (e,),
            "reached_goal": (e,),
            "policy": (e,),
            "seeds": (e,),
        }
        for name, shape in want.items():
            spec = self.arrays.get(name)
            if spec is None:
                raise ValueError(f"arrays.{name} is missing")
            if tuple(spec.shape) != shape:
                raise ValueError(
                    f"arrays.{name}.shape must be {list(shape)} (from num_episodes, num_decisions, "
                    f"num_vehicles), got {list(spec.shape)}"
                )
        if len(self.episode_seeds) != e:
            raise ValueError(f"episode_seeds has {len(self.episode_seeds)} values for num_episodes = {e}")
        size = self.nbytes()
        if size > MAX_DATASET_BYTES:
            raise ValueError(f"arrays must take at most {MAX_DATASET_BYTES} bytes, got {size}")
        return self

    def nbytes(self) -> int:
        """Bytes of the arrays the manifest describes, uncompressed."""
        return sum(math.prod(a.shape) * np.dtype(a.dtype).itemsize for a in self.arrays.values())


@dataclass(frozen=True, eq=False)
class Dataset:
    """A loaded dataset: the arrays, the scenario that made them and the manifest."""

    path: Path
    scenario: Scenario
    manifest: dict
    traj: Trajectories

    @property
    def decision_dt_s(self) -> float:
        """Seconds between recorded decisions."""
        return float(self.manifest["decision_dt_s"])


def _npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    import io

    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def write_dataset(
    out_dir: Path, scenario: Scenario, traj: Trajectories, *, seed: int, policy_mix: float, decision_every: int
) -> Path:
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


def _read_arrays(arr_path: Path, blob: bytes, man: Manifest) -> dict[str, np.ndarray]:
    """The arrays of an .npz file, each member's header (shape, dtype) compared with the manifest before its data
    are read, so nothing larger than the manifest states is ever allocated."""
    import io

    arrays: dict[str, np.ndarray] = {}
    try:
        with zipfile.ZipFile(io.BytesIO(blob)) as zf:
            for name in Trajectories.ARRAYS:
                spec = man.arrays[name]
                try:
                    info = zf.getinfo(f"{name}.npy")
                except KeyError:
                    raise DatasetError(f"{arr_path}: {name}: array missing") from None
                with zf.open(info) as fh:
                    version = np.lib.format.read_magic(fh)
                    if version == (1, 0):
                        shape, _, dtype = np.lib.format.read_array_header_1_0(fh, max_header_size=10_000)
                    elif version == (2, 0):
                        shape, _, dtype = np.lib.format.read_array_header_2_0(fh, max_header_size=10_000)
                    else:
                        raise DatasetError(f"{arr_path}: {name}: .npy format version {version} is not read here")
                    if tuple(shape) != tuple(spec.shape) or str(dtype) != spec.dtype or dtype.hasobject:
                        raise DatasetError(
                            f"{arr_path}: {name}: shape {list(shape)} dtype {dtype}, manifest says "
                            f"{list(spec.shape)} {spec.dtype}"
                        )
                with zf.open(info) as fh:
                    arrays[name] = np.lib.format.read_array(fh, allow_pickle=False)
    except DatasetError:
        raise
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as err:
        raise DatasetError(
            f"{arr_path}: cannot read the arrays ({err.__class__.__name__}); the file is truncated or corrupt"
        ) from None
    return arrays


def load_dataset(path: Path | str, *, expect_scenario: Scenario | None = None, verify_hash: bool = True) -> Dataset:
    """Load and check a dataset folder (or its manifest file); one-line :class:`DatasetError` on any problem."""
    path = Path(path)
    folder = path.parent if path.name == MANIFEST_FILE else path
    man_path = folder / MANIFEST_FILE
    if not folder.is_dir():
        raise DatasetError(f"{folder}: no such dataset folder")
    if not man_path.is_file():
        raise DatasetError(f"{man_path}: missing manifest; is {folder} a folder made by `wmplan simulate`?")
    if man_path.stat().st_size > MAX_MANIFEST_BYTES:
        raise DatasetError(f"{man_path}: larger than {MAX_MANIFEST_BYTES} bytes; not a manifest written by wmplan")
    try:
        manifest = json.loads(man_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError, ValueError) as err:
        raise DatasetError(f"{man_path}: not valid JSON ({err.__class__.__name__}); the file is corrupt") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        got = manifest.get("format") if isinstance(manifest, dict) else type(manifest).__name__
        raise DatasetError(f"{man_path}: format: expected {FORMAT!r}, got {got!r}; not a wmplan dataset")
    if manifest.get("schema_version") != SCHEMA_VERSION:
        raise DatasetError(
            f"{man_path}: schema_version: this wmplan reads version {SCHEMA_VERSION}, the file has "
            f"{manifest.get('schema_version')!r}; re-create it with `wmplan simulate`"
        )
    try:
        man = Manifest.model_validate(manifest)
    except ValidationError as err:
        raise DatasetError(format_validation_error(str(man_path), err)) from None
    try:
        scenario = parse_scenario(man.scenario, f"{man_path} (scenario)")
    except ScenarioError as err:
        raise DatasetError(str(err)) from None
    if scenario_hash(scenario) != man.scenario_hash:
        raise DatasetError(
            f"{man_path}: scenario_hash: does not match the scenario stored beside it; the manifest was edited"
        )
    if expect_scenario is not None and scenario_hash(expect_scenario) != man.scenario_hash:
        raise DatasetError(
            f"{man_path}: scenario: the data were made with scenario {man.scenario_name!r} "
            f"(hash {man.scenario_hash[:12]}), not the expected {expect_scenario.name!r} "
            f"(hash {scenario_hash(expect_scenario)[:12]})"
        )
    if man.vehicle_features != list(VEHICLE_FEATURES):
        raise DatasetError(
            f"{man_path}: vehicle_features: expected {list(VEHICLE_FEATURES)}, got {man.vehicle_features[:12]}"
        )
    arr_path = folder / man.array_file
    if not arr_path.is_file():
        raise DatasetError(f"{arr_path}: missing array file named by the manifest")
    limit = int(man.nbytes() * 1.01) + 2**20  # compression never grows data by more than zip's small overhead
    if arr_path.stat().st_size > limit:
        raise DatasetError(
            f"{arr_path}: {arr_path.stat().st_size} bytes, more than the arrays the manifest "
            f"describes can take ({limit}); the file does not belong to this manifest"
        )
    blob = arr_path.read_bytes()
    if verify_hash and hashlib.sha256(blob).hexdigest() != man.array_sha256:
        raise DatasetError(f"{arr_path}: sha256 differs from the manifest's; the file is truncated or was changed")
    arrays = _read_arrays(arr_path, blob, man)
    traj = Trajectories(**{k: arrays[k] for k in Trajectories.ARRAYS})
    if not np.isfinite(traj.vehicles).all() or not np.isfinite(traj.actions).all():
        raise DatasetError(f"{arr_path}: vehicles/actions: hold NaN or inf values")
    return Dataset(path=folder, scenario=scenario, manifest=manifest, traj=traj)
