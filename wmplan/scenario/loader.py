"""Reading scenario files: YAML in, a frozen :class:`Scenario` out, or a one-line error naming the problem."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import yaml
from pydantic import ValidationError

from wmplan.errors import ScenarioError, format_validation_error, one_line
from wmplan.scenario.schema import Scenario
from wmplan.yamlio import load_yaml, read_yaml_file

BUILTIN_DIR = Path(__file__).resolve().parent / "builtin"


def builtin_names() -> list[str]:
    """Names of the scenarios shipped with the package, sorted."""
    return sorted(p.stem for p in BUILTIN_DIR.glob("*.yaml"))


UNKNOWN_KEY_RULE = "unknown key (check the spelling against `wmplan scenarios show open-road`)"
_HINTS = {"Dist": "must be a number or a mapping {mean, std, low, high}"}


def parse_scenario(data: object, source: str = "<scenario>") -> Scenario:
    """Validate already-parsed YAML/JSON data into a Scenario; errors name ``source``."""
    if not isinstance(data, dict):
        raise ScenarioError(f"{source}: (top level): must be a mapping of scenario fields, got {type(data).__name__}")
    try:
        return Scenario.model_validate(data)
    except ValidationError as err:
        raise ScenarioError(
            format_validation_error(source, err, unknown_key=UNKNOWN_KEY_RULE, model_hints=_HINTS)
        ) from None


def load_scenario(name_or_path: str | Path) -> Scenario:
    """Load a built-in scenario by name, or a scenario file by path."""
    path = Path(name_or_path)
    try:
        if not path.suffix and not path.exists():
            candidate = BUILTIN_DIR / f"{name_or_path}.yaml"
            if not candidate.exists():
                raise ScenarioError(
                    f"{name_or_path}: no such built-in scenario or file; built-ins are: {', '.join(builtin_names())}"
                )
            path = candidate
        if not path.is_file():
            raise ScenarioError(f"{path}: no such scenario file")
    except OSError as err:  # e.g. a name too long for the file system
        raise ScenarioError(f"{one_line(str(name_or_path), 120)}: cannot open ({err.strerror or err})") from None
    return parse_scenario(read_yaml_file(path, ScenarioError), str(path))


def scenario_from_yaml(text: str, source: str = "<scenario>") -> Scenario:
    """Parse YAML text into a Scenario (through the bounded loader of :mod:`wmplan.yamlio`)."""
    return parse_scenario(load_yaml(text, source, ScenarioError), source)


def scenario_to_dict(scn: Scenario) -> dict:
    """Plain JSON-ready dict of a scenario (all defaults filled in)."""
    return scn.model_dump(mode="json")


def scenario_hash(scn: Scenario) -> str:
    """Content hash of a scenario: sha256 of its canonical JSON, all defaults filled in."""
    blob = json.dumps(scenario_to_dict(scn), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(blob.encode()).hexdigest()


def scenario_to_yaml(scn: Scenario) -> str:
    """YAML text of a scenario with every default written out (it loads back to an equal scenario)."""
    return yaml.safe_dump(scenario_to_dict(scn), sort_keys=False)
