"""Reading scenario files: YAML in, a frozen :class:`Scenario` out, or a one-line error naming the problem."""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import yaml
from pydantic import ValidationError

from wmplan.errors import ScenarioError
from wmplan.scenario.schema import Scenario

BUILTIN_DIR = Path(__file__).resolve().parent / "builtin"


def builtin_names() -> list[str]:
    """Names of the scenarios shipped with the package, sorted."""
    return sorted(p.stem for p in BUILTIN_DIR.glob("*.yaml"))


def _format_loc(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


# A custom check that names its own field starts its message with the field's path, e.g.
# "traffic.density_veh_per_km has 2 values ..." or "density_veh_per_km[1] must lie in ...". A path here has at
# least one "_", "." or "[" so that an ordinary first word ("must ...") or a bare "low"/"mean" stays in the text.
_PATH_AT_START = re.compile(r"^([A-Za-z_]\w*(?:\.[A-Za-z_]\w*|\[\d+\])*) (.+)$")


def _field_from_message(field: str, msg: str) -> tuple[str, str]:
    """Move a field path that opens a validator's message into the field slot, joined to where pydantic
    reported the error (a check on a whole model reports the model, not the field it is about)."""
    m = _PATH_AT_START.match(msg)
    if m is None or not any(ch in m.group(1) for ch in "_.["):
        return field, msg
    path, rest = m.groups()
    head = re.split(r"[.\[]", path, maxsplit=1)[0]
    if field == "(top level)":
        return path, rest
    if field == head or field.endswith("." + head):  # the message restates the last part of the location
        return field[: len(field) - len(head)] + path, rest
    return f"{field}.{path}", rest


def format_validation_error(source: str, err: ValidationError) -> str:
    """One line: file, field, value and rule of the first problem, plus how many more there are."""
    problems = err.errors(include_url=False)
    first = problems[0]
    loc = tuple(p for p in first["loc"] if not (isinstance(p, str) and p.startswith("function-")))
    field = _format_loc(loc)
    msg = first["msg"]
    if first["type"] == "extra_forbidden":
        msg = "unknown key (check the spelling against `wmplan scenarios show open-road`)"
    elif first["type"] == "model_type" and first.get("ctx", {}).get("class_name") == "Dist":
        msg = "must be a number or a mapping {mean, std, low, high}"
    elif first["type"] == "value_error":
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, "):]
        field, msg = _field_from_message(field, msg)
    value = first.get("input")
    # The value is shown unless there is none, it is a whole mapping, or our own check already states it.
    hide = first["type"] == "missing" or isinstance(value, dict) or (first["type"] == "value_error" and ", got " in msg)
    shown = "" if hide else f" (got {value!r})"
    more = f" [and {len(problems) - 1} more problem(s)]" if len(problems) > 1 else ""
    return f"{source}: {field}: {msg}{shown}{more}"


def parse_scenario(data: object, source: str = "<scenario>") -> Scenario:
    """Validate already-parsed YAML/JSON data into a Scenario; errors name ``source``."""
    if not isinstance(data, dict):
        raise ScenarioError(f"{source}: (top level): must be a mapping of scenario fields, got {type(data).__name__}")
    try:
        return Scenario.model_validate(data)
    except ValidationError as err:
        raise ScenarioError(format_validation_error(source, err)) from None


def load_scenario(name_or_path: str | Path) -> Scenario:
    """Load a built-in scenario by name, or a scenario file by path."""
    path = Path(name_or_path)
    if not path.suffix and not path.exists():
        candidate = BUILTIN_DIR / f"{name_or_path}.yaml"
        if not candidate.exists():
            raise ScenarioError(
                f"{name_or_path}: no such built-in scenario or file; built-ins are: {', '.join(builtin_names())}"
            )
        path = candidate
    if not path.is_file():
        raise ScenarioError(f"{path}: no such scenario file")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise ScenarioError(f"{path}: cannot read the file ({err.__class__.__name__}: {err})") from None
    return scenario_from_yaml(text, str(path))


def scenario_from_yaml(text: str, source: str = "<scenario>") -> Scenario:
    """Parse YAML text into a Scenario."""
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark is not None else "somewhere"
        problem = getattr(err, "problem", None) or "not valid YAML"
        raise ScenarioError(f"{source}: (file): YAML syntax error at {where}: {problem}") from None
    return parse_scenario(data, source)


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
