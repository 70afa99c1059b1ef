"""Manoeuvres of the exploring behaviour policy: the decisions a planner makes, drawn at random.

A forward model learns how the other drivers react to the ego only from what the ego did in its data. The
sampling planner brakes hard (its fixed candidates brake firmly and as hard as the limits allow), decelerates
strongly, changes speed and changes lane toward or away from the goal lanes; a data set driven by a smooth random
offset around the rule-based driver almost never shows the first two. So, on top of that offset, every ``explore``
episode starts manoeuvres at random times (a Poisson process of ``MANOEUVRE_RATE_PER_S`` while none is running,
``FOLLOWER_NEAR_RATE_FACTOR`` times that while a vehicle is close behind the ego in its lane):

==================  ===================================================================================
kind                what the ego does
==================  ===================================================================================
``hard-brake``      brakes at U(0.8, 1) x its braking limit for U(0.6, 3) s, whatever is ahead
``decelerate``      brakes at U(0.4, 0.8) x its braking limit for U(1, 3) s
``speed-change``    steers its speed toward its speed now -/+ U(3, 8) m/s for U(2, 5) s (gain 0.6 /s,
                    a speed-up never harder than the rule-based driver's acceleration + 1 m/s^2)
``lane-change``     targets the neighbouring lane toward the nearest goal lane (half of the time, when not in
                    one) or away from it (else; a random neighbour when in a goal lane), if it exists 60 m on
==================  ===================================================================================

The kinds are drawn with probabilities ``KIND_PROBS``. Every draw comes from the counter-based generator keyed by
the scene (:mod:`wmplan.rng`, stream ``STREAM_POLICY``, counters of their own), so an episode is the same in any
batch. :func:`manoeuvre_shares` says how many training windows contain such manoeuvres, from the recorded data.
"""

from __future__ import annotations

import numpy as np

from wmplan import rng
from wmplan.sim.features import F_LENGTH, F_VALID, F_VX, F_VY, F_X, F_Y
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState

KINDS = ("hard-brake", "decelerate", "speed-change", "lane-change")
KIND_PROBS = (0.35, 0.25, 0.2, 0.2)
MANOEUVRE_RATE_PER_S = 0.2
FOLLOWER_NEAR_RATE_FACTOR = 3.0
"""The start rate is this many times higher while a vehicle is within ``FOLLOWER_NEAR_M`` behind the ego in its
lane: the situations in which the follower's reaction matters to the planner."""
HARD_BRAKE_SHARE = (0.8, 1.0)
HARD_BRAKE_S = (0.6, 3.0)
DECEL_SHARE = (0.4, 0.8)
DECEL_S = (1.0, 3.0)
SPEED_STEP_MPS = (3.0, 8.0)
SPEED_CHANGE_S = (2.0, 5.0)
SPEED_GAIN_PER_S = 0.6
SPEED_UP_OVER_RULES_MPS2 = 1.0
TOWARD_GOAL_PROB = 0.5
LANE_CHECK_AHEAD_M = 60.0

# counters of the draws (the fourth counter of rng.uniform after key, stream, decision); the behaviour policy uses
# 1 to 4, the episode's policy choice 0xB0
_C_START, _C_KIND, _C_LEVEL, _C_LENGTH, _C_SIGN = 0x20, 0x21, 0x22, 0x23, 0x24

# What counts as a manoeuvre in recorded data (manoeuvre_shares): thresholds on the ego's applied actions and path
HARD_BRAKE_DETECT_SHARE = 0.75
"""A window's future holds a hard braking if the ego's acceleration reaches this share of its braking limit."""
DECEL_DETECT_SHARE = 0.4
SPEED_CHANGE_DETECT_MPS = 3.0
FOLLOWER_NEAR_M = 30.0
"""A follower counts as near within this bumper gap behind the ego in its lane."""


def _between(u: np.ndarray, bounds: tuple[float, float]) -> np.ndarray:
    return bounds[0] + (bounds[1] - bounds[0]) * u


class Manoeuvres:
    """The manoeuvre state of a batch of scenes: which manoeuvre each runs, its level and the steps left."""

    def __init__(self, key: np.ndarray, active: np.ndarray):
        """``key`` (S,) scene keys; ``active`` (S,) bool, the scenes that explore (the others never start one)."""
        self.key = np.asarray(key)
        self.active = np.asarray(active, dtype=bool)
        n = len(self.key)
        self.kind = np.full(n, -1, dtype=np.int64)
        self.level = np.zeros(n)
        self.steps_left = np.zeros(n, dtype=np.int64)

    def draw(self, decision_idx: int, decision_dt_s: float, state: TrafficState, params: SimParams) -> np.ndarray:
        """Start new manoeuvres where none runs; return the (S,) kind index now running (-1 none).

        Lane changes are done at once (their target lane is read by :meth:`target_lane`), so they never run."""
        draw = {c: rng.uniform(self.key, rng.STREAM_POLICY, decision_idx, c) for c in (_C_START, _C_KIND)}
        idle = self.active & (self.steps_left <= 0)
        self.kind = np.where(self.steps_left > 0, self.kind, -1)
        near = follower_gap_m(state.vehicles(), params) <= FOLLOWER_NEAR_M
        rate = MANOEUVRE_RATE_PER_S * np.where(near, FOLLOWER_NEAR_RATE_FACTOR, 1.0)
        start = idle & (draw[_C_START] < rate * decision_dt_s)
        kind = np.searchsorted(np.cumsum(KIND_PROBS), draw[_C_KIND], side="right").clip(0, len(KINDS) - 1)
        u_level = rng.uniform(self.key, rng.STREAM_POLICY, decision_idx, _C_LEVEL)
        u_len = rng.uniform(self.key, rng.STREAM_POLICY, decision_idx, _C_LENGTH)
        u_sign = rng.uniform(self.key, rng.STREAM_POLICY, decision_idx, _C_SIGN)
        v = state.ego_speed_mps
        level = np.select(
            [kind == 0, kind == 1, kind == 2],
            [
                _between(u_level, HARD_BRAKE_SHARE) * params.max_brake_mps2,
                _between(u_level, DECEL_SHARE) * params.max_brake_mps2,
                np.clip(
                    v + np.where(u_sign < 0.5, -1.0, 1.0) * _between(u_level, SPEED_STEP_MPS),
                    0.0,
                    params.speed_limit_mps,
                ),
            ],
            default=u_sign,  # lane change: toward the goal if below TOWARD_GOAL_PROB
        )
        seconds = np.select(
            [kind == 0, kind == 1, kind == 2],
            [_between(u_len, HARD_BRAKE_S), _between(u_len, DECEL_S), _between(u_len, SPEED_CHANGE_S)],
            default=0.0,
        )
        self.kind = np.where(start, kind, self.kind)
        self.level = np.where(start, level, self.level)
        self.steps_left = np.where(start, np.round(seconds / decision_dt_s).astype(np.int64), self.steps_left)
        self._lane_start = start & (kind == KINDS.index("lane-change"))
        return self.kind

    def accel(self, base_accel: np.ndarray, v_mps: np.ndarray) -> np.ndarray:
        """(S,) acceleration of the running manoeuvres, NaN where none sets it; counts one decision down."""
        out = np.full(len(self.key), np.nan)
        brake = (self.kind == 0) | (self.kind == 1)
        out = np.where(brake, -self.level, out)
        speed = self.kind == 2
        toward = SPEED_GAIN_PER_S * (self.level - v_mps)
        toward = np.where(toward > 0, np.minimum(toward, base_accel + SPEED_UP_OVER_RULES_MPS2), toward)
        out = np.where(speed, toward, out)
        running = self.steps_left > 0
        self.steps_left = np.where(running, self.steps_left - 1, 0)
        return np.where(running, out, np.nan)

    def target_lane(self, state: TrafficState, params: SimParams, target: np.ndarray) -> np.ndarray:
        """(S,) lane targets after the lane changes started at this decision (``target`` elsewhere)."""
        x = state.x_m[:, EGO]
        lane = params.lane_of(state.y_m[:, EGO])
        goals = np.flatnonzero(params.goal_lane_mask)
        nearest = goals[np.abs(goals[None, :] - lane[:, None]).argmin(axis=1)] if goals.size else lane
        to_goal = np.sign(nearest - lane)
        away = np.where(to_goal != 0, -to_goal, np.where(self.level < 0.5, -1, 1))
        step = np.where((self.level < TOWARD_GOAL_PROB) & (to_goal != 0), to_goal, away)
        proposal = lane + step
        ok = params.lane_exists(proposal, x) & params.lane_exists(proposal, x + LANE_CHECK_AHEAD_M)
        return np.where(self._lane_start & ok, proposal, target)


def follower_gap_m(vehicles: np.ndarray, params: SimParams) -> np.ndarray:
    """(...,) bumper gap (m) to the nearest valid vehicle behind the ego in its lane (+inf if none), from world
    rows (..., V, F)."""
    ego = vehicles[..., EGO : EGO + 1, :]
    oth = vehicles[..., 1:, :]
    lane_e = params.lane_of(ego[..., F_Y])
    lane_o = params.lane_of(oth[..., F_Y])
    gap = ego[..., F_X] - oth[..., F_X] - 0.5 * (ego[..., F_LENGTH] + oth[..., F_LENGTH])
    mine = (oth[..., F_VALID] > 0.5) & (lane_o == lane_e) & (oth[..., F_X] < ego[..., F_X])
    return np.where(mine, gap, np.inf).min(axis=-1)


def manoeuvre_shares(
    vehicles: np.ndarray, actions: np.ndarray, alive: np.ndarray, params: SimParams, *, history: int, horizon: int
) -> dict[str, float | int]:
    """Shares of the training windows (every anchor whose history and future lie in the episode and whose ego is
    alive to the end, as :func:`wmplan.data.windows.anchor_index` takes them) whose future holds each manoeuvre.

    Args:
        vehicles: (E, T + 1, V, F) world rows; actions: (E, T, 2) applied ego actions; alive: (E, T + 1).
        params: the scenario's arrays (braking limit, lanes).
        history, horizon: W and H of the windows.

    Returns:
        ``windows`` (count) and the shares of windows whose future holds: ``hard_brake`` (acceleration at or
        below ``HARD_BRAKE_DETECT_SHARE`` of the braking limit), ``hard_brake_follower_near`` (the same with a
        vehicle within ``FOLLOWER_NEAR_M`` behind in the ego's lane at the anchor), ``decelerate`` (at or below
        ``DECEL_DETECT_SHARE``), ``lane_change`` (the ego's lane at the end differs from the anchor's),
        ``speed_change`` (its speed changes by ``SPEED_CHANGE_DETECT_MPS`` or more), ``any``.
    """
    e_n, t1 = alive.shape
    ts = np.arange(history - 1, t1 - horizon)
    if ts.size == 0:
        raise ValueError(f"episodes of {t1 - 1} decisions are too short for history {history} + horizon {horizon}")
    ok = alive[:, ts + horizon]  # (E, n)
    acc = actions[..., 0]
    fut = np.stack([acc[:, ts + k] for k in range(horizon)], axis=-1)  # (E, n, H)
    low = fut.min(axis=-1)
    hard = low <= -HARD_BRAKE_DETECT_SHARE * params.max_brake_mps2
    decel = low <= -DECEL_DETECT_SHARE * params.max_brake_mps2
    ego = vehicles[:, :, EGO]
    lane = params.lane_of(ego[..., F_Y])
    lane_change = lane[:, ts + horizon] != lane[:, ts]
    speed = np.hypot(ego[..., F_VX], ego[..., F_VY])
    speed_change = np.abs(speed[:, ts + horizon] - speed[:, ts]) >= SPEED_CHANGE_DETECT_MPS
    near = follower_gap_m(vehicles[:, ts], params) <= FOLLOWER_NEAR_M
    n = int(ok.sum())

    def share(mask: np.ndarray) -> float:
        return float((mask & ok).sum() / max(n, 1))

    return {
        "windows": n,
        "hard_brake": share(hard),
        "hard_brake_follower_near": share(hard & near),
        "decelerate": share(decel),
        "lane_change": share(lane_change),
        "speed_change": share(speed_change),
        "any": share(decel | lane_change | speed_change),
    }
