"""Tilted random events, for importance sampling of rare failures inside an episode.

A failure of the ego is usually set off by a few of the simulator's random events: a driver just ahead of the ego
that starts to brake hard, or a driver that does not let the merging ego in. Under the scenario's own (nominal)
probabilities these are rare, so plain Monte Carlo needs many episodes to see a failure. An :class:`EventTilt`
makes exactly these events more likely in the simulation (the proposal distribution) and the engine reports, per
scene and step, the log-likelihood ratio of the draws it made::

    log w = sum over tilted Bernoulli draws of  log f(b) / g(b),
            f(1) = p, f(0) = 1 - p (nominal);  g(1) = q, g(0) = 1 - q (tilted)

so that E_g[H w] = E_f[H] for any failure indicator H of the episode (importance sampling; e.g. Owen, *Monte Carlo
theory, methods and examples*, 2013, ch. 9). Only the draws near the ego are tilted (``radius_m``, common
practice of targeting the events that matter, no source): tilting every driver's events would inflate the
weights' variance with draws that cannot cause a failure.

Events tilted:

* hard-braking starts of traffic drivers whose centre is within ``radius_m`` of the ego's, ahead of it or beside
  it (``dx > -5 m``): probability per step p -> q = min(p * brake_factor, 0.5);
* the yield decision of a driver whose merging partner is the ego: probability of yielding p -> q = p * yield_factor
  (yield_factor < 1 makes refusals more likely).

With the default factors of 1 nothing changes: the draws, the trajectories and the zero log-weights are those of
the nominal simulator.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

MAX_TILTED_PROB = 0.5


@dataclass(frozen=True)
class EventTilt:
    """How much more likely the events near the ego are made (see the module docstring)."""

    brake_factor: float = 1.0
    yield_factor: float = 1.0
    radius_m: float = 60.0

    def __post_init__(self) -> None:
        for name, lo, hi in (("brake_factor", 1.0, 1000.0), ("yield_factor", 0.0, 1.0), ("radius_m", 0.0, 1e4)):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not lo <= v <= hi:
                raise ValueError(f"EventTilt.{name} must be a number in [{lo:g}, {hi:g}], got {v!r}")
        if self.yield_factor <= 0.0:
            raise ValueError(
                "EventTilt.yield_factor must be > 0 (a zero would make yielding impossible, and the "
                "weights of episodes in which a driver yields undefined)"
            )

    @property
    def active(self) -> bool:
        """Whether the tilt changes anything (a factor other than 1)."""
        return self.brake_factor != 1.0 or self.yield_factor != 1.0


def bernoulli_log_ratio(event: np.ndarray, p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """log f(b) / g(b) of Bernoulli draws b = ``event`` with nominal probability p and tilted probability q."""
    with np.errstate(divide="ignore"):
        return np.where(event, np.log(p) - np.log(q), np.log1p(-p) - np.log1p(-q))
