"""Expanding a sweep into cells: one scenario variant x one planner, with its episode seeds and a stable id.

* Variants: the product of the ``vary`` axes, in file order (the last axis changes fastest). Each variant is the
  base scenario's dict (``scenario_to_dict``) with the cell's values set at their paths, validated again with
  ``parse_scenario``, so a combination the scenario refuses fails with the scenario's own one-line error, naming
  the sweep file and the cell.
* Seeds: ``episodes_per_cell`` distinct scene seeds drawn from ``SeedSequence([sweep seed, variant hash])``. They
  depend on the variant, never on the planner: every planner of a variant meets the same traffic (a paired
  comparison). Asking for more episodes keeps the first seeds and adds new ones.
* Ids: a cell's id is a hash of everything its rows depend on (the variant's content hash, the planner and its
  options, the seeds' origin, the row format), so it is the same on every machine and run, and a cell file on disk
  can be trusted to belong to the cell of that id.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from wmplan.errors import ScenarioError
from wmplan.evaluate.rows import ROWS_VERSION  # part of every cell id: a change never reuses old cell files
from wmplan.scenario import Scenario, load_scenario, parse_scenario, scenario_hash, scenario_to_dict
from wmplan.sweep.paths import PathError, close_matches, get_path, set_path
from wmplan.sweep.spec import Sweep, SweepError, canonical_json, content_hash

ID_LENGTH = 16


@dataclass(frozen=True)
class Cell:
    """One unit of work of a sweep.

    Attributes:
        cell_id: stable content hash (16 hex digits).
        variant_id: content hash of the scenario variant (shared by all planners of the variant).
        planner: planner name.
        planner_options: keyword options for the planner's runner.
        params: (path, value) for every swept path, in the order of the sweep file.
        scenario: the variant as a plain dict (``scenario_to_dict``), validated.
        seeds: the episode seeds, (episodes_per_cell,).
    """

    cell_id: str
    variant_id: str
    planner: str
    planner_options: dict[str, Any]
    params: tuple[tuple[str, Any], ...]
    scenario: dict[str, Any]
    seeds: tuple[int, ...]

    def describe(self) -> str:
        """``planner rules, traffic.density_veh_per_km[1]=24.0, ...`` for messages."""
        parts = [f"planner {self.planner}"] + [f"{p}={v!r}" for p, v in self.params]
        return ", ".join(parts)

    def load_scenario(self) -> Scenario:
        """The cell's scenario variant, validated."""
        return parse_scenario(self.scenario, f"cell {self.cell_id}")


def resolve_base(sweep: Sweep) -> Scenario:
    """The sweep's base scenario: a built-in name, or a file relative to the sweep file's folder."""
    base = sweep.spec.base
    candidate = Path(base)
    if not candidate.is_absolute() and (candidate.suffix or "/" in base):
        candidate = sweep.base_dir / candidate
    target: str | Path = candidate if candidate.suffix or candidate.exists() else base
    try:
        return load_scenario(target)
    except ScenarioError as err:
        raise SweepError(f"{sweep.source}: base: {err}") from None


def episode_seeds(sweep_seed: int, variant_hash: str, n: int) -> tuple[int, ...]:
    """``n`` distinct scene seeds in [0, 2**32) for one variant; a prefix of the seeds for any larger ``n``."""
    ss = np.random.SeedSequence([int(sweep_seed), int(variant_hash, 16)])
    size = n
    while True:
        raw = ss.generate_state(size, dtype=np.uint32).astype(np.int64)
        _, first = np.unique(raw, return_index=True)
        keep = raw[np.sort(first)]
        if len(keep) >= n:
            return tuple(int(s) for s in keep[:n])
        size = 2 * size + 8


def check_paths(sweep: Sweep, base: dict) -> None:
    """Refuse a ``vary`` path that does not name a value of the base scenario, with the close matches."""
    for path in sweep.spec.vary:
        try:
            get_path(base, path)
        except PathError as err:
            near = close_matches(path, base)
            hint = f"; close matches: {', '.join(near)}" if near else "; no close match"
            raise SweepError(f"{sweep.source}: vary[{path!r}]: {err} (base scenario {base['name']}){hint}") from None


def variants(sweep: Sweep) -> list[tuple[tuple[tuple[str, Any], ...], Scenario]]:
    """Every (params, validated scenario) of the sweep, in axis order (the last axis changes fastest)."""
    base = scenario_to_dict(resolve_base(sweep))
    check_paths(sweep, base)
    axes = sweep.spec.axes()
    paths = [p for p, _ in axes]
    out = []
    for combo in itertools.product(*[values for _, values in axes]):
        params = tuple(zip(paths, combo, strict=True))
        data = base
        for path, value in params:
            data = set_path(data, path, value)
        desc = ", ".join(f"{p}={v!r}" for p, v in params) or "no swept values"
        out.append((params, parse_scenario(data, f"{sweep.source} (cell {desc})")))
    return out


def expand_cells(sweep: Sweep) -> list[Cell]:
    """All cells of a sweep: variants x planners, in that order.

    Raises:
        SweepError: unknown path, or two cells that would be the same (e.g. grid values 1 and 1.0).
        ScenarioError: a combination of values the scenario refuses (the message names the file and the cell).
    """
    spec = sweep.spec
    cells: list[Cell] = []
    seen: dict[str, Cell] = {}
    for params, scn in variants(sweep):
        vhash = scenario_hash(scn)
        scn_dict = scenario_to_dict(scn)
        seeds = episode_seeds(spec.seed, vhash, spec.episodes_per_cell)
        for planner in spec.planners:
            options = dict(spec.planner_options.get(planner, {}))
            cid = content_hash(
                {
                    "rows_version": ROWS_VERSION,
                    "scenario": vhash,
                    "planner": planner,
                    "options": options,
                    "sweep_seed": spec.seed,
                    "episodes": spec.episodes_per_cell,
                }
            )[:ID_LENGTH]
            cell = Cell(
                cell_id=cid,
                variant_id=vhash[:ID_LENGTH],
                planner=planner,
                planner_options=options,
                params=params,
                scenario=scn_dict,
                seeds=seeds,
            )
            if cid in seen:
                raise SweepError(
                    f"{sweep.source}: vary: the cells ({seen[cid].describe()}) and ({cell.describe()}) "
                    "make the same scenario; remove one of the values"
                )
            seen[cid] = cell
            cells.append(cell)
    return cells


def param_column_kinds(sweep: Sweep) -> dict[str, str]:
    """Per swept path, ``"number"`` if every value on its axis is a number (a float column), else ``"json"``."""
    kinds = {}
    for path, values in sweep.spec.axes():
        numeric = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values)
        kinds[path] = "number" if numeric else "json"
    return kinds


def param_column_value(kind: str, value: Any) -> Any:
    """A swept value as stored in the results table (a float, or JSON text)."""
    return float(value) if kind == "number" else canonical_json(value)
