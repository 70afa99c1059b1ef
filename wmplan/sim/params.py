"""Numeric parameters of one scenario, laid out as numpy arrays for the batched engine.

:class:`SimParams` is built once from a :class:`~wmplan.scenario.Scenario` and never changes; the engine reads
road geometry and trait distributions from it instead of walking the pydantic model in the hot loop.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from wmplan.scenario.schema import Scenario
from wmplan.sim.tilt import EventTilt

# Order of the per-vehicle hidden traits in ``TrafficState.traits`` (last axis).
TRAIT_NAMES = (
    "desired_speed_mps",
    "time_headway_s",
    "min_gap_m",
    "max_accel_mps2",
    "comfort_decel_mps2",
    "politeness",
    "change_threshold_mps2",
    "safe_decel_mps2",
    "yield_prob",
)
T_V0, T_T, T_S0, T_A, T_B, T_P, T_TH, T_BSAFE, T_YIELD = range(len(TRAIT_NAMES))
NUM_TRAITS = len(TRAIT_NAMES)

# Physical limit of braking for traffic (tyre-road friction), m/s^2: "about 9 m/s^2" (Kesting et al. 2007).
MAX_PHYSICAL_DECEL_MPS2 = 9.0
# Lane-change cool-down after a traffic vehicle starts a change, so that it does not flip back at once.
LANE_CHANGE_COOLDOWN_S = 4.0
# Extra urgency added to the incentive of a mandatory lane change (lane ending), m/s^2, scaled by closeness.
MANDATORY_BIAS_MPS2 = 3.0
# The rule-based ego's own IDM traits: common practice, no source.
EGO_RULE_TRAITS = {"time_headway_s": 1.4, "min_gap_m": 2.5, "max_accel_mps2": 1.5, "comfort_decel_mps2": 2.0}


@dataclass(frozen=True, eq=False)
class SimParams:
    """Arrays the engine needs, derived from one scenario.

    Attributes:
        dt_s: simulator step.
        lane_start_m, lane_end_m: where each lane exists, shape (L,).
        merge_target: lane that vehicles of each ending lane merge into, -1 where the lane does not end, (L,).
        trait_mean, trait_std, trait_lo, trait_hi: truncated-normal parameters of the hidden traits, (NT,).
    """

    scenario: Scenario
    dt_s: float
    num_steps: int
    num_vehicles: int
    num_lanes: int
    lane_width_m: float
    road_length_m: float
    speed_limit_mps: float
    lane_start_m: np.ndarray
    lane_end_m: np.ndarray
    merge_target: np.ndarray
    lane_ends_on_road: np.ndarray
    density_veh_per_m: np.ndarray
    window_behind_m: float
    window_ahead_m: float
    trait_mean: np.ndarray
    trait_std: np.ndarray
    trait_lo: np.ndarray
    trait_hi: np.ndarray
    brake_prob_per_step: float
    brake_decel: tuple[float, float, float, float]
    brake_duration: tuple[float, float, float, float]
    length_dist: tuple[float, float, float, float]
    width_dist: tuple[float, float, float, float]
    lane_change_speed_mps: float
    merge_zone_m: float
    yield_window_m: float
    initial_speed_fraction: float
    ego_length_m: float
    ego_width_m: float
    wheelbase_m: float
    l_r_m: float
    max_accel_mps2: float
    max_brake_mps2: float
    max_steer_rad: float
    max_steer_rate_radps: float
    goal_x_m: float
    goal_lane_mask: np.ndarray
    tilt: EventTilt | None = None  # importance-sampling tilt of the events near the ego (wmplan.sim.tilt)

    @classmethod
    def from_scenario(cls, scn: Scenario) -> SimParams:
        """Lay out one scenario's numbers as arrays."""
        road, tr, dr = scn.road, scn.traffic, scn.drivers
        bounds = np.array(road.lane_bounds_m(), dtype=np.float64)
        num_lanes = road.num_lanes
        ends_on_road = bounds[:, 1] < road.length_m - 1e-9
        merge_target = np.full(num_lanes, -1, dtype=np.int64)
        for lane in range(num_lanes):
            if not ends_on_road[lane]:
                continue
            # Merge into the neighbour that reaches furthest; the right neighbour wins a tie.
            best, best_end = -1, bounds[lane, 1]
            for nb in (lane - 1, lane + 1):
                if 0 <= nb < num_lanes and bounds[nb, 1] > best_end:
                    best, best_end = nb, bounds[nb, 1]
            merge_target[lane] = best
        dists = [getattr(dr, n) for n in TRAIT_NAMES]
        goal_mask = np.zeros(num_lanes, dtype=bool)
        goal_mask[list(scn.ego.goal.lanes)] = True

        def tup(d) -> tuple[float, float, float, float]:
            return (d.mean, d.std, d.lo, d.hi)

        return cls(
            scenario=scn,
            dt_s=scn.dt_s,
            num_steps=scn.num_steps,
            num_vehicles=tr.max_vehicles,
            num_lanes=num_lanes,
            lane_width_m=road.lane_width_m,
            road_length_m=road.length_m,
            speed_limit_mps=road.speed_limit_mps,
            lane_start_m=bounds[:, 0].copy(),
            lane_end_m=bounds[:, 1].copy(),
            merge_target=merge_target,
            lane_ends_on_road=ends_on_road,
            density_veh_per_m=np.asarray(tr.density_veh_per_km, dtype=np.float64) / 1000.0,
            window_behind_m=tr.window_behind_m,
            window_ahead_m=tr.window_ahead_m,
            trait_mean=np.array([d.mean for d in dists]),
            trait_std=np.array([d.std for d in dists]),
            trait_lo=np.array([d.lo for d in dists]),
            trait_hi=np.array([d.hi for d in dists]),
            brake_prob_per_step=dr.hard_brake_rate_per_min / 60.0 * scn.dt_s,
            brake_decel=tup(dr.hard_brake_decel_mps2),
            brake_duration=tup(dr.hard_brake_duration_s),
            length_dist=tup(tr.length_m),
            width_dist=tup(tr.width_m),
            lane_change_speed_mps=road.lane_width_m / dr.lane_change_duration_s,
            merge_zone_m=dr.merge_zone_m,
            yield_window_m=dr.yield_window_m,
            initial_speed_fraction=tr.initial_speed_fraction,
            ego_length_m=scn.ego.length_m,
            ego_width_m=scn.ego.width_m,
            wheelbase_m=scn.ego.wheelbase_m,
            l_r_m=scn.ego.l_r_m,
            max_accel_mps2=scn.limits.max_accel_mps2,
            max_brake_mps2=scn.limits.max_brake_mps2,
            max_steer_rad=scn.limits.max_steer_rad,
            max_steer_rate_radps=scn.limits.max_steer_rate_radps,
            goal_x_m=scn.ego.goal.x_m,
            goal_lane_mask=goal_mask,
        )

    @property
    def road_width_m(self) -> float:
        """Width of the paved road (m): lanes times lane width."""
        return self.num_lanes * self.lane_width_m

    def with_tilt(self, tilt: EventTilt | None) -> SimParams:
        """The same parameters with the events near the ego tilted (None: the nominal simulator)."""
        return dataclasses.replace(self, tilt=tilt)

    def lane_centre_m(self, lane_idx: np.ndarray) -> np.ndarray:
        """Lateral position of the centre of each given lane."""
        return (np.asarray(lane_idx) + 0.5) * self.lane_width_m

    def lane_of(self, y_m: np.ndarray) -> np.ndarray:
        """Index of the lane that contains lateral position ``y_m`` (clipped to the road's lanes)."""
        return np.clip(np.floor(y_m / self.lane_width_m), 0, self.num_lanes - 1).astype(np.int64)

    def lane_exists(self, lane_idx: np.ndarray, x_m: np.ndarray) -> np.ndarray:
        """True where lane ``lane_idx`` exists at position ``x_m`` (out-of-range lanes do not exist)."""
        lane_idx = np.asarray(lane_idx)
        inside = (lane_idx >= 0) & (lane_idx < self.num_lanes)
        li = np.clip(lane_idx, 0, self.num_lanes - 1)
        return inside & (x_m >= self.lane_start_m[li]) & (x_m <= self.lane_end_m[li])

    def distance_to_lane_end(self, lane_idx: np.ndarray, x_m: np.ndarray) -> np.ndarray:
        """Metres from ``x_m`` to where lane ``lane_idx`` ends on this road (inf if it runs to the road's end)."""
        if not self._any_lane_ends:  # every lane runs to the road's end
            return np.full(np.broadcast_shapes(np.shape(lane_idx), np.shape(x_m)), np.inf)
        li = np.clip(np.asarray(lane_idx), 0, self.num_lanes - 1)
        return np.where(self.lane_ends_on_road[li], self.lane_end_m[li] - x_m, np.inf)

    @property
    def _any_lane_ends(self) -> bool:
        return bool(self.lane_ends_on_road.any())
