"""The scenario file format: frozen pydantic models, SI units in every field name.

A scenario describes one kind of traffic situation: the road (lanes that may start and end), the traffic
(density, capacity, vehicles placed by hand), the distributions of the drivers' hidden traits, the ego vehicle
and its goal, the ego's physical limits, and the episode length. Every field is checked: unknown keys, wrong
types, NaN/inf and out-of-range values are refused with the field's dotted path.

Lanes are numbered from the right (lane 0 is the rightmost, lowest y). Positions are metres along the road (x)
and across it (y, lane 0's right edge at y = 0).

Sources of the defaults (entries of docs/references.md; "common practice" means no source):

- lane width 3.6 m: AASHTO metric editions, from memory (docs/references.md#aashto-green-book);
- vehicles 4.7 m x 1.85 m (traffic spread over 3.8-5.5 m x 1.6-2.1 m) and the ego's 2.8 m wheelbase: common
  practice (docs/references.md#practice-vehicle-size);
- IDM traits (headway 1.2 s, minimum gap 2 m, acceleration 1.2 m/s^2, comfortable deceleration 1.8 m/s^2):
  spread around the highway set of Treiber & Kesting 2013, values from memory
  (docs/references.md#treiber-kesting-2013-book, docs/references.md#treiber-2000-idm);
- MOBIL traits: politeness 0.2 and safe braking 4 m/s^2 from Kesting, Treiber, Helbing 2007; change threshold
  0.2 m/s^2 from the model authors' later material, not the 2007 paper's 0.1 m/s^2 (from memory)
  (docs/references.md#kesting-2007-mobil);
- lane change across one lane in 3 s: common practice (docs/references.md#practice-lane-change-duration);
- merge zone 250 m: common practice (docs/references.md#practice-road-layout);
- the ego's limits, 3 m/s^2 of acceleration, 8 m/s^2 of braking, 0.5 rad of steering and 0.6 rad/s of steering
  rate: common practice, the steering figures from memory (docs/references.md#practice-ego-limits);
- yield probability 0.5, yield window 40 m, hard-braking events (5 m/s^2 for 1.5 s), the simulated stretch around
  the ego, 0.1 s steps and 20 s episodes: chosen for this sandbox (docs/references.md#sandbox-choices).
"""

from __future__ import annotations

import math
from typing import Annotated, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, field_validator, model_validator

SCHEMA_VERSION = 1


def _reject_bool(value: object) -> object:
    if isinstance(value, bool):
        raise ValueError("must be a number, not true/false")
    return value


Finite = Annotated[float, BeforeValidator(_reject_bool), Field(allow_inf_nan=False)]
Int = Annotated[int, BeforeValidator(_reject_bool)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=False, allow_inf_nan=False)


class Dist(_Strict):
    """A scalar distribution: a normal truncated to [low, high] (std 0 gives a constant).

    In files either a number (a constant) or a mapping ``{mean, std, low, high}``.
    """

    mean: Finite
    std: Finite = Field(0.0, ge=0.0)
    low: Finite | None = None
    high: Finite | None = None

    @model_validator(mode="before")
    @classmethod
    def _from_number(cls, value: object) -> object:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return {"mean": value}
        return value

    @model_validator(mode="after")
    def _check_bounds(self) -> Dist:
        lo = -math.inf if self.low is None else self.low
        hi = math.inf if self.high is None else self.high
        if lo > hi:
            raise ValueError(f"low ({self.low}) must not exceed high ({self.high})")
        if not lo <= self.mean <= hi:
            raise ValueError(f"mean ({self.mean}) must lie within [low, high] = [{self.low}, {self.high}]")
        return self

    @property
    def lo(self) -> float:
        """The lower truncation bound (-inf if none)."""
        return -math.inf if self.low is None else self.low

    @property
    def hi(self) -> float:
        """The upper truncation bound (+inf if none)."""
        return math.inf if self.high is None else self.high


def _within(name: str, dist: Dist, low: float, high: float, unit: str, *, low_open: bool = True) -> Dist:
    """Refuse a distribution whose values can leave (low, high] ([low, high] if not ``low_open``): its mean when
    std is 0, else its whole support [low, high] (which must then be given)."""
    lo, hi = (dist.mean, dist.mean) if dist.std == 0 else (dist.lo, dist.hi)
    if not ((low < lo) if low_open else (low <= lo)) or not hi <= high:
        interval = f"{'(' if low_open else '['}{low:g}, {high:g}] {unit}"
        raise ValueError(
            f"{name} must lie in {interval}: give a mean in it and, with std > 0, low and high in it; "
            f"got mean={dist.mean:g}, std={dist.std:g}, low={dist.low}, high={dist.high}"
        )
    return dist


class Lane(_Strict):
    """One lane: where it starts and ends along the road, in metres."""

    start_m: Finite = Field(0.0, ge=0.0)
    end_m: Finite | None = None
    """Where the lane ends; omitted means at the end of the road."""


class Road(_Strict):
    """A straight carriageway of parallel lanes, numbered from the right."""

    length_m: Finite = Field(gt=50.0, le=20000.0)
    lane_width_m: Finite = Field(3.6, ge=2.5, le=5.0)
    speed_limit_mps: Finite = Field(gt=0.0, le=60.0)
    lanes: tuple[Lane, ...] = Field(min_length=1, max_length=6)

    @model_validator(mode="after")
    def _check_lanes(self) -> Road:
        for i, lane in enumerate(self.lanes):
            end = self.length_m if lane.end_m is None else lane.end_m
            if not 0.0 <= lane.start_m < end <= self.length_m:
                raise ValueError(
                    f"lanes[{i}] must satisfy 0 <= start_m < end_m <= length_m ({self.length_m}), "
                    f"got start_m={lane.start_m}, end_m={end}"
                )
        return self

    @property
    def num_lanes(self) -> int:
        """Number of lanes."""
        return len(self.lanes)

    @property
    def width_m(self) -> float:
        """Width of the road (all lanes), m."""
        return self.num_lanes * self.lane_width_m

    def lane_bounds_m(self) -> list[tuple[float, float]]:
        """(start, end) of every lane in metres, ends filled in."""
        return [(ln.start_m, self.length_m if ln.end_m is None else ln.end_m) for ln in self.lanes]


class PlacedVehicle(_Strict):
    """A vehicle put at a chosen place at the start, relative to the ego (for cut-ins and similar set-ups)."""

    lane: Int = Field(ge=0)
    offset_m: Finite = Field(ge=-500.0, le=500.0)
    """Longitudinal position of its centre relative to the ego's centre."""
    speed_mps: Finite = Field(ge=0.0, le=60.0)
    desired_speed_mps: Finite | None = Field(None, gt=0.0, le=60.0)
    time_headway_s: Finite | None = Field(None, gt=0.0, le=10.0)
    politeness: Finite | None = Field(None, ge=-1.0, le=2.0)
    change_threshold_mps2: Finite | None = Field(None, ge=0.0, le=5.0)
    length_m: Finite = Field(4.7, gt=2.0, le=25.0)
    width_m: Finite = Field(1.85, gt=1.0, le=3.0)


class Traffic(_Strict):
    """How much traffic there is and where it comes from.

    The engine simulates a stretch of road that travels with the ego, from ``window_behind_m`` behind it to
    ``window_ahead_m`` ahead. Vehicles that leave the stretch are removed; new ones enter at its ends (faster ones
    from behind, slower ones from ahead) to hold each lane's density, as long as a free slot exists.
    """

    max_vehicles: Int = Field(16, ge=2, le=256)
    """Vehicle slots per scene, the ego included."""
    density_veh_per_km: tuple[Finite, ...]
    """Target density of each lane, vehicles per km (one value per lane)."""
    window_behind_m: Finite = Field(80.0, ge=10.0, le=2000.0)
    window_ahead_m: Finite = Field(200.0, ge=20.0, le=5000.0)
    initial_speed_fraction: Finite = Field(0.9, gt=0.0, le=1.2)
    """Starting speed of traffic as a fraction of each driver's desired speed (capped by the equilibrium gap)."""
    length_m: Dist = Dist(mean=4.7, std=0.3, low=3.8, high=5.5)
    width_m: Dist = Dist(mean=1.85, std=0.07, low=1.6, high=2.1)
    placed: tuple[PlacedVehicle, ...] = ()

    @model_validator(mode="after")
    def _check_sizes(self) -> Traffic:
        _within("length_m", self.length_m, 2.0, 25.0, "m")
        _within("width_m", self.width_m, 1.0, 3.0, "m")
        return self

    @field_validator("density_veh_per_km")
    @classmethod
    def _check_density(cls, value: tuple[float, ...]) -> tuple[float, ...]:
        for i, d in enumerate(value):
            if not 0.0 <= d <= 150.0:
                raise ValueError(f"density_veh_per_km[{i}] must lie in [0, 150] vehicles per km, got {d}")
        return value


# Ranges of each trait (lower end excluded unless noted): the highest speed any field takes, then wide margins
# around the highway values of the built-in scenarios (common practice, no source). They keep every value
# physical, so no draw can make the simulator's arithmetic overflow.
_TRAIT_RANGES = {
    "desired_speed_mps": (0.0, 60.0, "m/s"),
    "time_headway_s": (0.0, 10.0, "s"),
    "min_gap_m": (0.0, 50.0, "m"),
    "max_accel_mps2": (0.0, 10.0, "m/s^2"),
    "comfort_decel_mps2": (0.0, 10.0, "m/s^2"),
    # MOBIL's safety limit only gates decisions (no motion uses it): a very high limit is a driver who does not
    # check the mirror before changing lane (scenarios/short-gap-cut-in.yaml).
    "safe_decel_mps2": (0.0, 1000.0, "m/s^2"),
    "hard_brake_decel_mps2": (0.0, 15.0, "m/s^2"),
    "hard_brake_duration_s": (0.0, 60.0, "s"),
}
_CLOSED_TRAIT_RANGES = {  # lower end included
    "politeness": (-1.0, 2.0, "(1)"),
    "change_threshold_mps2": (0.0, 5.0, "m/s^2"),
    "yield_prob": (0.0, 1.0, "(probability)"),
}


class Drivers(_Strict):
    """Distributions of the hidden traits drawn for every traffic driver, and of their random events.

    IDM traits: desired speed v0, time headway T, minimum gap s0, maximum acceleration a, comfortable
    deceleration b (Treiber, Hennecke, Helbing 2000; docs/references.md#treiber-2000-idm). MOBIL traits:
    politeness p, change threshold, safe braking b_safe (Kesting, Treiber, Helbing 2007;
    docs/references.md#kesting-2007-mobil). The decisive choices are random *events* drawn when an
    interaction begins: whether a driver yields to a vehicle merging in beside it, and when a driver brakes hard.
    """

    desired_speed_mps: Dist
    time_headway_s: Dist = Dist(mean=1.2, std=0.25, low=0.6, high=2.5)
    min_gap_m: Dist = Dist(mean=2.0, std=0.3, low=1.0, high=4.0)
    max_accel_mps2: Dist = Dist(mean=1.2, std=0.2, low=0.5, high=2.5)
    comfort_decel_mps2: Dist = Dist(mean=1.8, std=0.3, low=1.0, high=3.5)
    politeness: Dist = Dist(mean=0.2, std=0.1, low=0.0, high=1.0)
    change_threshold_mps2: Dist = Dist(mean=0.2, std=0.0, low=0.0, high=2.0)
    safe_decel_mps2: Dist = Dist(mean=4.0, std=0.0, low=1.0, high=9.0)
    yield_prob: Dist = Dist(mean=0.5, std=0.0, low=0.0, high=1.0)
    """Probability that a driver yields to a vehicle merging into its lane, drawn per driver."""
    hard_brake_rate_per_min: Finite = Field(0.0, ge=0.0, le=60.0)
    """Rate of hard-braking events per driver and minute of driving."""
    hard_brake_decel_mps2: Dist = Dist(mean=5.0, std=1.0, low=2.0, high=8.0)
    hard_brake_duration_s: Dist = Dist(mean=1.5, std=0.5, low=0.3, high=4.0)
    lane_change_duration_s: Finite = Field(3.0, ge=1.0, le=8.0)
    """Time a traffic vehicle takes to move across one lane."""
    merge_zone_m: Finite = Field(250.0, ge=10.0, le=2000.0)
    """Distance before the end of its lane within which a driver must change lanes."""
    yield_window_m: Finite = Field(40.0, ge=5.0, le=200.0)
    """A driver considers yielding to a merging vehicle at most this far ahead of it."""

    @model_validator(mode="after")
    def _trait_ranges(self) -> Drivers:
        for name, (low, high, unit) in _TRAIT_RANGES.items():
            _within(name, getattr(self, name), low, high, unit)
        for name, (low, high, unit) in _CLOSED_TRAIT_RANGES.items():
            _within(name, getattr(self, name), low, high, unit, low_open=False)
        return self


class Goal(_Strict):
    """The ego succeeds when its centre passes ``x_m`` in one of ``lanes``."""

    x_m: Finite = Field(gt=0.0)
    lanes: tuple[Int, ...] = Field(min_length=1)


class Ego(_Strict):
    """The ego vehicle, driven by the planner: where it starts, its size and its goal."""

    lane: Int = Field(ge=0)
    x_m: Finite = Field(ge=0.0)
    speed_mps: Finite = Field(ge=0.0, le=60.0)
    length_m: Finite = Field(4.7, gt=2.0, le=25.0)
    width_m: Finite = Field(1.85, gt=1.0, le=3.0)
    wheelbase_m: Finite = Field(2.8, gt=1.0, le=10.0)
    rear_axle_to_cg_m: Finite | None = Field(None, gt=0.0)
    """Distance l_r from the rear axle to the centre of gravity; omitted means half the wheelbase."""
    goal: Goal

    @property
    def l_r_m(self) -> float:
        """Distance from the rear axle to the centre of gravity, m (half the wheelbase unless given)."""
        return self.wheelbase_m / 2 if self.rear_axle_to_cg_m is None else self.rear_axle_to_cg_m


class Limits(_Strict):
    """Physical limits of the ego's actuators; actions are clipped to them."""

    max_accel_mps2: Finite = Field(3.0, gt=0.0, le=10.0)
    max_brake_mps2: Finite = Field(8.0, gt=0.0, le=12.0)
    max_steer_rad: Finite = Field(0.5, gt=0.0, le=1.2)
    max_steer_rate_radps: Finite = Field(0.6, gt=0.0, le=5.0)


class Scenario(_Strict):
    """One traffic situation, as read from a scenario file."""

    name: str = Field(min_length=1, max_length=64, pattern=r"^[a-z0-9][a-z0-9-]*$")
    description: str = ""
    dt_s: Finite = Field(0.1, ge=0.01, le=0.5)
    """Simulator step; at least 0.01 s, so that an episode has at most 60,000 steps."""
    duration_s: Finite = Field(20.0, gt=0.0, le=600.0)
    road: Road
    traffic: Traffic
    drivers: Drivers
    ego: Ego
    limits: Limits = Limits()

    @model_validator(mode="after")
    def _cross_checks(self) -> Scenario:
        n = self.road.num_lanes
        if len(self.traffic.density_veh_per_km) != n:
            raise ValueError(
                f"traffic.density_veh_per_km has {len(self.traffic.density_veh_per_km)} values but the road has "
                f"{n} lanes; give one density per lane"
            )
        if self.ego.lane >= n:
            raise ValueError(f"ego.lane must be < {n} (the road's lane count), got {self.ego.lane}")
        for lane in self.ego.goal.lanes:
            if not 0 <= lane < n:
                raise ValueError(f"ego.goal.lanes must hold lane numbers in [0, {n - 1}], got {lane}")
        for i, pv in enumerate(self.traffic.placed):
            if pv.lane >= n:
                raise ValueError(f"traffic.placed[{i}].lane must be < {n}, got {pv.lane}")
        start, end = self.road.lane_bounds_m()[self.ego.lane]
        if not start <= self.ego.x_m < end:
            raise ValueError(f"ego.x_m ({self.ego.x_m}) must lie on lane {self.ego.lane}, which spans [{start}, {end})")
        if self.ego.goal.x_m > self.road.length_m:
            raise ValueError(f"ego.goal.x_m ({self.ego.goal.x_m}) must not exceed road.length_m ({self.road.length_m})")
        if self.traffic.max_vehicles < 1 + len(self.traffic.placed):
            raise ValueError("traffic.max_vehicles must leave room for the ego and every placed vehicle")
        return self

    @property
    def num_steps(self) -> int:
        """Simulator steps in the scenario's duration."""
        return int(round(self.duration_s / self.dt_s))


Mode = Literal["known", "resampled"]
