"""Scenario files: the built-ins load, and bad files give the exact one-line error naming file, field, value, rule.

The messages are the project's own contract (no external source); the rule is that an error caused by input is
one line naming the file, the field, the value and the rule it breaks (DEVELOPERS.md, "Errors and files").
"""

from __future__ import annotations

import copy
import math
import re
from pathlib import Path

import pytest
import yaml

from wmplan.errors import ScenarioError, WmplanError
from wmplan.scenario import (
    Scenario,
    builtin_names,
    load_scenario,
    scenario_from_yaml,
    scenario_hash,
    scenario_to_dict,
    scenario_to_yaml,
)
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state

BUILTINS = [
    "courtesy-stop",
    "cut-in",
    "lane-drop",
    "lane-drop-turns",
    "onramp-merge",
    "open-road",
    "short-gap-cut-in",
    "stop-and-go",
]
REPO_SCENARIOS = Path(__file__).resolve().parents[2] / "scenarios"
UNKNOWN_KEY_HINT = "unknown key (check the spelling against `wmplan scenarios show open-road`)"


def test_builtin_names_lists_exactly_the_builtins():
    """The registry holds the shipped scenarios, sorted, and they are the files under scenarios/."""
    assert builtin_names() == BUILTINS
    assert sorted(p.stem for p in REPO_SCENARIOS.glob("*.yaml")) == BUILTINS


@pytest.mark.parametrize("name", BUILTINS)
def test_every_builtin_loads(name):
    """Each built-in loads by name and by path to the same scenario, carries its own name, round-trips through
    YAML with every default written out, and produces a first state without error (seed 0)."""
    scn = load_scenario(name)
    assert isinstance(scn, Scenario)
    assert scn.name == name
    assert load_scenario(REPO_SCENARIOS / f"{name}.yaml") == scn
    again = scenario_from_yaml(scenario_to_yaml(scn), f"{name} (round trip)")
    assert again == scn
    assert scenario_hash(again) == scenario_hash(scn)
    params = SimParams.from_scenario(scn)
    state = initial_state(params, [0])
    assert state.valid[0, 0]
    assert state.num_vehicles == scn.traffic.max_vehicles


# --- exact error messages ---


def _write(tmp_path: Path, edit, name: str = "broken.yaml") -> Path:
    """open-road with one edit applied to its plain dict, written as YAML to ``tmp_path / name``."""
    d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
    edit(d)
    path = tmp_path / name
    path.write_text(yaml.safe_dump(d, sort_keys=False), encoding="utf-8")
    return path


def _set(*path_and_value):
    *path, value = path_and_value

    def edit(d):
        for key in path[:-1]:
            d = d[key]
        d[path[-1]] = value

    return edit


CASES = {
    "unknown key": (_set("road", "lane_widht_m", 3.5), f"road.lane_widht_m: {UNKNOWN_KEY_HINT} (got 3.5)"),
    "wrong type": (
        _set("road", "length_m", "long"),
        "road.length_m: Input should be a valid number, unable to parse string as a number (got 'long')",
    ),
    "wrong type int": (
        _set("traffic", "max_vehicles", 2.5),
        "traffic.max_vehicles: Input should be a valid integer, got a number with a fractional part (got 2.5)",
    ),
    "nan": (_set("road", "length_m", math.nan), "road.length_m: Input should be a finite number (got nan)"),
    "inf": (_set("road", "length_m", math.inf), "road.length_m: Input should be a finite number (got inf)"),
    "nan in a distribution": (
        _set("drivers", "desired_speed_mps", "mean", math.nan),
        "drivers.desired_speed_mps.mean: Input should be a finite number (got nan)",
    ),
    "out of range": (
        _set("road", "lane_width_m", 7.0),
        "road.lane_width_m: Input should be less than or equal to 5 (got 7.0)",
    ),
    "out of range in a list": (
        _set("traffic", "density_veh_per_km", [15.0, 200.0, 12.0]),
        "traffic.density_veh_per_km[1]: must lie in [0, 150] vehicles per km, got 200.0",
    ),
    "density length mismatch": (
        _set("traffic", "density_veh_per_km", [15.0, 15.0]),
        "traffic.density_veh_per_km: has 2 values but the road has 3 lanes; give one density per lane",
    ),
    "ego lane out of range": (_set("ego", "lane", 3), "ego.lane: must be < 3 (the road's lane count), got 3"),
    "ego off its lane": (_set("ego", "x_m", 2500.0), "ego.x_m: (2500.0) must lie on lane 1, which spans [0.0, 2000.0)"),
    "distribution of the wrong kind": (
        _set("drivers", "time_headway_s", "fast"),
        "drivers.time_headway_s: must be a number or a mapping {mean, std, low, high} (got 'fast')",
    ),
    "missing field": (lambda d: d["road"].pop("length_m"), "road.length_m: Field required"),
}


@pytest.mark.parametrize("case", list(CASES))
def test_error_message(tmp_path, case):
    """Each broken file gives exactly this one-line message, prefixed with the file's path."""
    edit, msg = CASES[case]
    path = _write(tmp_path, edit)
    expected = f"{path}: {msg}"
    with pytest.raises(ScenarioError, match=f"^{re.escape(expected)}$") as info:
        load_scenario(path)
    assert "\n" not in str(info.value)
    assert isinstance(info.value, WmplanError)


def test_several_problems_are_counted(tmp_path):
    """The first problem is named; the rest are counted, on the same line."""

    def edit(d):
        d["road"]["lane_width_m"] = 7.0
        d["road"]["speed_limit_mps"] = -1.0
        d["dt_s"] = 0.0

    path = _write(tmp_path, edit)
    with pytest.raises(ScenarioError, match=r"\[and 2 more problem\(s\)\]$") as info:
        load_scenario(path)
    assert str(info.value).startswith(f"{path}: ")
    assert "\n" not in str(info.value)


def test_yaml_syntax_error(tmp_path):
    """A YAML syntax error names the line and column (1-based) and the parser's complaint."""
    path = tmp_path / "syntax.yaml"
    path.write_text("name: broken\ndt_s: 0.1\n  duration_s: 20.0\n", encoding="utf-8")
    expected = f"{path}: (file): YAML syntax error at line 3, column 13: mapping values are not allowed here"
    with pytest.raises(ScenarioError, match=f"^{re.escape(expected)}$"):
        load_scenario(path)


def test_missing_file(tmp_path):
    """A path that does not exist is named as such."""
    path = tmp_path / "nowhere.yaml"
    with pytest.raises(ScenarioError, match=f"^{re.escape(f'{path}: no such scenario file')}$"):
        load_scenario(path)


def test_unknown_builtin_name():
    """A bare name that is neither a built-in nor a file lists the built-ins."""
    msg = "open-raod: no such built-in scenario or file; built-ins are: " + ", ".join(BUILTINS)
    with pytest.raises(ScenarioError, match=f"^{re.escape(msg)}$"):
        load_scenario("open-raod")


@pytest.mark.parametrize(("text", "kind"), [("- 1\n- 2\n", "list"), ("just a string\n", "str"), ("", "NoneType")])
def test_non_mapping_document(tmp_path, text, kind):
    """A document that is not a mapping (a list, a scalar, an empty file) is refused at the top level."""
    path = tmp_path / "flat.yaml"
    path.write_text(text, encoding="utf-8")
    expected = f"{path}: (top level): must be a mapping of scenario fields, got {kind}"
    with pytest.raises(ScenarioError, match=f"^{re.escape(expected)}$"):
        load_scenario(path)
