"""Trajectory datasets on disk: ``DIR/trajectories.npz`` plus ``DIR/manifest.json``.

The manifest says what the arrays are and where they came from: a format tag and schema version, every scenario
of the dataset (in full, with its content hash, episode count, episode length, vehicle slots and outcomes), the
dataset seed and every episode's scene seed, counts, feature names and units, the shape and dtype of every array,
and the sha256 of the array file. Both files are written atomically (a temporary file, then a rename), the arrays
first, so a reader never sees a manifest without its arrays. :func:`load_dataset` checks all of it and names the
problem in one line; it never unpickles anything.

A dataset may hold several scenarios (schema version 2). Their episodes are stored one scenario after the other,
in the order of the manifest's ``scenarios`` list, in arrays padded to the longest episode and the most vehicle
slots among them: padded vehicle slots are invalid rows (zeros, identity -1), padded decisions have zero actions
and rows and an ego that is no longer alive, so no training window reaches into them. Datasets of schema version 1
(one scenario, fields ``scenario_name``, ``scenario_hash``, ``scenario`` at the top) still load.
"""

from __future__ import annotations

import hashlib
import json
import math
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Annotated, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from wmplan.data.collect import POLICIES, Trajectories
from wmplan.errors import ConfigError, DatasetError, ScenarioError, format_validation_error
from wmplan.io import atomic_write_bytes, atomic_write_json
from wmplan.scenario import Scenario, parse_scenario, scenario_hash, scenario_to_dict
from wmplan.sim.features import ACTION_NAMES, ACTION_UNITS, VEHICLE_FEATURES, VEHICLE_UNITS

FORMAT = "wmplan-trajectories"
SCHEMA_VERSION = 2
READABLE_VERSIONS = (1, 2)
MAX_SCENARIOS = 64
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


class ScenarioEntry(_Frozen):
    """One scenario of a dataset: the scenario in full, its hash and the shape of its share of the episodes."""

    name: str = Field(min_length=1, max_length=64)
    hash: Sha256
    scenario: dict
    num_episodes: int = Field(ge=1, le=2**31)
    num_decisions: int = Field(ge=1, le=2**31)
    """Recorded decisions of this scenario's episodes (the arrays may be longer: padding)."""
    num_vehicles: int = Field(ge=1, le=256)
    """Vehicle slots of this scenario (the arrays may have more: padding)."""
    outcomes: Outcomes


class _ManifestBase(_Frozen):
    """The fields both schema versions share."""

    format: Literal["wmplan-trajectories"]
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
    def _shapes_agree(self) -> _ManifestBase:
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


class ManifestV1(_ManifestBase):
    """``manifest.json`` of schema version 1: one scenario, named at the top (read, no longer written)."""

    schema_version: Literal[1]
    scenario_name: str = Field(min_length=1, max_length=64)
    scenario_hash: Sha256
    scenario: dict


class Manifest(_ManifestBase):
    """``manifest.json`` of a dataset folder: types, ranges and the arrays' shapes against the counts.

    Parsed before anything is read or allocated from it; each scenario in it is checked by the scenario schema.
    """

    schema_version: Literal[2]
    scenarios: list[ScenarioEntry] = Field(min_length=1, max_length=MAX_SCENARIOS)

    @model_validator(mode="after")
    def _scenarios_agree(self) -> Manifest:
        if sum(e.num_episodes for e in self.scenarios) != self.num_episodes:
            raise ValueError(
                f"scenarios: their num_episodes add up to {sum(e.num_episodes for e in self.scenarios)}, "
                f"not num_episodes = {self.num_episodes}"
            )
        hashes = [e.hash for e in self.scenarios]
        if len(set(hashes)) != len(hashes):
            raise ValueError("scenarios: lists the same scenario (hash) twice")
        for i, e in enumerate(self.scenarios):
            if e.num_decisions > self.num_decisions or e.num_vehicles > self.num_vehicles:
                raise ValueError(
                    f"scenarios.{i}: {e.num_decisions} decisions x {e.num_vehicles} vehicles do not fit the arrays' "
                    f"{self.num_decisions} x {self.num_vehicles}"
                )
        return self


@dataclass(frozen=True, eq=False)
class Dataset:
    """A loaded dataset: the arrays, the scenarios that made them and the manifest.

    Attributes:
        path: the dataset folder.
        scenarios: the scenarios, in the order their episodes are stored.
        manifest: ``manifest.json`` as read (schema version 1 or 2).
        traj: the arrays, padded to the longest episode and the most vehicle slots among the scenarios.
        episode_scenario: (E,) int64 index into ``scenarios`` of each episode; None means all episodes are of the
            first scenario.
    """

    path: Path
    scenarios: tuple[Scenario, ...]
    manifest: dict
    traj: Trajectories
    episode_scenario: np.ndarray | None = None

    def __post_init__(self) -> None:
        if isinstance(self.scenarios, Scenario):
            object.__setattr__(self, "scenarios", (self.scenarios,))
        if self.episode_scenario is None:
            object.__setattr__(self, "episode_scenario", np.zeros(self.traj.num_episodes, dtype=np.int64))

    @property
    def scenario(self) -> Scenario:
        """The scenario of a dataset of one scenario.

        Raises:
            DatasetError: the dataset holds several scenarios (use ``scenarios`` and ``episode_scenario``).
        """
        if len(self.scenarios) != 1:
            raise DatasetError(
                f"{self.path}: holds {len(self.scenarios)} scenarios ({', '.join(s.name for s in self.scenarios)}), "
                "not one"
            )
        return self.scenarios[0]

    @property
    def decision_dt_s(self) -> float:
        """Seconds between recorded decisions."""
        return float(self.manifest["decision_dt_s"])

    def scenario_episodes(self, which: int) -> np.ndarray:
        """(n,) indices of the episodes of ``scenarios[which]``."""
        return np.nonzero(self.episode_scenario == which)[0]


def _npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    import io

    buf = io.BytesIO()
    np.savez_compressed(buf, **arrays)
    return buf.getvalue()


def pad_trajectories(traj: Trajectories, num_decisions: int, num_vehicles: int) -> Trajectories:
    """``traj`` padded to ``num_decisions`` decisions and ``num_vehicles`` slots (as stored; see the module
    docstring): invalid zero rows with identity -1, zero actions, the ego not alive after its last decision."""
    e, t1, v, f = traj.vehicles.shape
    if t1 - 1 > num_decisions or v > num_vehicles:
        raise ValueError(f"cannot pad {t1 - 1} decisions x {v} vehicles to {num_decisions} x {num_vehicles}")
    if (t1 - 1, v) == (num_decisions, num_vehicles):
        return traj
    vehicles = np.zeros((e, num_decisions + 1, num_vehicles, f), dtype=traj.vehicles.dtype)
    vehicles[:, :t1, :v] = traj.vehicles
    ids = np.full((e, num_decisions + 1, num_vehicles), -1, dtype=traj.vehicle_id.dtype)
    ids[:, :t1, :v] = traj.vehicle_id
    actions = np.zeros((e, num_decisions, traj.actions.shape[2]), dtype=traj.actions.dtype)
    actions[:, : t1 - 1] = traj.actions
    alive = np.zeros((e, num_decisions + 1), dtype=bool)
    alive[:, :t1] = traj.alive
    return replace(traj, vehicles=vehicles, vehicle_id=ids, actions=actions, alive=alive)


def _outcomes(traj: Trajectories) -> dict[str, int]:
    return {
        "collided": int(traj.collided.sum()),
        "offroad": int(traj.offroad.sum()),
        "reached_goal": int(traj.reached_goal.sum()),
    }


def write_dataset(
    out_dir: Path,
    scenarios: Scenario | Sequence[Scenario],
    parts: Trajectories | Sequence[Trajectories],
    *,
    seed: int,
    policy_mix: float,
    decision_every: int,
) -> Path:
    """Write arrays and manifest to ``out_dir`` (created if needed), atomically; returns the manifest path.

    ``parts[i]`` holds the episodes of ``scenarios[i]`` (one scenario and its trajectories may be passed bare). The
    scenarios must share their simulator step; the parts are padded to the longest episode and the most slots.

    Raises:
        ConfigError: no scenario, a scenario given twice, parts that do not match the scenarios, or scenarios
            with different simulator steps.
    """
    out_dir = Path(out_dir)
    scns = [scenarios] if isinstance(scenarios, Scenario) else list(scenarios)
    trs = [parts] if isinstance(parts, Trajectories) else list(parts)
    check_scenario_list(scns)
    if len(trs) != len(scns):
        raise ConfigError(f"write_dataset: {len(trs)} trajectory parts for {len(scns)} scenarios")
    t_max = max(int(t.actions.shape[1]) for t in trs)
    v_max = max(int(t.vehicles.shape[2]) for t in trs)
    traj = Trajectories.concat([pad_trajectories(t, t_max, v_max) for t in trs])
    arrays = traj.as_dict()
    blob = _npz_bytes(arrays)
    manifest = {
        "format": FORMAT,
        "schema_version": SCHEMA_VERSION,
        "scenarios": [
            {
                "name": scn.name,
                "hash": scenario_hash(scn),
                "scenario": scenario_to_dict(scn),
                "num_episodes": tr.num_episodes,
                "num_decisions": int(tr.actions.shape[1]),
                "num_vehicles": int(tr.vehicles.shape[2]),
                "outcomes": _outcomes(tr),
            }
            for scn, tr in zip(scns, trs, strict=True)
        ],
        "seed": int(seed),
        "episode_seeds": [int(s) for s in traj.seeds],
        "num_episodes": traj.num_episodes,
        "num_decisions": t_max,
        "num_vehicles": v_max,
        "decision_every": int(decision_every),
        "decision_dt_s": float(decision_every * scns[0].dt_s),
        "policy_mix": float(policy_mix),
        "policies": list(POLICIES),
        "vehicle_features": list(VEHICLE_FEATURES),
        "vehicle_units": list(VEHICLE_UNITS),
        "action_names": list(ACTION_NAMES),
        "action_units": list(ACTION_UNITS),
        "arrays": {k: {"shape": list(v.shape), "dtype": str(v.dtype)} for k, v in arrays.items()},
        "array_file": ARRAY_FILE,
        "array_sha256": hashlib.sha256(blob).hexdigest(),
        "outcomes": _outcomes(traj),
    }
    atomic_write_bytes(out_dir / ARRAY_FILE, blob)
    atomic_write_json(out_dir / MANIFEST_FILE, manifest)
    return out_dir / MANIFEST_FILE


def check_scenario_list(scenarios: Sequence[Scenario]) -> None:
    """Refuse a list of scenarios that cannot share a dataset: none, more than :data:`MAX_SCENARIOS`, the same
    scenario (content) twice, or different simulator steps.

    Raises:
        ConfigError: one line naming the scenarios.
    """
    if not scenarios:
        raise ConfigError("a dataset needs at least one scenario")
    if len(scenarios) > MAX_SCENARIOS:
        raise ConfigError(f"{len(scenarios)} scenarios: a dataset holds at most {MAX_SCENARIOS}")
    seen: dict[str, str] = {}
    for scn in scenarios:
        h = scenario_hash(scn)
        if h in seen:
            raise ConfigError(f"scenario {scn.name!r} is given twice (same content as {seen[h]!r}); give it once")
        seen[h] = scn.name
    first = scenarios[0]
    for scn in scenarios[1:]:
        if scn.dt_s != first.dt_s:
            raise ConfigError(
                f"scenarios {first.name!r} (dt_s {first.dt_s}) and {scn.name!r} (dt_s {scn.dt_s}) have different "
                "simulator steps; a dataset holds one decision step, so simulate them into separate datasets"
            )


def _read_arrays(arr_path: Path, blob: bytes, man: _ManifestBase) -> dict[str, np.ndarray]:
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
    version = manifest.get("schema_version")
    if type(version) is not int or version not in READABLE_VERSIONS:
        raise DatasetError(
            f"{man_path}: schema_version: this wmplan reads versions {', '.join(map(str, READABLE_VERSIONS))}, "
            f"the file has {manifest.get('schema_version')!r}; re-create it with `wmplan simulate`"
        )
    model = ManifestV1 if version == 1 else Manifest
    try:
        man = model.model_validate(manifest)
    except ValidationError as err:
        raise DatasetError(format_validation_error(str(man_path), err)) from None
    if isinstance(man, ManifestV1):
        entries = [(man.scenario_name, man.scenario_hash, man.scenario, man.num_episodes, "")]
    else:
        entries = [(e.name, e.hash, e.scenario, e.num_episodes, f"scenarios.{i}.") for i, e in enumerate(man.scenarios)]
    scenarios = []
    for name, digest, body, _, where in entries:
        try:
            scenario = parse_scenario(body, f"{man_path} ({where}scenario)")
        except ScenarioError as err:
            raise DatasetError(str(err)) from None
        if scenario_hash(scenario) != digest:
            field = f"{where}hash" if where else "scenario_hash"
            raise DatasetError(
                f"{man_path}: {field}: does not match the scenario {name!r} stored beside it; the manifest was edited"
            )
        scenarios.append(scenario)
    hashes = [scenario_hash(scn) for scn in scenarios]
    if expect_scenario is not None and scenario_hash(expect_scenario) not in hashes:
        made = ", ".join(f"{scn.name!r} (hash {h[:12]})" for scn, h in zip(scenarios, hashes, strict=True))
        raise DatasetError(
            f"{man_path}: scenario: the data were made with scenario(s) {made}, not the expected "
            f"{expect_scenario.name!r} (hash {scenario_hash(expect_scenario)[:12]})"
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
    counts = [n for _, _, _, n, _ in entries]
    which = np.repeat(np.arange(len(counts), dtype=np.int64), counts)
    return Dataset(path=folder, scenarios=tuple(scenarios), manifest=manifest, traj=traj, episode_scenario=which)
