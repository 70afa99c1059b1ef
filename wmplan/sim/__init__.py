"""The batched lane-traffic simulator (numpy only; importing it never imports torch)."""

from wmplan.sim.engine import StepInfo, step, traffic_collisions
from wmplan.sim.features import ACTION_DIM, ROAD_FEATURES, VEHICLE_FEATURES
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO, TrafficState

__all__ = [
    "ACTION_DIM",
    "EGO",
    "ROAD_FEATURES",
    "SimParams",
    "StepInfo",
    "TrafficState",
    "VEHICLE_FEATURES",
    "initial_state",
    "step",
    "traffic_collisions",
]
