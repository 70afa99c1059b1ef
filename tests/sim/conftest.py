"""Shared fixtures of the simulator reference tests: scenario variants and hand-placed traffic states.

Every fixture returns a factory, so that a test states the situation it needs in its own body. The scenario
variants start from the built-in ``open-road`` scenario and change only what a test needs (no random traffic,
no hard-braking events); the states hold exactly the vehicles a test places.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pytest

from wmplan import rng
from wmplan.scenario import Scenario, load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim.params import (
    T_A,
    T_B,
    T_BSAFE,
    T_P,
    T_S0,
    T_T,
    T_TH,
    T_V0,
    T_YIELD,
    SimParams,
)
from wmplan.sim.spawn import empty_state
from wmplan.sim.state import EGO, TrafficState


@dataclass(frozen=True)
class HighwaySet:
    """IDM highway set, Treiber & Kesting, *Traffic Flow Dynamics* (2013), Table 11.2: values from memory [M]
    (docs/references.md#treiber-kesting-2013-book); MOBIL defaults p 0.2 (within the paper's range), b_safe 4 m/s^2
    (Kesting, Treiber, Helbing 2007) and threshold 0.2 m/s^2 (the authors' later material; the 2007 paper has
    0.1 m/s^2, from memory): docs/references.md#kesting-2007-mobil."""

    desired_mps: float = 120.0 / 3.6
    t_s: float = 1.0
    s0_m: float = 2.0
    a_mps2: float = 1.0
    b_mps2: float = 1.5

    def traits(self, politeness: float = 0.2, threshold_mps2: float = 0.2, safe_decel_mps2: float = 4.0) -> dict:
        """Trait index -> value for one driver of this set."""
        return {
            T_V0: self.desired_mps,
            T_T: self.t_s,
            T_S0: self.s0_m,
            T_A: self.a_mps2,
            T_B: self.b_mps2,
            T_P: politeness,
            T_TH: threshold_mps2,
            T_BSAFE: safe_decel_mps2,
            T_YIELD: 0.5,
        }


@pytest.fixture
def highway() -> HighwaySet:
    """The IDM highway parameter set (and MOBIL defaults) used by the reference examples."""
    return HighwaySet()


@dataclass(frozen=True)
class Placed:
    """One vehicle put into a test state by hand (slot >= 1; slot 0 is the simulator's ego).

    Numbers may be scalars or arrays of shape (S,) with one value per scene.
    """

    slot: int
    lane: int
    x_m: float | np.ndarray  # centre
    speed_mps: float | np.ndarray
    traits: dict | None = None  # trait index -> value (scalar or (S,)); None keeps the scenario's means
    length_m: float | np.ndarray = 5.0
    width_m: float | np.ndarray = 1.8


def _edit(d: dict, path: str, value) -> None:
    *head, last = path.split(".")
    for key in head:
        d = d[key]
    d[last] = value


@pytest.fixture
def scenario_variant() -> Callable[..., Scenario]:
    """Factory: the built-in ``open-road`` scenario with dotted-path edits, validated by the real schema.

    ``scenario_variant(num_lanes=2, **{"traffic.window_ahead_m": 2000.0})``. By default the variant has no
    random traffic (density 0 in every lane) and no hard-braking events, so a state holds exactly what a test
    places in it.
    """

    def make(num_lanes: int = 3, **edits) -> Scenario:
        d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
        d["name"] = "test-variant"
        d["road"]["lanes"] = [{"start_m": 0.0, "end_m": None} for _ in range(num_lanes)]
        d["traffic"]["density_veh_per_km"] = [0.0] * num_lanes
        d["traffic"]["placed"] = []
        d["drivers"]["hard_brake_rate_per_min"] = 0.0
        d["ego"]["goal"]["lanes"] = list(range(num_lanes))
        d["ego"]["lane"] = min(d["ego"]["lane"], num_lanes - 1)
        for path, value in edits.items():
            _edit(d, path, value)
        return parse_scenario(d, "<test variant>")

    return make


@pytest.fixture
def place() -> Callable[..., TrafficState]:
    """Factory: an ``empty_state`` (one scene per seed) with hand-placed vehicles written into it.

    ``place(params, vehicles, seeds=[0], step=0, ego_x_m=..., ego_lane=..., ego_speed_mps=...)``. Every
    vehicle in ``vehicles`` is a dict of :class:`Placed` fields and goes into every scene (array values give
    one number per scene).
    """

    def make(
        params: SimParams,
        vehicles: Sequence[dict],
        *,
        seeds=(0,),
        step: int = 0,
        ego_x_m: float | None = None,
        ego_lane: int | None = None,
        ego_speed_mps: float | None = None,
        ego_steer_rad: np.ndarray | float = 0.0,
    ) -> TrafficState:
        st = empty_state(params, rng.scene_keys(list(seeds)))
        arr = st.to_arrays()
        arr["step"][:] = step
        if ego_x_m is not None:
            arr["x_m"][:, EGO] = ego_x_m
        if ego_lane is not None:
            arr["lane"][:, EGO] = ego_lane
            arr["y_m"][:, EGO] = params.lane_centre_m(ego_lane)
        if ego_speed_mps is not None:
            arr["vx_mps"][:, EGO] = ego_speed_mps
            arr["ego_speed_mps"][:] = ego_speed_mps
        arr["ego_steer_rad"][:] = ego_steer_rad
        placed = [Placed(**v) for v in vehicles]
        for pv in placed:
            assert pv.slot != EGO, "slot 0 is the simulator's ego"
            arr["valid"][:, pv.slot] = True
            arr["vehicle_id"][:, pv.slot] = pv.slot
            arr["lane"][:, pv.slot] = pv.lane
            arr["x_m"][:, pv.slot] = pv.x_m
            arr["y_m"][:, pv.slot] = params.lane_centre_m(pv.lane)
            arr["vx_mps"][:, pv.slot] = pv.speed_mps
            arr["length_m"][:, pv.slot] = pv.length_m
            arr["width_m"][:, pv.slot] = pv.width_m
            for idx, value in (pv.traits or {}).items():
                arr["traits"][:, pv.slot, idx] = value
        arr["next_id"][:] = max([pv.slot for pv in placed], default=0) + 1
        return TrafficState.from_arrays(arr)

    return make
