"""Scenes of several variants of one scenario in one batch: contiguous groups, each with its own parameters.

Stress tests draw a new scenario variant (traffic density, driver traits, the ego's start speed, ...) for almost
every episode, so batching episodes per variant leaves the planner with batches of one to four episodes, and a
sampling planner pays its per-call costs once per episode. A :class:`VariantBatch` lets a planner decide for
the episodes of many variants at once (``benchmarks/stress_batching.py`` measures it): one engine call steps every
scene with its own variant's parameters (:func:`wmplan.sim.engine.step_groups`, a row of a parameter table per
variant; scenes never interact, and a scene's random draws depend only on its own key, so each scene evolves
exactly as it would alone), while the planner sees one batch.

The variants must agree on everything the planner and the batch bookkeeping read from the parameters: the road,
the ego's limits, lane and goal, the time step and duration, the number of vehicle slots and the importance
sampling tilt (:func:`batchable`). What may differ is the traffic (densities, driver trait distributions, random
event rates) and the ego's start position and speed.
"""

from __future__ import annotations

import functools
import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from wmplan.errors import ConfigError
from wmplan.scenario import Scenario, scenario_to_dict
from wmplan.sim.engine import StepInfo, step_groups
from wmplan.sim.kernel import ParamTable
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import TrafficState

FREE_SECTIONS = ("traffic", "drivers")
"""Scenario sections that may differ between the variants of one batch (besides the ego's start x and speed);
``traffic.max_vehicles`` must still agree (it sets the array shapes)."""


def _fixed_part(scn: Scenario) -> dict:
    d = scenario_to_dict(scn)
    for key in ("name", "description", *FREE_SECTIONS):
        d.pop(key, None)
    ego = dict(d.get("ego", {}))
    ego.pop("x_m", None)
    ego.pop("speed_mps", None)
    d["ego"] = ego
    d["max_vehicles"] = scn.traffic.max_vehicles
    return d


def batchable(scenarios: Sequence[Scenario]) -> bool:
    """Whether these scenario variants can share one batch (see the module docstring)."""
    if not scenarios:
        return False
    first = _fixed_part(scenarios[0])
    return all(_fixed_part(s) == first for s in scenarios[1:])


def batch_classes(scenarios: Sequence[Scenario], also: Callable[[Scenario], object] | None = None) -> list[list[int]]:
    """Indices of the scenarios grouped into classes that can each share one batch, classes in order of their
    first member, members in order. ``also(scenario)``: a further value the members of a class must share (e.g.
    what a policy reads from the free sections)."""
    classes: dict[str, list[int]] = {}
    for i, scn in enumerate(scenarios):
        key = json.dumps([_fixed_part(scn), None if also is None else also(scn)], sort_keys=True)
        classes.setdefault(key, []).append(i)
    return list(classes.values())


def variant_chunks(all_params: Sequence[SimParams], seeds: Sequence[np.ndarray], batch_size: int):
    """The scenes of several variants (``seeds[g]`` with ``all_params[g]``, in variant order) in batches of at most
    ``batch_size``: yields ``(batch, seeds (n,), owner (n,), index (n,))``, owner the variant of each scene and
    index its position among that variant's seeds."""
    if not seeds:
        return
    owner = np.concatenate([np.full(len(s), g, dtype=np.int64) for g, s in enumerate(seeds)])
    flat = np.concatenate([np.asarray(s, dtype=np.int64) for s in seeds])
    index = np.concatenate([np.arange(len(s)) for s in seeds])
    for start in range(0, len(flat), batch_size):
        part = slice(start, start + batch_size)
        used, counts = np.unique(owner[part], return_counts=True)  # owners are sorted: contiguous groups
        batch = VariantBatch(tuple(all_params[g] for g in used), tuple(int(c) for c in counts))
        yield batch, flat[part], owner[part], index[part]


@dataclass(frozen=True)
class VariantBatch:
    """Contiguous groups of scenes: scenes ``[bounds[g][0], bounds[g][1])`` run with ``params[g]``."""

    params: tuple[SimParams, ...]
    counts: tuple[int, ...]

    def __post_init__(self) -> None:
        if len(self.params) != len(self.counts) or not self.params:
            raise ConfigError("VariantBatch needs one scene count per parameter set, and at least one of each")
        if any(c < 0 for c in self.counts):
            raise ConfigError(f"VariantBatch scene counts must be >= 0, got {self.counts}")
        p0 = self.params[0]
        for p in self.params[1:]:
            if (p.dt_s, p.num_steps, p.num_vehicles, p.tilt) != (p0.dt_s, p0.num_steps, p0.num_vehicles, p0.tilt):
                raise ConfigError(
                    "the variants of one batch must share the time step, the duration, the number of "
                    "vehicle slots and the tilt"
                )

    @staticmethod
    def single(params: SimParams, num_scenes: int) -> VariantBatch:
        """A batch of ``num_scenes`` scenes that all share one parameter set."""
        return VariantBatch((params,), (int(num_scenes),))

    @property
    def num_scenes(self) -> int:
        """Scenes over all variants."""
        return int(sum(self.counts))

    @property
    def bounds(self) -> list[tuple[int, int]]:
        """The [start, stop) scene range of each variant, in order."""
        edges = np.concatenate([[0], np.cumsum(self.counts)]).astype(int)
        return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]

    def _groups(self):
        return [(p, a, b) for p, (a, b) in zip(self.params, self.bounds, strict=True) if b > a]

    def initial_state(self, seeds: np.ndarray) -> TrafficState:
        """Start every scene with its group's parameters; ``seeds`` (S,) in group order."""
        seeds = np.asarray(seeds, dtype=np.int64)
        if len(seeds) != self.num_scenes:
            raise ConfigError(f"VariantBatch holds {self.num_scenes} scenes, got {len(seeds)} seeds")
        parts = [initial_state(p, seeds[a:b]) for p, a, b in self._groups()]
        return parts[0] if len(parts) == 1 else TrafficState.concat(parts)

    @functools.cached_property
    def table(self) -> ParamTable:
        """The kernel's parameter table, one row per variant."""
        return ParamTable(self.params)

    @functools.cached_property
    def group(self) -> np.ndarray:
        """(S,) the variant of each scene."""
        return np.repeat(np.arange(len(self.counts), dtype=np.int64), self.counts)

    def step(self, state: TrafficState, action: np.ndarray) -> tuple[TrafficState, StepInfo]:
        """One engine step of every scene with its own group's parameters (one call of the compiled step)."""
        if state.num_scenes != self.num_scenes:
            raise ConfigError(f"VariantBatch holds {self.num_scenes} scenes, got a state of {state.num_scenes}")
        return step_groups(state, action, self.table, self.group)
