"""Scenario files: schema, loading with one-line errors, and the built-in registry."""

from wmplan.scenario.loader import (
    builtin_names,
    load_scenario,
    parse_scenario,
    scenario_from_yaml,
    scenario_hash,
    scenario_to_dict,
    scenario_to_yaml,
)
from wmplan.scenario.schema import SCHEMA_VERSION, Dist, Scenario

__all__ = [
    "SCHEMA_VERSION",
    "Dist",
    "Scenario",
    "builtin_names",
    "load_scenario",
    "parse_scenario",
    "scenario_from_yaml",
    "scenario_hash",
    "scenario_to_dict",
    "scenario_to_yaml",
]
