"""The planner protocol: what every planner of the closed loop is, the built-in ones and anyone's own.

A planner drives the ego of B episodes at once. The closed loop (:mod:`wmplan.evaluate.closed_loop`) calls
``reset`` once per batch with one key per episode, then ``decide`` every ``decision_dt_s`` seconds with an
:class:`Observation` of the episodes still running, and holds the returned actions until the next decision.

A planner may keep state per episode (a warm start, a random generator): ``Observation.rows`` says which of the
episodes given to ``reset`` the B rows of a decision are (finished episodes drop out of the batch). Its random
draws must come from the keys given to ``reset`` so that an episode's result does not depend on the batch it runs
in.

Shapes: B episodes in the decision, W history steps, V vehicle slots (slot 0 is the ego), F world-row features
(:mod:`wmplan.sim.features`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

from wmplan.sim.ego_rules import RULE_DECISION_PERIOD_S, rule_actions
from wmplan.sim.params import SimParams
from wmplan.sim.state import TrafficState

HISTORY_STEPS = 5
"""Decisions of world rows an observation carries (the newest is the current one), unless a planner asks for
another number with a ``history_steps`` attribute."""


@dataclass(frozen=True, eq=False)
class Observation:
    """What a planner sees at one decision, for B episodes.

    Attributes:
        params: the scenario laid out as arrays (road, limits, goal); with scenario variants in one batch, the
            first variant's (variants share a batch only when they agree on what the planner reads).
        state: the true simulator state of the B episodes (the rule-based ego reads it as a driver with perfect
            perception; :mod:`wmplan.sim.observe` turns it into object lists).
        rows: (B,) int64, which of the episodes given to ``reset`` these are.
        history: (B, W, V, F) float64 world rows at the last W decisions, oldest first; the last is now. Before
            the first decision the past is extrapolated backwards at constant velocity.
        history_ids: (B, W, V) int64 vehicle identities of those rows (-1: empty slot).
        time_s: simulated time of the decision (s since the episode started).
    """

    params: SimParams
    state: TrafficState
    rows: np.ndarray
    history: np.ndarray
    history_ids: np.ndarray
    time_s: float


@dataclass(frozen=True, eq=False)
class Decision:
    """A planner's answer for B episodes.

    Attributes:
        actions: (B, 2) float64 ego commands held until the next decision: acceleration (m/s^2) and front-wheel
            steering angle (rad); the simulator clips them to the ego's limits.
        p_collision: (B,) the planner's predicted probability that the chosen plan collides within
            ``horizon_decisions`` decisions, or None for a planner that predicts no risk (then no calibration
            records are kept).
    """

    actions: np.ndarray
    p_collision: np.ndarray | None = None


@runtime_checkable
class Planner(Protocol):
    """What the closed loop needs of a planner (the built-in ones and plug-ins alike).

    Attributes:
        decision_dt_s: seconds between decisions; a whole multiple of the scenario's time step.
        horizon_decisions: decisions covered by ``Decision.p_collision`` (calibration); any int if it gives none.

    Optional attribute: ``history_steps`` (int, default :data:`HISTORY_STEPS`), the W of ``Observation.history``.
    """

    decision_dt_s: float
    horizon_decisions: int

    def reset(self, episode_keys: np.ndarray) -> None:
        """Start a batch of ``len(episode_keys)`` episodes; ``episode_keys`` (E,) int64 in [0, 2**63) seed each
        episode's random draws (the same key gives the same draws whatever the batch)."""
        ...

    def decide(self, obs: Observation) -> Decision:
        """The actions of the B episodes of ``obs``."""
        ...


PROTOCOL_MEMBERS = ("decision_dt_s", "horizon_decisions", "reset", "decide")


def missing_members(obj: object) -> list[str]:
    """The members of :class:`Planner` that ``obj`` lacks (empty: it satisfies the protocol's shape)."""
    return [
        m
        for m in PROTOCOL_MEMBERS
        if not hasattr(obj, m) or (m in ("reset", "decide") and not callable(getattr(obj, m)))
    ]


class RulePlanner:
    """The rule-based ego as a planner: IDM along its lane, MOBIL lane changes with the safety checks both ways,
    the merge rule and the stop for a lane end (:func:`wmplan.sim.ego_rules.rule_actions`), every 0.2 s.

    It reads the true state and predicts no risk.
    """

    decision_dt_s = RULE_DECISION_PERIOD_S
    horizon_decisions = 1

    def __init__(self, params: SimParams):
        self.params = params

    def reset(self, episode_keys: np.ndarray) -> None:
        """Nothing to remember between decisions."""

    def decide(self, obs: Observation) -> Decision:
        """Rule actions of the B episodes."""
        return Decision(actions=rule_actions(obs.state, obs.params))
