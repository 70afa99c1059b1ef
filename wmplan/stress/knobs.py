"""Scenario knobs: a standard-normal vector z that selects a variant of a scenario.

Stress tests search and integrate over z ~ N(0, I) (the *nominal* distribution). Each knob turns one coordinate
into one scenario value, relative to the base scenario's own value:

================  ===================================  ======  =====  ===============================================
knob              scenario path                        mode    sigma  nominal distribution of the value
================  ===================================  ======  =====  ===============================================
density           traffic.density_veh_per_km           scale   0.30   every lane's density x exp(0.30 z): log-normal,
                                                                      median = the scenario's, x/÷ 1.35 at one sigma
yield_prob        drivers.yield_prob.mean              shift   0.15   mean yield probability + 0.15 z
hard_brake_rate   drivers.hard_brake_rate_per_min      scale   0.80   rate x exp(0.8 z): log-normal, x/÷ 2.2 at one
                                                                      sigma (a scenario with rate 0 stays at 0)
desired_speed     drivers.desired_speed_mps.mean       shift   1.50   mean desired speed + 1.5 z m/s
ego_speed         ego.speed_mps                        shift   2.00   ego start speed + 2.0 z m/s
ego_brake         limits.max_brake_mps2                scale   0.50   the ego's strongest braking x exp(0.5 z):
                                                                      8 m/s^2 (dry road) is 4.9 at -1 sigma (wet),
                                                                      3.0 at -2 (snow), 1.8 at -3 (ice)
================  ===================================  ======  =====  ===============================================

Values are clipped to the schema's range (density [0, 150] veh/km, rates [0, 60] /min, speeds [0, 60] m/s, the
ego's braking [0.5, 12] m/s^2) and a distribution's mean to its own [low, high]. The spreads are this sandbox's
choice of "plausible variation around the scenario", not measurements of real traffic; change them with your own
:class:`Knob` list. The braking spread follows tyre-road friction of roughly 0.8 dry, 0.5 wet, 0.3 on packed snow
and 0.1-0.2 on ice (from memory; common practice, no source); the other drivers' braking is not changed with it.

Resolution: z is rounded to multiples of ``z_step`` (0.25 by default) before it is turned into values, so nearby
samples make the *same* scenario variant and run in one simulator batch. The failure probability under the nominal
distribution is defined with this rounding (a function of z like any other), so importance sampling stays exact.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

from wmplan.errors import ConfigError
from wmplan.scenario import Scenario, parse_scenario, scenario_to_dict
from wmplan.sweep.paths import PathError, get_path, parse_path, set_path


@dataclass(frozen=True)
class Knob:
    """One coordinate of z and the scenario value it sets.

    Attributes:
        name: short name used in reports.
        path: dotted scenario path of a number or a list of numbers (every element is changed alike).
        mode: ``"scale"``: value = base * exp(sigma * z); ``"shift"``: value = base + sigma * z.
        sigma: spread per unit of z (log units for ``scale``, the value's units for ``shift``).
        low, high: clip range of the value.
    """

    name: str
    path: str
    mode: Literal["scale", "shift"]
    sigma: float
    low: float = -math.inf
    high: float = math.inf

    def value(self, base: float, z: float) -> float:
        """The knob's value at standard-normal coordinate ``z`` around ``base``, clipped to [low, high]."""
        raw = base * math.exp(self.sigma * z) if self.mode == "scale" else base + self.sigma * z
        return float(min(max(raw, self.low), self.high))


DEFAULT_KNOBS: tuple[Knob, ...] = (
    Knob("density", "traffic.density_veh_per_km", "scale", 0.30, 0.0, 150.0),
    Knob("yield_prob", "drivers.yield_prob.mean", "shift", 0.15, 0.0, 1.0),
    Knob("hard_brake_rate", "drivers.hard_brake_rate_per_min", "scale", 0.80, 0.0, 60.0),
    Knob("desired_speed", "drivers.desired_speed_mps.mean", "shift", 1.50, 0.5, 60.0),
    Knob("ego_speed", "ego.speed_mps", "shift", 2.00, 0.0, 60.0),
    Knob("ego_brake", "limits.max_brake_mps2", "scale", 0.50, 0.5, 12.0),
)
DEFAULT_Z_STEP = 0.25


def select_knobs(names: str | Sequence[str]) -> tuple[Knob, ...]:
    """The default knobs named (a comma-separated string or a list), in the order given."""
    wanted = [n.strip() for n in names.split(",")] if isinstance(names, str) else [str(n) for n in names]
    by_name = {k.name: k for k in DEFAULT_KNOBS}
    allowed = ", ".join(by_name)
    if not wanted or any(not n for n in wanted):
        raise ConfigError(f"knobs: give one or more of {allowed}, separated by commas")
    for n in wanted:
        if n not in by_name:
            raise ConfigError(f"knobs: unknown knob {n!r}; allowed: {allowed}")
    if len(set(wanted)) != len(wanted):
        raise ConfigError(f"knobs: each knob at most once, got {','.join(wanted)}")
    return tuple(by_name[n] for n in wanted)


def check_knobs(base: Scenario, knobs: Sequence[Knob]) -> None:
    """Refuse knobs whose path is not a number (or list of numbers) of the scenario."""
    data = scenario_to_dict(base)
    names = [k.name for k in knobs]
    if len(set(names)) != len(names):
        raise ConfigError(f"knob names must be distinct, got {names}")
    for knob in knobs:
        try:
            parse_path(knob.path)
            value = get_path(data, knob.path)
        except PathError as err:
            raise ConfigError(f"knob {knob.name}: path {knob.path!r} {err}") from None
        ok = isinstance(value, (int, float)) or (
            isinstance(value, list) and all(isinstance(v, (int, float)) for v in value)
        )
        if isinstance(value, bool) or not ok:
            raise ConfigError(f"knob {knob.name}: {knob.path} must hold a number or a list of numbers, got {value!r}")
        if knob.mode not in ("scale", "shift") or not knob.sigma > 0:
            raise ConfigError(f"knob {knob.name}: mode must be 'scale' or 'shift' and sigma > 0")


def quantise(z: np.ndarray, z_step: float) -> np.ndarray:
    """Round z to multiples of ``z_step`` (the knob resolution); (N, D) -> (N, D)."""
    return np.round(np.asarray(z, dtype=np.float64) / z_step) * z_step


def _mean_bounds(data: dict, path: str) -> tuple[float, float]:
    """A distribution's own [low, high] if ``path`` is its mean, else (-inf, inf)."""
    if not path.endswith(".mean"):
        return -math.inf, math.inf
    parent = get_path(data, path[: -len(".mean")])
    if not isinstance(parent, dict):
        return -math.inf, math.inf
    lo, hi = parent.get("low"), parent.get("high")
    return (-math.inf if lo is None else lo), (math.inf if hi is None else hi)


def knob_values(base: Scenario, knobs: Sequence[Knob], z: np.ndarray) -> dict[str, float | list[float]]:
    """The scenario value each knob sets for one (already rounded) z, (D,)."""
    data = scenario_to_dict(base)
    out: dict[str, float | list[float]] = {}
    for knob, zi in zip(knobs, np.asarray(z, dtype=np.float64), strict=True):
        lo, hi = _mean_bounds(data, knob.path)
        current = get_path(data, knob.path)

        def one(b: float, _k: Knob = knob, _z: float = float(zi), _lo: float = lo, _hi: float = hi) -> float:
            return float(min(max(_k.value(float(b), _z), _lo), _hi))

        out[knob.name] = [one(b) for b in current] if isinstance(current, list) else one(current)
    return out


def variant(base: Scenario, knobs: Sequence[Knob], z: np.ndarray) -> Scenario:
    """The scenario variant of one (already rounded) z, (D,); validated like any scenario."""
    data = scenario_to_dict(base)
    values = knob_values(base, knobs, z)
    for knob in knobs:
        data = set_path(data, knob.path, values[knob.name])
    desc = ", ".join(f"{k.name} z={float(v):+.2f}" for k, v in zip(knobs, z, strict=True))
    return parse_scenario(data, f"{base.name} ({desc})")


def describe_knobs(knobs: Sequence[Knob]) -> list[dict]:
    """The knobs as JSON-ready dicts (infinite bounds as None)."""
    return [
        {
            "name": k.name,
            "path": k.path,
            "mode": k.mode,
            "sigma": k.sigma,
            "low": None if math.isinf(k.low) else k.low,
            "high": None if math.isinf(k.high) else k.high,
        }
        for k in knobs
    ]
