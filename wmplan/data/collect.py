"""Rolling out episodes into trajectory arrays, with a mix of behaviour policies for the ego.

So that a forward model sees the ego do many different things, each episode drives the ego with one of:

* ``rules``: the rule-based driver (IDM + MOBIL + merge rule) with small action noise;
* ``explore``: the rule-based driver's acceleration plus a smooth random (first-order autoregressive) offset of
  about 1.2 m/s^2, and lane targets that switch at random every few seconds, so that speeds, gaps and lane
  changes cover the action space; on top of it, manoeuvres a planner makes (hard brakings, strong decelerations,
  speed changes, lane changes toward and away from the goal lanes) at random times
  (:mod:`wmplan.data.manoeuvres`), so that the data show how the other drivers react to them.

Every random draw of a policy comes from the counter-based generator keyed by the scene, so an episode is the same
whatever batch it is collected in.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from wmplan import rng
from wmplan.data.manoeuvres import Manoeuvres
from wmplan.sim.ego_rules import rule_actions, steer_to_lane
from wmplan.sim.engine import step
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO, TrafficState

POLICIES = ("rules", "explore")
EXPLORE_ACCEL_STD_MPS2 = 1.2
EXPLORE_ACCEL_CORR = 0.9  # per decision step (0.2 s): a correlation time of about 2 s
EXPLORE_LANE_SWITCH_PER_S = 0.2
RULES_ACCEL_NOISE_MPS2 = 0.3
STEER_NOISE_RAD = 0.005


@dataclass(frozen=True, eq=False)
class Trajectories:
    """Recorded episodes; E episodes, T decision steps, V slots, F vehicle features.

    Attributes:
        vehicles: (E, T + 1, V, F) float32 world-frame rows at each recorded time.
        vehicle_id: (E, T + 1, V) int32 identities (a reused slot gets a new id).
        actions: (E, T, 2) float32 ego action held over each decision step.
        alive: (E, T + 1) bool, the ego had not collided or left the road yet.
        collided, offroad, reached_goal: (E,) bool outcomes at the end.
        policy: (E,) int8 index into ``POLICIES``.
        seeds: (E,) int64 scene seed of each episode.
    """

    vehicles: np.ndarray
    vehicle_id: np.ndarray
    actions: np.ndarray
    alive: np.ndarray
    collided: np.ndarray
    offroad: np.ndarray
    reached_goal: np.ndarray
    policy: np.ndarray
    seeds: np.ndarray

    ARRAYS = ("vehicles", "vehicle_id", "actions", "alive", "collided", "offroad", "reached_goal", "policy", "seeds")

    @property
    def num_episodes(self) -> int:
        """Episodes held (the first axis of every array)."""
        return int(self.vehicles.shape[0])

    def as_dict(self) -> dict[str, np.ndarray]:
        """The arrays by name (``ARRAYS``), as stored on disk."""
        return {name: getattr(self, name) for name in self.ARRAYS}

    @staticmethod
    def concat(parts: list[Trajectories]) -> Trajectories:
        """The episodes of several parts, in order."""
        return Trajectories(**{n: np.concatenate([getattr(p, n) for p in parts]) for n in Trajectories.ARRAYS})


def episode_seeds(seed: int, num_episodes: int) -> np.ndarray:
    """Scene seeds of a dataset's episodes, derived from one dataset seed."""
    return np.random.SeedSequence(int(seed)).generate_state(num_episodes, dtype=np.uint32).astype(np.int64)


class BehaviourPolicy:
    """The mixed behaviour policy for a batch of scenes (stateful: it keeps the random offset and lane targets)."""

    def __init__(self, params: SimParams, state: TrafficState, policy_idx: np.ndarray, *, manoeuvres: bool = True):
        """``manoeuvres``: whether ``explore`` scenes also run the manoeuvres of :mod:`wmplan.data.manoeuvres`."""
        self.params = params
        self.policy_idx = np.asarray(policy_idx)
        self.key = state.key.copy()
        self.offset = np.zeros(state.num_scenes)
        self.target_lane = params.lane_of(state.y_m[:, EGO])
        explore = (self.policy_idx == POLICIES.index("explore")) & bool(manoeuvres)
        self.manoeuvres = Manoeuvres(self.key, explore)

    def __call__(self, state: TrafficState, decision_idx: int, decision_dt_s: float) -> np.ndarray:
        """Actions (S, 2) at one decision: the rule actions perturbed by this policy's counter-based draws."""
        p = self.params
        base = rule_actions(state, p)
        z = rng.normal(self.key, rng.STREAM_POLICY, decision_idx, 1)
        zs = rng.normal(self.key, rng.STREAM_POLICY, decision_idx, 2)
        explore = self.policy_idx == POLICIES.index("explore")
        # smooth random acceleration offset (AR(1) process)
        self.offset = EXPLORE_ACCEL_CORR * self.offset + np.sqrt(1 - EXPLORE_ACCEL_CORR**2) * EXPLORE_ACCEL_STD_MPS2 * z
        accel = base[:, 0] + np.where(explore, self.offset, RULES_ACCEL_NOISE_MPS2 * z)
        self.manoeuvres.draw(decision_idx, decision_dt_s, state, p)
        forced = self.manoeuvres.accel(base[:, 0], state.ego_speed_mps)
        accel = np.where(np.isnan(forced), accel, forced)
        # explore: switch to a random existing neighbouring lane now and then, unless a merge forces the lane
        u_switch = rng.uniform(self.key, rng.STREAM_POLICY, decision_idx, 3)
        u_dir = rng.uniform(self.key, rng.STREAM_POLICY, decision_idx, 4)
        x = state.x_m[:, EGO]
        lane_now = p.lane_of(state.y_m[:, EGO])
        proposal = lane_now + np.where(u_dir < 0.5, -1, 1)
        ok = p.lane_exists(proposal, x) & p.lane_exists(proposal, x + 60.0)
        switch = explore & ok & (u_switch < EXPLORE_LANE_SWITCH_PER_S * decision_dt_s)
        self.target_lane = np.where(switch, proposal, self.target_lane)
        self.target_lane = self.manoeuvres.target_lane(state, p, self.target_lane)
        self.target_lane = np.where(p.lane_exists(self.target_lane, x + 20.0), self.target_lane, lane_now)
        # a lane that ends soon is left as the rule-based driver would (merges are not explored away)
        must_merge = p.merge_target[lane_now] >= 0
        self.target_lane = np.where(must_merge, lane_now, self.target_lane)
        steer_explore = steer_to_lane(state, p, self.target_lane)
        steer = np.where(explore & ~must_merge, steer_explore, base[:, 1]) + STEER_NOISE_RAD * zs
        accel = np.clip(accel, -p.max_brake_mps2, p.max_accel_mps2)
        steer = np.clip(steer, -p.max_steer_rad, p.max_steer_rad)
        return np.stack([accel, steer], axis=-1)


def collect(
    params: SimParams,
    seeds: np.ndarray,
    *,
    policy_mix: float = 0.5,
    decision_every: int = 2,
    manoeuvres: bool = True,
    progress: Callable[[int], None] | None = None,
    on_decision: Callable[[int, TrafficState], None] | None = None,
) -> Trajectories:
    """Run one batch of episodes (one per seed) with the mixed behaviour policy and record them.

    Args:
        params: the scenario's arrays.
        seeds: (E,) scene seeds.
        policy_mix: probability that an episode uses the ``explore`` policy rather than ``rules``.
        decision_every: simulator steps per decision (and per recorded time step); 2 gives 0.2 s at dt 0.1 s.
        manoeuvres: whether ``explore`` episodes also run the planner's manoeuvres (:mod:`wmplan.data.manoeuvres`);
            False gives the exploring policy without them.
        progress: called with the number of decision steps done since the last call.
        on_decision: called with (decision index t, state) before each decision's action is applied; the state
            matches the recorded rows ``vehicles[:, t]`` (snapshots for the oracle are taken this way).

    Returns:
        The recorded :class:`Trajectories`.
    """
    if not 0.0 <= policy_mix <= 1.0:
        raise ValueError(f"policy_mix must lie in [0, 1], got {policy_mix}")
    seeds = np.asarray(seeds, dtype=np.int64)
    state = initial_state(params, seeds)
    u_pol = rng.uniform(state.key, rng.STREAM_POLICY, 0xB0)
    policy_idx = np.where(u_pol < policy_mix, POLICIES.index("explore"), POLICIES.index("rules")).astype(np.int8)
    policy = BehaviourPolicy(params, state, policy_idx, manoeuvres=manoeuvres)
    num_decisions = params.num_steps // decision_every
    e_n, v_n = state.num_scenes, state.num_vehicles
    vehicles = np.empty((e_n, num_decisions + 1, v_n, 8), dtype=np.float32)
    ids = np.empty((e_n, num_decisions + 1, v_n), dtype=np.int32)
    actions = np.empty((e_n, num_decisions, 2), dtype=np.float32)
    alive = np.empty((e_n, num_decisions + 1), dtype=bool)
    vehicles[:, 0], ids[:, 0], alive[:, 0] = state.vehicles(), state.vehicle_id, True
    for t in range(num_decisions):
        if on_decision is not None:
            on_decision(t, state)
        act = policy(state, t, decision_every * params.dt_s)
        applied = np.zeros_like(act)
        for _ in range(decision_every):
            state, info = step(state, act, params)
            applied += np.stack([info.accel_mps2[:, EGO], info.steer_rad], axis=-1)
        actions[:, t] = applied / decision_every  # what the ego actually did, after clipping
        vehicles[:, t + 1] = state.vehicles()
        ids[:, t + 1] = state.vehicle_id
        alive[:, t + 1] = ~(state.collided | state.offroad)
        if progress is not None:
            progress(1)
    return Trajectories(
        vehicles=vehicles,
        vehicle_id=ids,
        actions=actions,
        alive=alive,
        collided=state.collided.copy(),
        offroad=state.offroad.copy(),
        reached_goal=state.reached_goal.copy(),
        policy=policy_idx,
        seeds=seeds,
    )
