"""Sweep files: YAML in, a frozen :class:`SweepSpec` out, or a one-line error naming file, field, value and rule.

A sweep file names a base scenario, the scenario values to vary, the planners to compare and the seeds::

    name: merge-density-yield
    base: onramp-merge                 # a built-in scenario name, or a scenario file (relative to this file)
    vary:
      traffic.density_veh_per_km[1]: [12.0, 24.0, 36.0]          # a list: grid values, used as given
      drivers.yield_prob.mean: [0.2, 0.5, 0.8]
      drivers.hard_brake_rate_per_min: {low: 0.05, high: 1.0, dist: loguniform, samples: 3}   # random values
    planners: [rules]
    seed: 7
    episodes_per_cell: 32

Keys of ``vary`` are dotted paths into the scenario (see :mod:`wmplan.sweep.paths`). A list gives grid values; a
mapping ``{low, high, dist, samples}`` gives ``samples`` values drawn once from ``dist`` (``uniform`` or
``loguniform``) with a generator derived from the sweep seed and the path, so adding a parameter never changes the
values drawn for another. Every entry is one axis: the cells are the product of all axes and the planners.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from wmplan.errors import WmplanError, format_validation_error
from wmplan.sweep.paths import PathError, parse_path
from wmplan.yamlio import load_yaml, read_yaml_file

Finite = Annotated[float, Field(allow_inf_nan=False)]
SWEEP_FILE_VERSION = 1


class SweepError(WmplanError, ValueError):
    """A sweep file is malformed, names something that does not exist, or a sweep run could not finish."""


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=False, allow_inf_nan=False)


def canonical_json(obj: object) -> str:
    """JSON text with sorted keys and no spaces: the form that content hashes are taken of."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), allow_nan=False)


def content_hash(obj: object) -> str:
    """sha256 hex digest of :func:`canonical_json`."""
    return hashlib.sha256(canonical_json(obj).encode()).hexdigest()


def _non_finite(value: object) -> bool:
    if isinstance(value, float):
        return not math.isfinite(value)
    if isinstance(value, (list, tuple)):
        return any(_non_finite(v) for v in value)
    if isinstance(value, dict):
        return any(_non_finite(v) for v in value.values())
    return False


def _check_grid(values: tuple[Any, ...]) -> tuple[Any, ...]:
    if len(values) == 0:
        raise ValueError("a grid needs at least one value")
    seen: dict[str, int] = {}
    for i, value in enumerate(values):
        if _non_finite(value):
            raise ValueError(f"grid value [{i}] must be finite, got {value!r}")
        key = canonical_json(value)
        if key in seen:
            raise ValueError(f"grid value [{i}] repeats value [{seen[key]}] ({value!r}); list each value once")
        seen[key] = i
    return values


class RandomRange(_Strict):
    """Values drawn at random from [low, high]: ``uniform``, or ``loguniform`` (uniform in log, low > 0)."""

    low: Finite
    high: Finite
    dist: Literal["uniform", "loguniform"]
    samples: int = Field(ge=1, le=10_000)
    """How many values to draw (this entry's number of values on its axis)."""

    @model_validator(mode="after")
    def _check(self) -> RandomRange:
        if not self.low < self.high:
            raise ValueError(f"low ({self.low}) must be < high ({self.high})")
        if self.dist == "loguniform" and self.low <= 0:
            raise ValueError(f"loguniform needs low > 0, got low = {self.low}")
        return self

    def draw(self, seed: int, path: str) -> tuple[float, ...]:
        """The ``samples`` values of this entry, from a generator keyed by (sweep seed, path)."""
        words = int(hashlib.sha256(path.encode()).hexdigest()[:32], 16)
        u = np.random.default_rng(np.random.SeedSequence([seed, words])).random(self.samples)
        if self.dist == "uniform":
            vals = self.low + (self.high - self.low) * u
        else:
            vals = np.exp(np.log(self.low) + (np.log(self.high) - np.log(self.low)) * u)
        return tuple(float(v) for v in vals)


def _vary_kind(value: object) -> str | None:
    if isinstance(value, (list, tuple)):
        return "grid"
    if isinstance(value, (dict, RandomRange)):
        return "random"
    return None


GridValues = Annotated[tuple[Any, ...], AfterValidator(_check_grid)]
VaryEntry = Annotated[
    Annotated[GridValues, Tag("grid")] | Annotated[RandomRange, Tag("random")],
    Discriminator(
        _vary_kind,
        custom_error_type="vary_entry",
        custom_error_message="must be a list of values (a grid) or a mapping {low, high, dist, samples} "
        "(random values)",
    ),
]


class SweepSpec(_Strict):
    """The content of a sweep file."""

    version: int = Field(SWEEP_FILE_VERSION, ge=1, le=SWEEP_FILE_VERSION)
    name: str = Field(min_length=1, max_length=64, pattern=r"^[a-z0-9][a-z0-9-]*$")
    description: str = ""
    base: str = Field(min_length=1)
    """A built-in scenario name or a scenario file; a relative path is taken from the sweep file's folder."""
    vary: dict[str, VaryEntry] = {}
    """Dotted scenario path -> grid values (a list) or a random range (a mapping)."""
    planners: tuple[str, ...] = Field(min_length=1)
    planner_options: dict[str, dict[str, Finite | int | bool | str | None]] = {}
    """Keyword options passed to one planner's episode runner, by planner name."""
    seed: int = Field(ge=0, le=2**63 - 1)
    episodes_per_cell: int = Field(ge=1, le=100_000)

    @field_validator("vary")
    @classmethod
    def _check_paths(cls, value: dict[str, Any]) -> dict[str, Any]:
        for path in value:
            try:
                parse_path(path)
            except PathError as err:
                raise ValueError(f"key {path!r} {err}") from None
        return value

    @field_validator("planners")
    @classmethod
    def _check_planners(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        for i, name in enumerate(value):
            if not name.strip():
                raise ValueError(f"entry [{i}] must be a planner name, got {name!r}")
            if name in value[:i]:
                raise ValueError(f"entry [{i}] repeats {name!r}; list each planner once")
        return value

    @field_validator("planner_options")
    @classmethod
    def _check_options(cls, value: dict[str, Any], info: ValidationInfo) -> dict[str, Any]:
        planners = info.data.get("planners", ())
        for name in value:
            if name not in planners:
                raise ValueError(f"names planner {name!r}, which is not in planners {list(planners)}")
        return value

    def axes(self) -> list[tuple[str, tuple[Any, ...]]]:
        """(path, values) per ``vary`` entry, in file order; random entries drawn from the sweep seed."""
        out = []
        for path, entry in self.vary.items():
            values = entry.draw(self.seed, path) if isinstance(entry, RandomRange) else tuple(entry)
            out.append((path, values))
        return out


@dataclass(frozen=True)
class Sweep:
    """A validated sweep file and where it came from.

    Attributes:
        spec: the file's content.
        source: how errors name the file (its path, or ``<sweep>`` for data given in code).
        base_dir: folder against which a relative ``base`` scenario path is resolved.
    """

    spec: SweepSpec
    source: str = "<sweep>"
    base_dir: Path = Path(".")


def parse_sweep(data: object, source: str = "<sweep>", base_dir: Path | str = ".") -> Sweep:
    """Validate already-parsed YAML/JSON data into a :class:`Sweep`; errors name ``source``."""
    if not isinstance(data, dict):
        raise SweepError(f"{source}: (top level): must be a mapping of sweep fields, got {type(data).__name__}")
    try:
        spec = SweepSpec.model_validate(data)
    except ValidationError as err:
        raise SweepError(format_validation_error(source, err, skip=("grid", "random"))) from None
    return Sweep(spec=spec, source=source, base_dir=Path(base_dir))


def sweep_from_yaml(text: str, source: str = "<sweep>", base_dir: Path | str = ".") -> Sweep:
    """Parse YAML text into a :class:`Sweep` (through the bounded loader of :mod:`wmplan.yamlio`)."""
    return parse_sweep(load_yaml(text, source, SweepError), source, base_dir)


def load_sweep(path: str | Path) -> Sweep:
    """Read a sweep file."""
    path = Path(path)
    try:
        if not path.is_file():
            raise SweepError(f"{path}: no such sweep file")
    except OSError as err:  # e.g. a name too long for the file system
        raise SweepError(f"{path}: cannot open ({err.strerror or err})") from None
    return parse_sweep(read_yaml_file(path, SweepError), str(path), path.parent)
