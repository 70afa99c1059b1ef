"""gymnasium environments over the batched engine: :class:`LaneEnv` (one scene) and :class:`LaneVectorEnv` (N scenes
advanced by one ``engine.step`` call).

Both are thin shells: the dynamics, the observations and the reward are the same functions for one scene and for
N (``engine.step``, ``observe.observe``, :func:`step_reward`). Importing this module registers every built-in
scenario as ``wmplan/<CamelCaseName>-v0`` (``onramp-merge`` -> ``wmplan/OnrampMerge-v0``), with both an
``entry_point`` (``gymnasium.make``) and a ``vector_entry_point`` (``gymnasium.make_vec``).

Letters in shapes: N scenes of a vector env, M other vehicles in the object list, F = 8 vehicle features.

Rendering is optional: ``render_mode="rgb_array"`` imports :mod:`wmplan.viz` (matplotlib) lazily, on the first
``render()``; the simulator itself never needs it.

A research sandbox: what an agent learns here is learnt on a simplified traffic model and certifies nothing
about a real vehicle.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.error import ResetNeeded
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from wmplan.errors import ConfigError
from wmplan.scenario import Scenario, builtin_names, load_scenario
from wmplan.sim._jit import jit, kernel_array
from wmplan.sim.engine import Packed, StepInfo, param_table
from wmplan.sim.engine import step as engine_step
from wmplan.sim.features import (
    DEFAULT_NUM_OBJECTS,
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_WIDTH,
    F_X,
    F_Y,
    LANE_END_CAP_M,
    NUM_ROAD_FEATURES,
    NUM_VEHICLE_FEATURES,
)
from wmplan.sim.kernel import E_COLLIDED, E_OFFROAD, E_REACHED, S_EGO_SPEED, S_STEP
from wmplan.sim.kernel import F_H as K_H
from wmplan.sim.kernel import F_LEN as K_LEN
from wmplan.sim.kernel import F_VX as K_VX
from wmplan.sim.kernel import F_VY as K_VY
from wmplan.sim.kernel import F_WID as K_WID
from wmplan.sim.kernel import F_X as K_X
from wmplan.sim.kernel import F_Y as K_Y
from wmplan.sim.observe import _nearest, _object_rows, _road_row, observe
from wmplan.sim.params import T_V0, SimParams
from wmplan.sim.spawn import initial_state
from wmplan.sim.state import EGO, TrafficState

ENV_VERSION = 0
"""The ``-vN`` suffix of the registered ids; bump it when observations, actions or rewards change meaning."""
SCENE_SEED_HIGH = 2**31 - 1
"""Scene seeds drawn from ``np_random`` lie in [0, SCENE_SEED_HIGH)."""
_REMOVAL_MARGIN_M = 10.0  # the engine drops a vehicle once it is this far outside the simulated stretch
_MAX_ABS_NORMAL = 8.6  # |z| of the counter-based Box-Muller normal is < sqrt(-2 ln 2^-53) = 8.57
_SPEED_LIMIT_SPAWN_FACTOR = 1.15  # traffic starts at most this factor above the speed limit (wmplan.sim.spawn)
_PLACED_SPEED_CAP_MPS = 60.0  # schema cap of a placed vehicle's speed and desired speed


# --- reward ---------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RewardConfig:
    """Weights of the reward; an episode driven at the speed limit for the whole duration earns about 1.

    Per step, with duration D = ``scenario.duration_s``, speed limit v_lim and step dt::

        r = progress_weight * min(dx, v_lim dt) / (v_lim D)
            - (accel_weight * (a / comfort_accel_mps2)^2 + steer_weight * (delta / max_steer)^2) * dt / D
            - crash_penalty  [on the step the ego collides or leaves the road]
            + goal_bonus     [on the step the ego reaches its goal]

    dx is the ego's advance along the road in the step (credit capped at the speed limit, so speeding earns
    nothing), a the applied longitudinal acceleration, delta the applied steering angle.
    """

    progress_weight: float = 1.0
    """Weight of progress; the progress term sums to 1 over an episode driven at the speed limit."""
    accel_weight: float = 0.1
    """Weight of the squared acceleration (averaged over the episode)."""
    comfort_accel_mps2: float = 2.0
    """Acceleration that costs ``accel_weight`` per unit time; a comfortable magnitude (common practice)."""
    steer_weight: float = 0.1
    """Weight of the squared steering angle, as a fraction of the maximum (averaged over the episode)."""
    crash_penalty: float = 1.0
    """Subtracted once, on the step of a collision or of leaving the road."""
    goal_bonus: float = 0.5
    """Added once, on the step the goal is reached."""

    def __post_init__(self) -> None:
        for name in ("progress_weight", "accel_weight", "steer_weight", "crash_penalty", "goal_bonus"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value >= 0.0):
                raise ConfigError(f"RewardConfig.{name} must be a finite number >= 0, got {value!r}")
        if not (np.isfinite(self.comfort_accel_mps2) and self.comfort_accel_mps2 > 0.0):
            raise ConfigError(f"RewardConfig.comfort_accel_mps2 must be > 0 m/s^2, got {self.comfort_accel_mps2!r}")


def _reward_constants(params: SimParams, cfg: RewardConfig) -> np.ndarray:
    """The numbers :func:`_rewards` reads, in its order (kept on the config per parameter set)."""
    v_lim, dt, dur = params.speed_limit_mps, params.dt_s, params.num_steps * params.dt_s
    return np.array(
        [
            cfg.progress_weight,
            v_lim * dt,
            v_lim * dur,
            cfg.accel_weight,
            cfg.comfort_accel_mps2,
            cfg.steer_weight,
            params.max_steer_rad,
            dt,
            dur,
            cfg.crash_penalty,
            cfg.goal_bonus,
        ]
    )


@jit
def _reward_of(k, s, vf0, ended0, vf1, ended1, acc, steer):
    """:class:`RewardConfig`'s reward of scene s: packed float fields and outcome flags before (``vf0``,
    ``ended0``) and after (``vf1``, ``ended1``) the step (:class:`~wmplan.sim.engine.Packed` layout), applied
    accelerations (S, V) and steering (S,); ``k`` from :func:`_reward_constants`."""
    dx = vf1[K_X, s, EGO] - vf0[K_X, s, EGO]
    progress = k[0] * (dx if not dx > k[1] else k[1]) / k[2]
    a, d = acc[s, EGO] / k[4], steer[s] / k[6]
    comfort = (k[3] * (a * a) + k[5] * (d * d)) * k[7] / k[8]
    crashed = (ended1[E_COLLIDED, s] or ended1[E_OFFROAD, s]) and not (ended0[E_COLLIDED, s] or ended0[E_OFFROAD, s])
    arrived = ended1[E_REACHED, s] and not ended0[E_REACHED, s]
    return progress - comfort - k[9] * (1.0 if crashed else 0.0) + k[10] * (1.0 if arrived else 0.0)


@jit
def _rewards(k, vf0, ended0, vf1, ended1, acc, steer, out):
    for s in range(out.shape[0]):
        out[s] = _reward_of(k, s, vf0, ended0, vf1, ended1, acc, steer)


@jit
def _env_outputs(sc, ln, k, vf0, ended0, vf1, valid1, ended1, acc, steer, objects, road, slots, reward):
    """Observation (float32 ``objects``, ``road``; :func:`~wmplan.sim.observe.observe`) and reward of every scene
    after a step, in one call (the single environment's hot path)."""
    for s in range(valid1.shape[0]):
        x, y = vf1[K_X, s], vf1[K_Y, s]
        _nearest(x, y, valid1[s], slots[s])
        _object_rows(x, y, vf1[K_VX, s], vf1[K_VY, s], vf1[K_H, s], vf1[K_LEN, s], vf1[K_WID, s], slots[s], objects[s])
        _road_row(sc, ln, x[EGO], y[EGO], road[s])
        reward[s] = _reward_of(k, s, vf0, ended0, vf1, ended1, acc, steer)


def _constants(params: SimParams, cfg: RewardConfig) -> np.ndarray:
    consts = cfg.__dict__.get("_consts")
    if consts is None or consts[0] is not params:
        consts = (params, _reward_constants(params, cfg))
        object.__setattr__(cfg, "_consts", consts)
    return consts[1]


def step_reward(
    params: SimParams, cfg: RewardConfig, before: TrafficState, after: TrafficState, info: StepInfo
) -> np.ndarray:
    """Reward (N,) of one engine step of N scenes, as :class:`RewardConfig` defines it (compiled)."""
    pb, pa = Packed.of(before), Packed.of(after)
    out = np.empty(before.num_scenes)
    _rewards(
        _constants(params, cfg),
        pb.vf,
        pb.ended,
        pa.vf,
        pa.ended,
        kernel_array(info.accel_mps2, np.float64),
        kernel_array(info.steer_rad, np.float64),
        out,
    )
    return out


# --- spaces ---------------------------------------------------------------------------------------------------------


def _dist_cap(spec: tuple[float, float, float, float]) -> float:
    """Largest value a truncated normal of wmplan's counter-based generator can take."""
    mean, std, _, hi = spec
    return float(min(hi, mean + _MAX_ABS_NORMAL * std))


def observation_bounds(
    params: SimParams, num_objects: int = DEFAULT_NUM_OBJECTS
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Finite (low, high) of every observation entry, derived from the scenario (see :class:`LaneEnv`).

    * Positions: every valid vehicle lies within ``max(window_behind_m, window_ahead_m, |placed offsets|) + 10 m``
      of the ego along the road (the engine drops vehicles 10 m outside the simulated stretch) and within the
      road's width plus the ego's largest sideways excursion in one step across it; rotated into the ego's
      frame, each coordinate is at most the length of that reach vector.
    * Velocities: traffic never drives faster than the largest of its desired speed, its starting speed (at most
      1.15 x the speed limit or a placed vehicle's 60 m/s) and its sideways lane-change speed; the ego at most its
      start speed plus ``max_accel_mps2 * duration_s``. Rotation mixes x and y, so both get the larger bound.
    * Empty rows are all zero, so length, width and valid start at 0.

    Returns:
        ``{"objects": (low, high) each (1 + M, 8), "road": (low, high) each (6,)}``, float32.
    """
    scn = params.scenario
    reach_x = (
        max(params.window_behind_m, params.window_ahead_m, *(abs(pv.offset_m) for pv in scn.traffic.placed))
        + _REMOVAL_MARGIN_M
    )
    v_ego = scn.ego.speed_mps + params.max_accel_mps2 * params.num_steps * params.dt_s
    excursion = v_ego * params.dt_s + 1.0
    reach = float(np.hypot(reach_x, params.road_width_m + excursion)) + 1.0
    v0_cap = float(min(params.trait_hi[T_V0], params.trait_mean[T_V0] + _MAX_ABS_NORMAL * params.trait_std[T_V0]))
    v_traffic = max(v0_cap, _SPEED_LIMIT_SPAWN_FACTOR * params.speed_limit_mps, _PLACED_SPEED_CAP_MPS)
    v_lateral = 1.5 * params.lane_change_speed_mps
    v_cap = 1.05 * max(float(np.hypot(v_traffic, v_lateral)), v_ego) + 1.0
    length_cap = max(25.0, params.ego_length_m, _dist_cap(params.length_dist))
    width_cap = max(3.0, params.ego_width_m, _dist_cap(params.width_dist))
    row_lo = np.zeros(NUM_VEHICLE_FEATURES)
    row_hi = np.zeros(NUM_VEHICLE_FEATURES)
    row_lo[[F_X, F_Y]], row_hi[[F_X, F_Y]] = -reach, reach
    row_lo[[F_VX, F_VY]], row_hi[[F_VX, F_VY]] = -v_cap, v_cap
    row_lo[F_HEADING], row_hi[F_HEADING] = -np.pi, np.pi
    row_hi[F_LENGTH], row_hi[F_WIDTH], row_hi[F_VALID] = length_cap, width_cap, 1.0
    rows = 1 + num_objects
    lanes_cap = float(max(params.num_lanes - 1, 1))  # a one-lane road keeps a non-degenerate box
    offset_cap = 0.5 * params.lane_width_m + excursion
    road_lo = np.array([-offset_cap, 0.0, 0.0, 0.0, 0.0, 0.0])
    road_hi = np.array([offset_cap, LANE_END_CAP_M, lanes_cap, lanes_cap, LANE_END_CAP_M, LANE_END_CAP_M])
    assert road_lo.shape == (NUM_ROAD_FEATURES,)
    f32 = np.float32
    return {
        "objects": (np.tile(row_lo, (rows, 1)).astype(f32), np.tile(row_hi, (rows, 1)).astype(f32)),
        "road": (road_lo.astype(f32), road_hi.astype(f32)),
    }


def observation_space(params: SimParams, num_objects: int = DEFAULT_NUM_OBJECTS) -> spaces.Dict:
    """The Dict space ``{"objects": Box((1 + M, 8)), "road": Box((6,))}`` of one scene, float32."""
    b = observation_bounds(params, num_objects)
    return spaces.Dict({name: spaces.Box(low=lo, high=hi, dtype=np.float32) for name, (lo, hi) in b.items()})


def action_space(params: SimParams, normalized_actions: bool = False) -> spaces.Box:
    """Box of one scene's action (accel_mps2, steer_rad), float32; [-1, 1]^2 if ``normalized_actions``."""
    if normalized_actions:
        return spaces.Box(low=-1.0, high=1.0, shape=(2,), dtype=np.float32)
    return spaces.Box(
        low=np.array([-params.max_brake_mps2, -params.max_steer_rad], dtype=np.float32),
        high=np.array([params.max_accel_mps2, params.max_steer_rad], dtype=np.float32),
        dtype=np.float32,
    )


def to_physical(actions: np.ndarray, params: SimParams) -> np.ndarray:
    """Map normalised actions (..., 2) in [-1, 1] to (accel_mps2, steer_rad): 1 is full throttle, -1 full braking,
    +-1 full steering to the left / right (values outside [-1, 1] are clipped)."""
    a = np.clip(np.asarray(actions, dtype=np.float64), -1.0, 1.0)
    accel = np.where(a[..., 0] >= 0.0, a[..., 0] * params.max_accel_mps2, a[..., 0] * params.max_brake_mps2)
    return np.stack([accel, a[..., 1] * params.max_steer_rad], axis=-1)


# --- shared by both envs ----------------------------------------------------------------------------------------------


def _resolve_scenario(scenario: str | Path | Scenario) -> Scenario:
    if isinstance(scenario, Scenario):
        return scenario
    if isinstance(scenario, (str, Path)):
        return load_scenario(scenario)
    raise ConfigError(f"scenario must be a built-in name, a YAML path or a Scenario, got {type(scenario).__name__}")


def _check_num_objects(num_objects: int) -> int:
    if isinstance(num_objects, bool) or not isinstance(num_objects, (int, np.integer)) or num_objects < 1:
        raise ConfigError(f"num_objects must be an integer >= 1, got {num_objects!r}")
    return int(num_objects)


def _check_render_mode(render_mode: str | None, modes: list[str]) -> str | None:
    if render_mode is not None and render_mode not in modes:
        raise ConfigError(f"render_mode must be None or one of {modes}, got {render_mode!r}")
    return render_mode


def _observation(state: TrafficState, params: SimParams, num_objects: int) -> dict[str, np.ndarray]:
    objects, road, _ = observe(state, params, num_objects, dtype=np.float32)
    return {"objects": objects, "road": road}


def _check_actions(actions: Any, shape: tuple[int, ...], where: str) -> np.ndarray:
    arr = np.asarray(actions, dtype=np.float64)
    if arr.shape != shape:
        raise ConfigError(f"{where}: action must have shape {shape} (accel_mps2, steer_rad), got {arr.shape}")
    finite = all(map(math.isfinite, arr.tolist())) if arr.ndim == 1 else bool(np.isfinite(arr).all())
    if not finite:
        raise ConfigError(f"{where}: action holds NaN or inf ({arr.tolist()}); pass finite numbers")
    return arr


def _frame_title(params: SimParams, state: TrafficState, idx: int) -> str:
    events = [
        w
        for flag, w in (
            (state.collided, "collision"),
            (state.offroad, "off the road"),
            (state.reached_goal, "goal reached"),
        )
        if flag[idx]
    ]
    tail = ("   — " + ", ".join(events)) if events else ""
    return (
        f"{params.scenario.name}   t = {state.step[idx] * params.dt_s:4.1f} s   "
        f"ego {state.ego_speed_mps[idx]:4.1f} m/s{tail}"
    )


def _make_renderer(params: SimParams):
    from wmplan.viz.scene import SceneRenderer  # lazy: only rendering needs matplotlib

    return SceneRenderer(params, width_px=800)


# --- the single env ---------------------------------------------------------------------------------------------------


class LaneEnv(gym.Env):
    """One scenario of the wmplan lane-traffic simulator, with the ego under the agent's control.

    ## Description

    A straight multi-lane road whose lanes may start and end (on-ramps, lane drops). Traffic follows the
    Intelligent Driver Model and changes lanes by MOBIL, each driver with hidden traits drawn per episode, and
    random events (whether a driver yields to a merging car, hard braking). The agent drives the ego, a
    kinematic bicycle, and must reach the scenario's goal (pass ``goal.x_m`` in one of ``goal.lanes``) without
    touching another vehicle or leaving the road. One step is ``scenario.dt_s`` (0.1 s in the built-ins).

    ## Action Space

    ``Box(low=[-max_brake_mps2, -max_steer_rad], high=[max_accel_mps2, max_steer_rad], (2,), float32)`` from the
    scenario's ``limits`` (8, 0.5, 3, 0.5 in the built-ins):

    | idx | action     | unit  | meaning                                                         |
    |-----|------------|-------|-----------------------------------------------------------------|
    | 0   | accel_mps2 | m/s^2 | longitudinal acceleration; negative brakes (never reverses)     |
    | 1   | steer_rad  | rad   | front-wheel steering angle; positive turns left (toward +y)     |

    The engine clips both to the limits and the steering angle further to ``max_steer_rate_radps`` per second
    from its previous value. ``normalized_actions=True`` gives ``Box(-1, 1, (2,))`` instead, mapped by
    :func:`to_physical` (1 full throttle, -1 full braking). Note: gymnasium's ``check_env`` recommends a
    normalised box and warns about the physical one; the physical units are the default because the rest of
    wmplan (datasets, planner, models) speaks them.

    ## Observation Space

    ``Dict({"objects": Box((1 + M, 8)), "road": Box((6,))})``, float32, M = ``num_objects`` (default 8). Row 0 of
    ``objects`` is the ego itself; rows 1..M the M nearest other vehicles by centre distance, nearest first,
    in the ego's frame (origin at the ego's centre, x along its heading, y to its left); empty rows are all
    zero. The bounds are finite and derived from the scenario by :func:`observation_bounds` (R is the reach of
    the simulated stretch around the ego, V a speed bound; about 212 m and 87 m/s in ``onramp-merge``):

    | idx | objects feature | unit | range        | meaning                                             |
    |-----|-----------------|------|--------------|-----------------------------------------------------|
    | 0   | x_m             | m    | [-R, R]      | centre position ahead of the ego                    |
    | 1   | y_m             | m    | [-R, R]      | centre position to the ego's left                   |
    | 2   | vx_mps          | m/s  | [-V, V]      | velocity along the ego's heading (not relative)     |
    | 3   | vy_mps          | m/s  | [-V, V]      | velocity to the ego's left                          |
    | 4   | heading_rad     | rad  | [-pi, pi]    | yaw relative to the ego's                           |
    | 5   | length_m        | m    | [0, 25]      | footprint length (0 in an empty row)                |
    | 6   | width_m         | m    | [0, 3]       | footprint width (0 in an empty row)                 |
    | 7   | valid           | 1    | {0, 1}       | 1 where the row holds a vehicle                     |

    | idx | road feature     | unit | range            | meaning                                                    |
    |-----|------------------|------|------------------|------------------------------------------------------------|
    | 0   | lane_offset_m    | m    | about [-w/2, w/2] | ego centre minus the centre of its lane (to the left)      |
    | 1   | lane_end_m       | m    | [0, 500]         | distance to where the ego's lane ends, capped at 500       |
    | 2   | lanes_left       | 1    | [0, L - 1]       | lanes that exist to the left at the ego's position         |
    | 3   | lanes_right      | 1    | [0, L - 1]       | lanes that exist to the right                              |
    | 4   | right_lane_end_m | m    | [0, 500]         | distance to the end of the lane to the right (0: none)     |
    | 5   | left_lane_end_m  | m    | [0, 500]         | distance to the end of the lane to the left (0: none)      |

    The layout is the one of ``wmplan.sim.features`` and ``wmplan.sim.observe.observe``, shared with the datasets
    and the forward model.

    ## Rewards

    See :class:`RewardConfig`: progress along the road normalised so that an episode at the speed limit earns
    about 1 (credit capped at the speed limit), minus a small comfort cost on squared acceleration and steering,
    minus ``crash_penalty`` (1) on a collision or leaving the road, plus ``goal_bonus`` (0.5) on reaching the goal.

    ## Starting State

    ``reset(seed=...)`` calls ``super().reset(seed=seed)`` and then draws one integer scene seed from
    ``self.np_random``; the scene is ``wmplan.sim.spawn.initial_state(params, [scene_seed])``: the ego at the
    scenario's start, hand-placed vehicles, random traffic at each lane's density with hidden traits. Everything
    random after that comes from the engine's counter-based generator keyed by the scene seed, so a scene
    unfolds the same whether it runs here or in a batch. ``reset(options={"scene_seed": k})`` picks the scene
    seed directly (``np_random`` is not drawn from).

    ## Episode End

    * Termination: the ego collides with another vehicle (oriented-box overlap), leaves the road (a corner of
      its footprint outside every lane that exists there), or reaches its goal.
    * Truncation: ``scenario.duration_s`` has passed (``num_steps`` steps).

    ``info`` holds ``collision``, ``offroad``, ``goal`` (the outcome flags, sticky), ``scene_seed``, ``step``,
    ``time_s``, ``ego_speed_mps``, and the applied ``accel_mps2`` and ``steer_rad`` (0 after a reset).
    Calling ``step`` after the episode has ended raises ``gymnasium.error.ResetNeeded``.

    ## Arguments

    * ``scenario``: a built-in name (``"onramp-merge"``), a path to a scenario YAML file, or a ``Scenario``.
    * ``num_objects``: M, the number of other vehicles in the object list (default 8).
    * ``render_mode``: None or ``"rgb_array"`` (an (H, W, 3) uint8 picture of the road around the ego).
    * ``reward``: a :class:`RewardConfig` (default weights if None).
    * ``normalized_actions``: use the [-1, 1] action box (see Action Space).

    ``gymnasium.make("wmplan/OnrampMerge-v0")`` makes a built-in; :func:`make_env` any scenario file.

    ## Version History

    * v0: first version.
    """

    metadata: dict[str, Any] = {"render_modes": ["rgb_array"], "render_fps": 10}

    def __init__(
        self,
        scenario: str | Path | Scenario,
        *,
        num_objects: int = DEFAULT_NUM_OBJECTS,
        render_mode: str | None = None,
        reward: RewardConfig | None = None,
        normalized_actions: bool = False,
    ):
        self.scenario = _resolve_scenario(scenario)
        self.params = SimParams.from_scenario(self.scenario)
        self.num_objects = _check_num_objects(num_objects)
        self.render_mode = _check_render_mode(render_mode, self.metadata["render_modes"])
        self.reward_config = RewardConfig() if reward is None else reward
        self.normalized_actions = bool(normalized_actions)
        self.metadata = {**type(self).metadata, "render_fps": int(round(1.0 / self.params.dt_s))}
        self.action_space = action_space(self.params, self.normalized_actions)
        self.observation_space = observation_space(self.params, self.num_objects)
        self._state: TrafficState | None = None
        self._scene_seed = -1
        self._ended = False
        self._renderer = None
        self._slots = np.empty((1, 1 + self.num_objects), dtype=np.int64)  # work space of step()
        self._reward = np.empty(1)

    @property
    def state(self) -> TrafficState | None:
        """The current one-scene :class:`TrafficState` (None before the first reset); immutable."""
        return self._state

    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Start an episode: ``seed`` seeds the environment's generator (gymnasium's contract), which draws the
        scene seed unless ``options={"scene_seed": s}`` (an integer >= 0) gives it. Returns (observation, info).

        Raises:
            ConfigError: an unknown option or a scene seed that is not an integer >= 0.
        """
        super().reset(seed=seed)
        opts = dict(options or {})
        unknown = sorted(set(opts) - {"scene_seed"})
        if unknown:
            raise ConfigError(f"LaneEnv.reset: unknown option(s) {unknown}; the only option is 'scene_seed'")
        if "scene_seed" in opts:
            scene_seed = opts["scene_seed"]
            if isinstance(scene_seed, bool) or not isinstance(scene_seed, (int, np.integer)) or scene_seed < 0:
                raise ConfigError(f"LaneEnv.reset: options['scene_seed'] must be an integer >= 0, got {scene_seed!r}")
        else:
            scene_seed = self.np_random.integers(0, SCENE_SEED_HIGH)
        self._scene_seed = int(scene_seed)
        self._state = initial_state(self.params, [self._scene_seed])
        self._ended = False
        return self._obs(), self._info(0.0, 0.0)

    def _obs(self) -> dict[str, np.ndarray]:
        obs = _observation(self._state, self.params, self.num_objects)
        return {k: v[0] for k, v in obs.items()}

    def _info(self, accel_mps2: float, steer_rad: float) -> dict[str, Any]:
        p = Packed.of(self._state)
        ended, stp = p.ended[:, 0].tolist(), int(p.si[S_STEP, 0])
        return {
            "collision": ended[E_COLLIDED],
            "offroad": ended[E_OFFROAD],
            "goal": ended[E_REACHED],
            "scene_seed": self._scene_seed,
            "step": stp,
            "time_s": float(p.si[S_STEP, 0] * self.params.dt_s),
            "ego_speed_mps": float(p.sf[S_EGO_SPEED, 0]),
            "accel_mps2": float(accel_mps2),
            "steer_rad": float(steer_rad),
        }

    def step(self, action: Any) -> tuple[dict[str, np.ndarray], float, bool, bool, dict[str, Any]]:
        """Advance one simulator step (``dt_s``) with ``action`` (2,) = (acceleration m/s^2, steering rad), or
        values in [-1, 1] if ``normalized_actions``. Returns (observation, reward, terminated, truncated, info).

        Raises:
            ResetNeeded: before the first reset or after the episode ended.
            ConfigError: an action of another shape or not finite.
        """
        if self._state is None:
            raise ResetNeeded("LaneEnv.step: call reset() before the first step")
        if self._ended:
            raise ResetNeeded("LaneEnv.step: the episode has ended (terminated or truncated); call reset() first")
        act = _check_actions(action, (2,), "LaneEnv.step")
        if self.normalized_actions:
            act = to_physical(act, self.params)
        before = self._state
        self._state, sinfo = engine_step(before, act[None, :], self.params)
        pb, pa = Packed.of(before), Packed.of(self._state)
        m = self.num_objects
        objects, road = (
            np.empty((1, 1 + m, NUM_VEHICLE_FEATURES), np.float32),
            np.empty((1, NUM_ROAD_FEATURES), np.float32),
        )
        table = param_table(self.params)
        _env_outputs(
            table.scalars[0],
            table.lanes[0],
            _constants(self.params, self.reward_config),
            pb.vf,
            pb.ended,
            pa.vf,
            pa.valid,
            pa.ended,
            sinfo.accel_mps2,
            sinfo.steer_rad,
            objects,
            road,
            self._slots,
            self._reward,
        )
        terminated = bool(pa.ended[:, 0].any())
        truncated = (not terminated) and int(pa.si[S_STEP, 0]) >= self.params.num_steps
        self._ended = terminated or truncated
        info = self._info(float(sinfo.accel_mps2[0, EGO]), float(sinfo.steer_rad[0]))
        return {"objects": objects[0], "road": road[0]}, float(self._reward[0]), terminated, truncated, info

    def render(self) -> np.ndarray | None:
        """An (H, W, 3) uint8 picture of the road around the ego if ``render_mode == "rgb_array"``, else None."""
        if self.render_mode is None:
            return None
        if self._state is None:
            raise ResetNeeded("LaneEnv.render: call reset() before rendering")
        if self._renderer is None:
            self._renderer = _make_renderer(self.params)
        return self._renderer.render(
            self._state.vehicles()[0],
            title=_frame_title(self.params, self._state, 0),
            collided=bool(self._state.collided[0]),
        )

    def close(self) -> None:
        """Release the renderer's figure, if one was made."""
        if self._renderer is not None:
            self._renderer.close()
            self._renderer = None


# --- the vector env ---------------------------------------------------------------------------------------------------


class LaneVectorEnv(VectorEnv):
    """N scenes of one scenario in one batched :class:`TrafficState`, advanced by one ``engine.step`` call.

    Spaces, rewards and episode ends are those of :class:`LaneEnv` (``single_observation_space``,
    ``single_action_space``); ``observation_space`` and ``action_space`` are batched (leading axis N).

    Autoreset: gymnasium's next-step mode (``metadata["autoreset_mode"] == AutoresetMode.NEXT_STEP``). When a
    scene terminates or truncates, ``step`` returns its last observation; on the following ``step`` that scene's
    action is ignored, it starts a new episode (scene seed drawn from ``self.np_random``) and returns the new
    first observation with reward 0 and terminated = truncated = False.

    Seeding: ``reset(seed=s)`` seeds ``self.np_random`` and draws N scene seeds from it;
    ``reset(options={"scene_seeds": [...]})`` gives them directly. Scene k with scene seed q unfolds exactly as
    ``LaneEnv.reset(options={"scene_seed": q})`` does under the same actions (the engine's random numbers depend
    on the scene seed only).

    ``info`` holds arrays (N,) of the keys of :class:`LaneEnv`'s info, each with gymnasium's ``_key`` mask (all
    True).

    Args:
        scenario: a built-in name, a scenario YAML path or a ``Scenario``.
        num_envs: N.
        num_objects, render_mode, reward, normalized_actions: as :class:`LaneEnv`. ``render()`` returns one
            image per scene.
    """

    metadata: dict[str, Any] = {
        "render_modes": ["rgb_array"],
        "render_fps": 10,
        "autoreset_mode": AutoresetMode.NEXT_STEP,
    }

    def __init__(
        self,
        scenario: str | Path | Scenario,
        num_envs: int = 1,
        *,
        num_objects: int = DEFAULT_NUM_OBJECTS,
        render_mode: str | None = None,
        reward: RewardConfig | None = None,
        normalized_actions: bool = False,
    ):
        if isinstance(num_envs, bool) or not isinstance(num_envs, (int, np.integer)) or num_envs < 1:
            raise ConfigError(f"num_envs must be an integer >= 1, got {num_envs!r}")
        self.scenario = _resolve_scenario(scenario)
        self.params = SimParams.from_scenario(self.scenario)
        self.num_envs = int(num_envs)
        self.num_objects = _check_num_objects(num_objects)
        self.render_mode = _check_render_mode(render_mode, self.metadata["render_modes"])
        self.reward_config = RewardConfig() if reward is None else reward
        self.normalized_actions = bool(normalized_actions)
        self.metadata = {**type(self).metadata, "render_fps": int(round(1.0 / self.params.dt_s))}
        self.single_action_space = action_space(self.params, self.normalized_actions)
        self.single_observation_space = observation_space(self.params, self.num_objects)
        self.action_space = batch_space(self.single_action_space, self.num_envs)
        self.observation_space = batch_space(self.single_observation_space, self.num_envs)
        self._state: TrafficState | None = None
        self._scene_seeds = np.full(self.num_envs, -1, dtype=np.int64)
        self._autoreset = np.zeros(self.num_envs, dtype=bool)
        self._renderer = None

    @property
    def state(self) -> TrafficState | None:
        """The current N-scene :class:`TrafficState` (None before the first reset); immutable."""
        return self._state

    def _draw_seeds(self, n: int) -> np.ndarray:
        return self.np_random.integers(0, SCENE_SEED_HIGH, size=n).astype(np.int64)

    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Start every sub-environment: ``seed`` seeds the generator that draws the scene seeds unless
        ``options={"scene_seeds": seeds}`` ((num_envs,) integers >= 0) gives them. Returns (observations, info).

        Raises:
            ConfigError: an unknown option or scene seeds of another shape, type or sign.
        """
        super().reset(seed=seed)
        opts = dict(options or {})
        unknown = sorted(set(opts) - {"scene_seeds"})
        if unknown:
            raise ConfigError(f"LaneVectorEnv.reset: unknown option(s) {unknown}; the only option is 'scene_seeds'")
        if "scene_seeds" in opts:
            seeds = np.asarray(opts["scene_seeds"])
            if seeds.shape != (self.num_envs,) or not np.issubdtype(seeds.dtype, np.integer) or (seeds < 0).any():
                raise ConfigError(
                    f"LaneVectorEnv.reset: options['scene_seeds'] must be {self.num_envs} integers >= 0, "
                    f"got {opts['scene_seeds']!r}"
                )
            seeds = seeds.astype(np.int64)
        else:
            seeds = self._draw_seeds(self.num_envs)
        self._scene_seeds = seeds.copy()
        self._state = initial_state(self.params, seeds)
        self._autoreset = np.zeros(self.num_envs, dtype=bool)
        zeros = np.zeros(self.num_envs)
        return _observation(self._state, self.params, self.num_objects), self._info(zeros, zeros)

    def _info(self, accel_mps2: np.ndarray, steer_rad: np.ndarray) -> dict[str, Any]:
        st = self._state
        values = {
            "collision": st.collided.copy(),
            "offroad": st.offroad.copy(),
            "goal": st.reached_goal.copy(),
            "scene_seed": self._scene_seeds.copy(),
            "step": st.step.astype(np.int64),
            "time_s": st.step * self.params.dt_s,
            "ego_speed_mps": st.ego_speed_mps.copy(),
            "accel_mps2": np.asarray(accel_mps2, dtype=np.float64).copy(),
            "steer_rad": np.asarray(steer_rad, dtype=np.float64).copy(),
        }
        info: dict[str, Any] = {}
        for key, value in values.items():
            info[key] = value
            info[f"_{key}"] = np.ones(self.num_envs, dtype=bool)
        return info

    def step(self, actions: Any) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
        """Advance every sub-environment one step with ``actions`` (num_envs, 2); a sub-environment whose episode
        ended at the previous step restarts from a newly drawn scene instead (reward 0, its next-step autoreset).
        Returns (observations, rewards, terminated, truncated, info), each with a leading num_envs axis.

        Raises:
            ResetNeeded: before the first reset.
            ConfigError: actions of another shape or not finite.
        """
        if self._state is None:
            raise ResetNeeded("LaneVectorEnv.step: call reset() before the first step")
        act = _check_actions(actions, (self.num_envs, 2), "LaneVectorEnv.step")
        if self.normalized_actions:
            act = to_physical(act, self.params)
        before = self._state
        after, sinfo = engine_step(before, act, self.params)
        reward = step_reward(self.params, self.reward_config, before, after, sinfo)
        terminated = after.done.copy()
        truncated = ~terminated & (after.step >= self.params.num_steps)
        accel, steer = sinfo.accel_mps2[:, EGO].copy(), sinfo.steer_rad.copy()
        restart = np.nonzero(self._autoreset)[0]
        if restart.size:
            seeds = self._draw_seeds(restart.size)
            after = _put_scenes(after, restart, initial_state(self.params, seeds))
            self._scene_seeds[restart] = seeds
            reward[restart] = 0.0
            terminated[restart] = False
            truncated[restart] = False
            accel[restart] = 0.0
            steer[restart] = 0.0
        self._state = after
        self._autoreset = terminated | truncated
        obs = _observation(after, self.params, self.num_objects)
        return obs, reward.astype(np.float64), terminated, truncated, self._info(accel, steer)

    def render(self) -> tuple[np.ndarray, ...] | None:
        """One (H, W, 3) uint8 image per scene if ``render_mode == "rgb_array"``, else None."""
        if self.render_mode is None:
            return None
        if self._state is None:
            raise ResetNeeded("LaneVectorEnv.render: call reset() before rendering")
        if self._renderer is None:
            self._renderer = _make_renderer(self.params)
        rows = self._state.vehicles()
        return tuple(
            self._renderer.render(
                rows[i], title=_frame_title(self.params, self._state, i), collided=bool(self._state.collided[i])
            )
            for i in range(self.num_envs)
        )

    def close_extras(self, **kwargs: Any) -> None:
        """Release the renderer's figure, if one was made (called by gymnasium's ``close``)."""
        if self._renderer is not None:
            self._renderer.close()
            self._renderer = None


def _put_scenes(state: TrafficState, idx: np.ndarray, fresh: TrafficState) -> TrafficState:
    """A copy of ``state`` whose scenes ``idx`` are replaced by the scenes of ``fresh`` (same vehicle slots)."""
    out = {}
    for name, value in state.to_arrays().items():
        value[idx] = getattr(fresh, name)
        out[name] = value
    return TrafficState(**out)


# --- construction and registration ------------------------------------------------------------------------------------


def make_env(scenario: str | Path | Scenario, **kwargs: Any) -> LaneEnv:
    """A :class:`LaneEnv` for any scenario (built-in name, YAML path or ``Scenario``); keyword arguments as
    :class:`LaneEnv`. Unlike ``gymnasium.make`` it adds no wrappers."""
    return LaneEnv(scenario, **kwargs)


def env_id(scenario_name: str) -> str:
    """The registered id of a built-in scenario: ``"onramp-merge"`` -> ``"wmplan/OnrampMerge-v0"``."""
    camel = "".join(part[:1].upper() + part[1:] for part in scenario_name.split("-") if part)
    return f"wmplan/{camel}-v{ENV_VERSION}"


def register_envs() -> list[str]:
    """Register every built-in scenario with gymnasium (idempotent); returns the ids.

    Registered environments take normalised actions in [-1, 1]^2 (mapped to the scenario's acceleration, braking
    and steering limits), the convention learning code expects; ``LaneEnv(...)`` built directly takes physical
    units by default.
    """
    ids = []
    for name in builtin_names():
        eid = env_id(name)
        if eid not in gym.registry:
            gym.register(
                id=eid,
                entry_point="wmplan.sim.env:LaneEnv",
                vector_entry_point="wmplan.sim.env:LaneVectorEnv",
                kwargs={"scenario": name, "normalized_actions": True},
                nondeterministic=False,
            )
        ids.append(eid)
    return ids


register_envs()
