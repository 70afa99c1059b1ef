"""Sweep files: one-line errors naming file, field, value and rule; dotted paths; cell expansion, ids and seeds.

Error tests match the exact message (DEVELOPERS.md, "Errors and files"). Paths and ids are checked against the
scenario itself (``scenario_to_dict`` / ``parse_scenario``), not against copies of its numbers.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from wmplan.errors import ScenarioError
from wmplan.evaluate.planners import planner_names
from wmplan.scenario import load_scenario, parse_scenario, scenario_hash, scenario_to_dict
from wmplan.sweep import SweepError, expand_cells, load_sweep, parse_sweep
from wmplan.sweep.cells import episode_seeds
from wmplan.sweep.paths import close_matches, get_path, parse_path, set_path
from wmplan.sweep.runner import _resolve_planners

HEAD = "name: t\nbase: onramp-merge\n"
TAIL = "planners: [rules]\nseed: 1\nepisodes_per_cell: 2\n"


def _write(tmp_path: Path, text: str, name: str = "s.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def _errors(path: Path) -> None:
    """Load, resolve planners and expand: every check a sweep file meets before any episode runs."""
    sweep = load_sweep(path)
    _resolve_planners(sweep)
    expand_cells(sweep)


@pytest.mark.parametrize(
    ("body", "message"),
    [
        (HEAD + TAIL + "workers: 3\n", "workers: unknown key (got 3)"),
        (
            HEAD + "vary:\n  drivers.yield_prob.mean: [0.2, .nan]\n" + TAIL,
            "vary['drivers.yield_prob.mean']: grid value [1] must be finite, got nan",
        ),
        (
            HEAD + "vary:\n  drivers.yield_prob.mean: {low: .nan, high: 1, dist: uniform, samples: 2}\n" + TAIL,
            "vary['drivers.yield_prob.mean'].low: Input should be a finite number (got nan)",
        ),
        (
            HEAD
            + "vary:\n  drivers.hard_brake_rate_per_min: {low: 0.1, high: .inf, dist: loguniform, samples: 2}\n"
            + TAIL,
            "vary['drivers.hard_brake_rate_per_min'].high: Input should be a finite number (got inf)",
        ),
        (
            HEAD
            + "vary:\n  drivers.hard_brake_rate_per_min: {low: 0.0, high: 1.0, dist: loguniform, samples: 2}\n"
            + TAIL,
            "vary['drivers.hard_brake_rate_per_min']: loguniform needs low > 0, got low = 0.0",
        ),
        (
            HEAD + "vary:\n  drivers.hard_brake_rate_per_min: {low: 0.1, high: 1.0, dist: normal, samples: 2}\n" + TAIL,
            "vary['drivers.hard_brake_rate_per_min'].dist: Input should be 'uniform' or 'loguniform' (got 'normal')",
        ),
        (
            HEAD + "vary:\n  drivers.hard_brake_rate_per_min: 3\n" + TAIL,
            "vary['drivers.hard_brake_rate_per_min']: must be a list of values (a grid) or a mapping "
            "{low, high, dist, samples} (random values) (got 3)",
        ),
        (
            HEAD + "vary:\n  drivers.hard_brake_rate_per_min: []\n" + TAIL,
            "vary['drivers.hard_brake_rate_per_min']: a grid needs at least one value (got [])",
        ),
        (
            HEAD + "vary:\n  traffic..density: [1]\n" + TAIL,
            "vary: key 'traffic..density' is not a dotted path like 'traffic.density_veh_per_km[1]' or "
            "'drivers.yield_prob.mean'",
        ),
        (
            HEAD + "planners: [rules, rules]\nseed: 1\nepisodes_per_cell: 2\n",
            "planners: entry [1] repeats 'rules'; list each planner once (got ['rules', 'rules'])",
        ),
        (HEAD + "planners: rules\nseed: 1\nepisodes_per_cell: 2\n", "planners: must be a list (got 'rules')"),
        (
            HEAD + "planners: [rules]\nseed: 1\nepisodes_per_cell: 0\n",
            "episodes_per_cell: Input should be greater than or equal to 1 (got 0)",
        ),
        (HEAD + "planners: [rules]\nepisodes_per_cell: 2\n", "seed: Field required"),
        (
            HEAD + "planners: [rules]\nplanner_options: {mpc: {k: 1}}\nseed: 1\nepisodes_per_cell: 2\n",
            "planner_options: names planner 'mpc', which is not in planners ['rules']",
        ),
        (
            "name: t\nbase: onramp-merg\n" + TAIL,
            "base: onramp-merg: no such built-in scenario or file; built-ins are: courtesy-stop, cut-in, lane-drop, "
            "lane-drop-turns, onramp-merge, open-road, short-gap-cut-in, stop-and-go",
        ),
        (
            "name: t\nbase: [onramp\n",
            "(file): YAML syntax error at line 3, column 1: expected ',' or ']', but got '<stream end>'",
        ),
        (
            HEAD + "vary:\n  drivers.hard_brake_rate_per_min: [1, 2, 1.0]\n" + TAIL,
            "vary: the cells (planner rules, drivers.hard_brake_rate_per_min=1) and (planner rules, "
            "drivers.hard_brake_rate_per_min=1.0) make the same scenario; remove one of the values",
        ),
    ],
)
def test_bad_sweep_file_gives_one_line_error(tmp_path: Path, body: str, message: str) -> None:
    """Each malformed file is refused with one line: file, field, rule and (where there is one) the value."""
    path = _write(tmp_path, body)
    with pytest.raises(SweepError, match="^" + re.escape(f"{path}: {message}") + "$") as info:
        _errors(path)
    assert "\n" not in str(info.value)


def test_unknown_planner_lists_the_registered_ones(tmp_path: Path) -> None:
    """A planner name that is not registered is refused with the names that are."""
    path = _write(tmp_path, HEAD + "planners: [rules, no-such-planner]\nseed: 1\nepisodes_per_cell: 2\n")
    known = ", ".join(planner_names())
    with pytest.raises(
        SweepError,
        match="^"
        + re.escape(
            f"{path}: planners[1]: unknown planner 'no-such-planner'; known: {known}, or an import path "
            "module:factory (a plug-in)"
        )
        + "$",
    ):
        _errors(path)


def test_unknown_path_lists_close_matches(tmp_path: Path) -> None:
    """A misspelt path is refused, and the message offers the real paths that look like it (difflib)."""
    path = _write(tmp_path, HEAD + "vary:\n  traffic.density[1]: [1.0]\n" + TAIL)
    expected = (
        f"{path}: vary['traffic.density[1]']: is not a field of the scenario (base scenario onramp-merge); "
        "close matches: traffic.density_veh_per_km[1], traffic.density_veh_per_km[2], "
        "traffic.density_veh_per_km[0], traffic.density_veh_per_km, traffic.length_m"
    )
    with pytest.raises(SweepError, match=re.escape(expected)):
        _errors(path)
    path2 = _write(tmp_path, HEAD + "vary:\n  drivers.yeild_prob.mean: [0.5]\n" + TAIL, "s2.yaml")
    with pytest.raises(SweepError, match=re.escape("close matches: drivers.yield_prob.mean,")):
        _errors(path2)


def test_index_out_of_range_is_refused(tmp_path: Path) -> None:
    """A list index beyond the list says how long the list is."""
    path = _write(tmp_path, HEAD + "vary:\n  traffic.density_veh_per_km[3]: [1.0]\n" + TAIL)
    with pytest.raises(
        SweepError,
        match=re.escape(
            f"{path}: vary['traffic.density_veh_per_km[3]']: index [3] is out of range: "
            "traffic.density_veh_per_km has 3 value(s) (base scenario onramp-merge); close matches:"
        ),
    ):
        _errors(path)


def test_invalid_cell_gives_the_scenarios_own_error_naming_the_cell(tmp_path: Path) -> None:
    """A value the scenario schema refuses fails with the scenario's message, prefixed by file and cell."""
    path = _write(tmp_path, HEAD + "vary:\n  traffic.density_veh_per_km[1]: [24.0, 200.0]\n" + TAIL)
    data = scenario_to_dict(load_scenario("onramp-merge"))
    data["traffic"]["density_veh_per_km"][1] = 200.0
    source = f"{path} (cell traffic.density_veh_per_km[1]=200.0)"
    with pytest.raises(ScenarioError) as own:
        parse_scenario(data, source)
    with pytest.raises(ScenarioError, match="^" + re.escape(str(own.value)) + "$"):
        _errors(path)
    assert str(own.value).startswith(source + ": ") and "200" in str(own.value)


def test_base_scenario_file_relative_to_the_sweep_file(tmp_path: Path) -> None:
    """``base`` may name a scenario file next to the sweep file."""
    (tmp_path / "sub").mkdir()
    scn = scenario_to_dict(load_scenario("open-road"))
    import yaml

    (tmp_path / "sub" / "mine.yaml").write_text(yaml.safe_dump(scn))
    path = _write(tmp_path / "sub", "name: t\nbase: mine.yaml\n" + TAIL)
    cells = expand_cells(load_sweep(path))
    assert len(cells) == 1 and cells[0].scenario == scn
    missing = _write(tmp_path, "name: t\nbase: nope.yaml\n" + TAIL, "m.yaml")
    with pytest.raises(
        SweepError, match=re.escape(f"{missing}: base: {tmp_path / 'nope.yaml'}: no such scenario file")
    ):
        _errors(missing)


# --- dotted paths -------------------------------------------------------------------------------------------------


def test_dotted_paths_round_trip_and_set_on_a_copy() -> None:
    """Paths parse into keys and indices; set_path changes the copy only."""
    assert parse_path("traffic.density_veh_per_km[1]") == ("traffic", "density_veh_per_km", 1)
    assert parse_path("drivers.yield_prob.mean") == ("drivers", "yield_prob", "mean")
    data = scenario_to_dict(load_scenario("onramp-merge"))
    new = set_path(data, "traffic.density_veh_per_km[1]", 30.0)
    assert get_path(new, "traffic.density_veh_per_km[1]") == 30.0
    assert get_path(data, "traffic.density_veh_per_km[1]") == 24.0
    assert close_matches("drivers.yield_prob.maen", data)[0] == "drivers.yield_prob.mean"


# --- cells ----------------------------------------------------------------------------------------------------


def _two_planner_sweep(seed: int = 5, episodes: int = 3):
    return parse_sweep(
        {
            "name": "t",
            "base": "onramp-merge",
            "vary": {
                "traffic.density_veh_per_km[1]": [12.0, 36.0],
                "drivers.hard_brake_rate_per_min": {"low": 0.05, "high": 2.0, "dist": "loguniform", "samples": 2},
            },
            "planners": ["rules", "rules-twin"],
            "seed": seed,
            "episodes_per_cell": episodes,
        }
    )


def test_cells_are_the_product_with_stable_ids_and_paired_seeds() -> None:
    """2 grid values x 2 random draws x 2 planners = 8 cells; ids repeat exactly on a second expansion; both
    planners of a variant get the same seeds; each variant is the base with the cell's values set."""
    sweep = _two_planner_sweep()
    cells = expand_cells(sweep)
    assert len(cells) == 8 and len({c.cell_id for c in cells}) == 8
    assert [c.cell_id for c in expand_cells(_two_planner_sweep())] == [c.cell_id for c in cells]
    by_variant: dict[str, list] = {}
    for c in cells:
        by_variant.setdefault(c.variant_id, []).append(c)
    assert len(by_variant) == 4
    for group in by_variant.values():
        assert {c.planner for c in group} == {"rules", "rules-twin"}
        assert len({c.seeds for c in group}) == 1
        scn = parse_scenario(group[0].scenario)
        assert scenario_hash(scn)[:16] == group[0].variant_id
        params = dict(group[0].params)
        assert scn.traffic.density_veh_per_km[1] == params["traffic.density_veh_per_km[1]"]
        assert scn.drivers.hard_brake_rate_per_min == params["drivers.hard_brake_rate_per_min"]
    # different sweep seed: same grid, different random draws and different episode seeds
    other = expand_cells(_two_planner_sweep(seed=6))
    assert {c.cell_id for c in other}.isdisjoint({c.cell_id for c in cells})


def test_random_draws_lie_in_range_and_follow_the_distribution() -> None:
    """Loguniform draws lie in [low, high] and their logs are uniform: a Kolmogorov-Smirnov test against
    scipy.stats.uniform on the log scale does not reject (p > 0.001) for 2000 draws."""
    from scipy.stats import kstest

    spec = parse_sweep(
        {
            "name": "t",
            "base": "onramp-merge",
            "planners": ["rules"],
            "seed": 3,
            "episodes_per_cell": 1,
            "vary": {
                "drivers.hard_brake_rate_per_min": {"low": 0.01, "high": 10.0, "dist": "loguniform", "samples": 2000}
            },
        }
    ).spec
    ((_, values),) = spec.axes()
    arr = np.array(values)
    assert arr.min() >= 0.01 and arr.max() <= 10.0
    u = (np.log(arr) - np.log(0.01)) / (np.log(10.0) - np.log(0.01))
    assert kstest(u, "uniform").pvalue > 1e-3
    assert spec.axes() == spec.axes()


def test_episode_seeds_are_distinct_and_extend_as_a_prefix() -> None:
    """More episodes keep the first seeds; seeds within a cell are distinct."""
    h = "ab" * 32
    short, long = episode_seeds(9, h, 10), episode_seeds(9, h, 500)
    assert long[:10] == short and len(set(long)) == 500
    assert episode_seeds(10, h, 10) != short
