"""Contract, determinism and reference tests of the gymnasium layer (wmplan.sim.env).

Sources: gymnasium's own ``gymnasium.utils.env_checker.check_env`` (a reference library,
docs/references.md#lib-gymnasium-env-checker); constant-speed and constant-acceleration kinematics
``x = x0 + v t + a t^2 / 2`` for the progress reward (docs/references.md#practice-kinematics; the engine's update is
the ballistic one of docs/references.md#treiber-kanagaraj-2015-ballistic); the rest are equivalence and determinism
checks (docs/references.md#practice-equivalence-test, docs/references.md#practice-determinism).
"""

from __future__ import annotations

import re
import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.error import ResetNeeded
from gymnasium.utils.env_checker import check_env, data_equivalence

from wmplan.errors import ConfigError
from wmplan.scenario import builtin_names, load_scenario, parse_scenario, scenario_to_dict, scenario_to_yaml
from wmplan.sim.ego_rules import rule_actions
from wmplan.sim.env import (
    LaneEnv,
    LaneVectorEnv,
    RewardConfig,
    env_id,
    make_env,
    observation_bounds,
    to_physical,
)
from wmplan.sim.features import ROAD_FEATURES, VEHICLE_FEATURES
from wmplan.sim.observe import observe
from wmplan.sim.state import EGO
from wmplan.viz import style

WMPLAN_IDS = sorted(k for k in gym.registry if k.startswith("wmplan/"))
ACTION_BOX_ADVICE = "we recommend using a symmetric and normalized space"


def _gentle_actions(seed: int, n: int) -> np.ndarray:
    """(n, 2) seeded actions that keep the ego on the road for a while: moderate acceleration, tiny steering."""
    gen = np.random.default_rng(seed)
    return np.stack([gen.uniform(-2.0, 1.5, n), gen.uniform(-0.01, 0.01, n)], axis=-1).astype(np.float32)


def _rollout(env: LaneEnv, seed: int, actions: np.ndarray) -> list[dict[str, np.ndarray]]:
    obs, _ = env.reset(seed=seed)
    seq = [obs]
    for a in actions:
        obs, _, terminated, truncated, _ = env.step(a)
        seq.append(obs)
        if terminated or truncated:
            break
    return seq


def _variant(**edits):
    """The built-in open-road scenario with no random traffic and no hard braking, plus dotted-path edits."""
    d = scenario_to_dict(load_scenario("open-road"))
    d["name"] = "env-test"
    d["traffic"]["density_veh_per_km"] = [0.0, 0.0, 0.0]
    d["drivers"]["hard_brake_rate_per_min"] = 0.0
    for path, value in edits.items():
        node = d
        *head, last = path.split(".")
        for key in head:
            node = node[key]
        node[last] = value
    return parse_scenario(d, "<env test>")


# --- registration -------------------------------------------------------------------------------------------------


def test_every_builtin_is_registered_in_the_wmplan_namespace():
    """Registered ids are wmplan/<CamelCaseName>-v0, one per built-in scenario (the brief's naming rule)."""
    assert env_id("onramp-merge") == "wmplan/OnrampMerge-v0"
    assert env_id("open-road") == "wmplan/OpenRoad-v0"
    assert WMPLAN_IDS == sorted(env_id(n) for n in builtin_names())
    assert len(WMPLAN_IDS) == len(builtin_names()) >= 5


@pytest.mark.parametrize("eid", WMPLAN_IDS)
def test_make_vec_uses_the_batched_vector_env(eid):
    """``gymnasium.make_vec`` of a registered id builds a LaneVectorEnv with batched spaces (gymnasium API)."""
    venv = gym.make_vec(eid, num_envs=3)
    assert isinstance(venv.unwrapped, LaneVectorEnv)
    assert venv.observation_space["objects"].shape == (3, 9, len(VEHICLE_FEATURES))
    assert venv.single_observation_space["road"].shape == (len(ROAD_FEATURES),)
    assert venv.action_space.shape == (3, 2)
    obs, _ = venv.reset(seed=5)
    assert obs in venv.observation_space
    venv.close()


def test_make_env_takes_any_scenario_file(tmp_path):
    """make_env builds a LaneEnv from a YAML file; check_env passes on it (no spec, so without the render-mode
    re-make check) and it behaves exactly as the registered built-in the file was written from."""
    path = tmp_path / "my-merge.yaml"
    path.write_text(scenario_to_yaml(load_scenario("onramp-merge")), encoding="utf-8")
    env = make_env(path, normalized_actions=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_env(env, skip_render_check=True)
    builtin = gym.make("wmplan/OnrampMerge-v0", normalized_actions=True).unwrapped
    actions = _gentle_actions(5, 20) / np.float32(8.0)
    seq_file, seq_builtin = _rollout(env, 17, actions), _rollout(builtin, 17, actions)
    assert all(data_equivalence(a, b, exact=True) for a, b in zip(seq_file, seq_builtin, strict=True))


# --- gymnasium's env checker ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("render_mode", [None, "rgb_array"])
@pytest.mark.parametrize("eid", WMPLAN_IDS)
def test_check_env_passes_without_warnings_with_normalised_actions(eid, render_mode):
    """gymnasium.utils.env_checker.check_env (reference library) passes with no warning at all; pytest turns any
    warning into an error, and the simplefilter below makes sure of it inside this test."""
    env = gym.make(eid, render_mode=render_mode, normalized_actions=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_env(env.unwrapped)
    env.close()


@pytest.mark.parametrize("render_mode", [None, "rgb_array"])
@pytest.mark.parametrize("eid", WMPLAN_IDS)
def test_check_env_with_physical_actions_only_advises_a_normalised_box(eid, render_mode):
    """With the default action box in physical units (m/s^2, rad) check_env passes and its only warning is the
    advice to use a normalised box (gymnasium's check_space_limit); any other warning fails this test."""
    env = gym.make(eid, render_mode=render_mode, normalized_actions=False)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        check_env(env.unwrapped)
    env.close()
    messages = [str(w.message) for w in caught]
    assert messages, "check_env no longer warns about the physical action box; drop the allowance"
    assert all(ACTION_BOX_ADVICE in m for m in messages), messages


# --- determinism --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [0, 1, 7])
@pytest.mark.parametrize("scenario", ["onramp-merge", "stop-and-go"])
def test_same_seed_same_observations_different_seed_different(scenario, seed):
    """Side-by-side rollouts (docs/references.md#practice-determinism): the same seed and actions give an
    identical observation sequence; another seed gives a different one."""
    actions = _gentle_actions(100 + seed, 40)
    env_a, env_b = LaneEnv(scenario), LaneEnv(scenario)
    seq_a, seq_b = _rollout(env_a, seed, actions), _rollout(env_b, seed, actions)
    assert len(seq_a) == len(seq_b) > 10
    assert all(data_equivalence(a, b, exact=True) for a, b in zip(seq_a, seq_b, strict=True))
    seq_c = _rollout(LaneEnv(scenario), seed + 1000, actions)
    assert not data_equivalence(seq_a[0], seq_c[0])


def test_reset_draws_the_scene_seed_from_np_random():
    """After ``reset(seed=s)`` the scene seed is the first integer drawn from a generator seeded like gymnasium's
    ``np_random`` (gymnasium.utils.seeding.np_random); a reset without a seed draws the next one."""
    env = LaneEnv("open-road")
    _, info = env.reset(seed=42)
    gen, _ = gym.utils.seeding.np_random(42)
    assert info["scene_seed"] == int(gen.integers(0, 2**31 - 1))
    _, info2 = env.reset()
    assert info2["scene_seed"] == int(gen.integers(0, 2**31 - 1))
    _, info3 = env.reset(options={"scene_seed": 12345})
    assert info3["scene_seed"] == 12345


# --- single env vs vector env ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("scenario", ["onramp-merge", "cut-in"])
def test_vector_env_agrees_with_single_envs(scenario):
    """Equivalence (docs/references.md#practice-equivalence-test): N scenes in one LaneVectorEnv and N LaneEnvs
    given the same scene seeds and actions produce the same observations, rewards and episode ends, step for
    step."""
    num = 4
    venv = LaneVectorEnv(scenario, num)
    vobs, vinfo = venv.reset(seed=11)
    envs = [LaneEnv(scenario) for _ in range(num)]
    singles = [e.reset(options={"scene_seed": int(s)})[0] for e, s in zip(envs, vinfo["scene_seed"], strict=True)]
    for i, sobs in enumerate(singles):
        np.testing.assert_array_equal(sobs["objects"], vobs["objects"][i])
    for _ in range(60):
        acts = rule_actions(venv.state, venv.params)
        vobs, vrew, vterm, vtrunc, _ = venv.step(acts)
        for i, env in enumerate(envs):
            if env._ended:  # the vector env is autoresetting this scene; the comparison ends here
                continue
            sobs, srew, sterm, strunc, _ = env.step(acts[i])
            np.testing.assert_array_equal(sobs["objects"], vobs["objects"][i])
            np.testing.assert_array_equal(sobs["road"], vobs["road"][i])
            assert srew == vrew[i] and sterm == vterm[i] and strunc == vtrunc[i]


def test_vector_env_autoresets_on_the_next_step():
    """gymnasium's next-step autoreset (AutoresetMode.NEXT_STEP): the step after an episode ends ignores the
    action, returns the first observation of a new scene (seed drawn from np_random), reward 0, no end flags."""
    venv = LaneVectorEnv("open-road", 3)
    assert venv.metadata["autoreset_mode"] == gym.vector.AutoresetMode.NEXT_STEP
    _, info = venv.reset(seed=3)
    old_seeds = info["scene_seed"].copy()
    steer_left = np.array([[0.0, 0.5], [0.0, 0.0], [0.0, 0.0]])  # scene 0 drives off the road
    ended_at = None
    for k in range(100):
        _, _, term, trunc, info = venv.step(steer_left)
        if term[0]:
            ended_at = k
            break
    assert ended_at is not None and info["offroad"][0] and not (term[1] or trunc[1])
    obs, rew, term, trunc, info = venv.step(steer_left)
    assert rew[0] == 0.0 and not term[0] and not trunc[0]
    assert info["step"][0] == 0 and info["step"][1] == ended_at + 2
    assert info["scene_seed"][0] != old_seeds[0] and info["scene_seed"][1] == old_seeds[1]
    fresh, _ = LaneEnv("open-road").reset(options={"scene_seed": int(info["scene_seed"][0])})
    np.testing.assert_array_equal(fresh["objects"], obs["objects"][0])


def test_vector_env_seeding():
    """reset(seed=s) is reproducible, another s gives other scene seeds, and options['scene_seeds'] sets them."""
    a, b = LaneVectorEnv("lane-drop", 5), LaneVectorEnv("lane-drop", 5)
    _, ia = a.reset(seed=9)
    _, ib = b.reset(seed=9)
    np.testing.assert_array_equal(ia["scene_seed"], ib["scene_seed"])
    _, ic = b.reset(seed=10)
    assert not np.array_equal(ia["scene_seed"], ic["scene_seed"])
    _, idd = b.reset(options={"scene_seeds": [1, 2, 3, 4, 5]})
    np.testing.assert_array_equal(idd["scene_seed"], [1, 2, 3, 4, 5])


# --- observations --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("scenario", ["onramp-merge", "cut-in", "open-road", "lane-drop", "stop-and-go"])
def test_observations_stay_inside_the_declared_bounds(scenario):
    """Random actions from a seeded action space, 32 scenes x 150 steps with autoreset: every observation lies in
    the finite observation space (the bounds are derived, not fitted; see observation_bounds)."""
    venv = LaneVectorEnv(scenario, 32)
    obs, _ = venv.reset(seed=21)
    venv.action_space.seed(22)
    for _ in range(150):
        assert obs in venv.observation_space
        obs, *_ = venv.step(venv.action_space.sample())
    assert obs in venv.observation_space
    for lo, hi in observation_bounds(venv.params).values():
        assert np.isfinite(lo).all() and np.isfinite(hi).all() and (hi > lo).all()


def test_observation_is_the_shared_object_list():
    """The env's observation is wmplan.sim.observe.observe of its state, cast to float32 (one layout for the
    env, the datasets and the model)."""
    env = LaneEnv("onramp-merge", num_objects=5)
    obs, _ = env.reset(seed=4)
    obs, *_ = env.step(np.array([0.5, 0.0], dtype=np.float32))
    objects, road, _ = observe(env.state, env.params, 5)
    np.testing.assert_array_equal(obs["objects"], objects[0].astype(np.float32))
    np.testing.assert_array_equal(obs["road"], road[0].astype(np.float32))
    assert obs["objects"].shape == (6, 8) and obs["objects"].dtype == np.float32


def test_docstring_tabulates_every_feature_in_order():
    """The observation table of the env docstring names the features of wmplan.sim.features in their order."""
    doc = LaneEnv.__doc__
    for names in (VEHICLE_FEATURES, ROAD_FEATURES):
        positions = [doc.index(f"| {name} ") for name in names]
        assert positions == sorted(positions)
    for section in (
        "## Description",
        "## Action Space",
        "## Observation Space",
        "## Rewards",
        "## Starting State",
        "## Episode End",
        "## Arguments",
        "## Version History",
    ):
        assert section in doc


# --- actions, reward, episode end ------------------------------------------------------------------------------------


def test_action_space_is_the_physical_box_from_the_scenario():
    """Box(low=[-max_brake, -max_steer], high=[max_accel, max_steer]) float32 (onramp-merge limits 8, 0.5, 3)."""
    env = LaneEnv("onramp-merge")
    np.testing.assert_array_equal(env.action_space.low, np.array([-8.0, -0.5], dtype=np.float32))
    np.testing.assert_array_equal(env.action_space.high, np.array([3.0, 0.5], dtype=np.float32))
    assert env.action_space.dtype == np.float32
    np.testing.assert_allclose(
        to_physical(np.array([[1.0, -1.0], [-0.5, 0.25]]), env.params), [[3.0, -0.5], [-4.0, 0.125]]
    )


def test_progress_reward_matches_constant_speed_and_constant_acceleration_kinematics():
    """On an empty road the ego (20 m/s, heading 0) advances v dt = 2.0 m in a 0.1 s step, or v dt + a dt^2/2 =
    2.005 m at a = 1 m/s^2 (docs/references.md#practice-kinematics). With v_lim = 33.3 m/s and duration D = 20 s the
    reward is dx / (v_lim D), minus 0.1 (a / 2)^2 dt / D for the acceleration (RewardConfig's formula)."""
    scn = _variant(**{"ego.speed_mps": 20.0})
    env = LaneEnv(scn)
    env.reset(seed=0)
    _, r0, *_ = env.step(np.zeros(2, dtype=np.float32))
    assert r0 == pytest.approx(2.0 / (33.3 * 20.0), rel=1e-9)
    _, r1, *_ = env.step(np.array([1.0, 0.0], dtype=np.float32))
    assert r1 == pytest.approx(2.005 / (33.3 * 20.0) - 0.1 * 0.25 * 0.1 / 20.0, rel=1e-9)


def test_goal_ends_the_episode_with_the_bonus_and_step_after_the_end_refuses():
    """Passing the goal position in a goal lane terminates with info['goal'] and the +0.5 bonus."""
    scn = _variant(**{"ego.speed_mps": 20.0, "ego.goal": {"x_m": 101.0, "lanes": [0, 1, 2]}})
    env = LaneEnv(scn)
    env.reset(seed=0)
    _, reward, terminated, truncated, info = env.step(np.zeros(2, dtype=np.float32))
    assert terminated and not truncated and info["goal"] and not info["collision"]
    assert reward == pytest.approx(2.0 / (33.3 * 20.0) + 0.5, rel=1e-9)
    with pytest.raises(ResetNeeded, match=re.escape("the episode has ended (terminated or truncated)")):
        env.step(np.zeros(2, dtype=np.float32))


def test_collision_ends_the_episode_with_the_penalty():
    """A stopped truck placed 8 m ahead in the ego's lane: the ego (20 m/s, no braking) touches it within the first
    steps; the episode terminates on that step with info['collision'] and the -1 penalty."""
    placed = [{"lane": 1, "offset_m": 8.0, "speed_mps": 0.0, "desired_speed_mps": 1.0, "length_m": 10.0}]
    env = LaneEnv(_variant(**{"ego.speed_mps": 20.0, "traffic.placed": placed}))
    env.reset(seed=0)
    for _ in range(5):
        _, reward, terminated, truncated, info = env.step(np.zeros(2, dtype=np.float32))
        if terminated:
            break
    assert terminated and info["collision"] and not truncated
    assert -1.0 < reward + 1.0 < 0.01  # progress of one step (< 0.004) minus the penalty


def test_truncated_exactly_at_the_scenario_duration():
    """duration_s = 1.0 at dt = 0.1 s: truncated on step 10 and not before, never terminated."""
    env = LaneEnv(_variant(duration_s=1.0))
    env.reset(seed=0)
    flags = [env.step(np.zeros(2, dtype=np.float32))[2:4] for _ in range(10)]
    assert flags[:-1] == [(False, False)] * 9 and flags[-1] == (False, True)


# --- rendering ----------------------------------------------------------------------------------------------------


def test_render_shows_the_ego_in_its_colour():
    """render() gives an (H, W, 3) uint8 image; the pixel at the ego's centre has the ego colour of wmplan.viz.style,
    and the ego-coloured pixels lie on the ego's footprint and cover most of it."""
    env = LaneEnv("onramp-merge", render_mode="rgb_array")
    env.reset(seed=3)
    img = env.render()
    assert img.dtype == np.uint8 and img.ndim == 3 and img.shape[2] == 3
    ego = env.state.vehicles()[0][EGO]
    rnd = env._renderer
    row, col = rnd.pixel_of(ego[0], ego[1])
    rgb = np.array(style.hex_to_rgb(style.EGO_COLOUR))
    assert np.abs(img[row, col].astype(int) - rgb).max() <= 2
    mask = np.abs(img.astype(int) - rgb).max(axis=-1) <= 2
    r0, c0 = rnd.pixel_of(ego[0] - ego[5] / 2, ego[1] + ego[6] / 2)
    r1, c1 = rnd.pixel_of(ego[0] + ego[5] / 2, ego[1] - ego[6] / 2)
    rows, cols = np.nonzero(mask)
    assert rows.min() >= r0 - 1 and rows.max() <= r1 + 1 and cols.min() >= c0 - 1 and cols.max() <= c1 + 1
    px_per_m = (c1 - c0) / ego[5]
    assert 0.4 * ego[5] * ego[6] * px_per_m**2 < mask.sum() <= (r1 - r0 + 2) * (c1 - c0 + 2)
    env.close()


def test_render_without_a_render_mode_returns_none():
    env = LaneEnv("open-road")
    env.reset(seed=0)
    assert env.render() is None


# --- bad input ----------------------------------------------------------------------------------------------------


def test_bad_input_gives_one_line_errors():
    """Each message names the argument, the value and the rule (DEVELOPERS.md, "Errors and files")."""
    env = LaneEnv("open-road")
    with pytest.raises(ResetNeeded, match=re.escape("LaneEnv.step: call reset() before the first step")):
        env.step(np.zeros(2))
    env.reset(seed=0)
    msg = "LaneEnv.step: action must have shape (2,) (accel_mps2, steer_rad), got (3,)"
    with pytest.raises(ConfigError, match=re.escape(msg)):
        env.step(np.zeros(3))
    with pytest.raises(ConfigError, match=re.escape("LaneEnv.step: action holds NaN or inf ([nan, 0.0])")):
        env.step(np.array([np.nan, 0.0]))
    with pytest.raises(ConfigError, match=re.escape("LaneEnv.reset: unknown option(s) ['seed']")):
        env.reset(options={"seed": 1})
    with pytest.raises(ConfigError, match=re.escape("render_mode must be None or one of ['rgb_array'], got 'human'")):
        LaneEnv("open-road", render_mode="human")
    with pytest.raises(ConfigError, match=re.escape("num_objects must be an integer >= 1, got 0")):
        make_env("open-road", num_objects=0)
    with pytest.raises(ConfigError, match=re.escape("RewardConfig.crash_penalty must be a finite number >= 0")):
        RewardConfig(crash_penalty=-1.0)
    venv = LaneVectorEnv("open-road", 2)
    venv.reset(seed=0)
    with pytest.raises(ConfigError, match=re.escape("LaneVectorEnv.step: action must have shape (2, 2)")):
        venv.step(np.zeros(2))


def _numpy_step_reward(params, cfg, before, after, info):
    """RewardConfig's formula in numpy, as step_reward computed it before it was compiled."""
    v_lim, dt, dur = params.speed_limit_mps, params.dt_s, params.num_steps * params.dt_s
    dx = after.x_m[:, 0] - before.x_m[:, 0]
    progress = cfg.progress_weight * np.minimum(dx, v_lim * dt) / (v_lim * dur)
    comfort = (
        (
            cfg.accel_weight * (info.accel_mps2[:, 0] / cfg.comfort_accel_mps2) ** 2
            + cfg.steer_weight * (info.steer_rad / params.max_steer_rad) ** 2
        )
        * dt
        / dur
    )
    crashed = (after.collided | after.offroad) & ~(before.collided | before.offroad)
    arrived = after.reached_goal & ~before.reached_goal
    return progress - comfort - cfg.crash_penalty * crashed + cfg.goal_bonus * arrived


@pytest.mark.parametrize("scenario", ["onramp-merge", "cut-in", "stop-and-go"])
def test_compiled_reward_equals_the_numpy_formula(scenario):
    """step_reward (compiled) equals the numpy formula bit for bit over whole episodes of 256 scenes with random
    actions in half of them and non-default weights (collisions, off-road ends and goals included); an equivalence check
    (docs/references.md#practice-equivalence-test)."""
    from wmplan.sim import initial_state
    from wmplan.sim.engine import step as engine_step
    from wmplan.sim.env import step_reward
    from wmplan.sim.params import SimParams

    params = SimParams.from_scenario(load_scenario(scenario))
    gen = np.random.default_rng(7)
    st = initial_state(params, np.arange(256))
    ended = np.zeros(256, dtype=bool)
    for cfg in (
        RewardConfig(),
        RewardConfig(
            progress_weight=2.0,
            accel_weight=0.3,
            comfort_accel_mps2=1.5,
            steer_weight=0.7,
            crash_penalty=3.0,
            goal_bonus=1.25,
        ),
    ):
        st = initial_state(params, np.arange(256))
        for _ in range(params.num_steps):
            act = rule_actions(st, params)  # half the scenes driven by the rules (goals), half at random (crashes)
            act[128:] = np.stack([gen.uniform(-9.0, 4.0, 128), gen.normal(0.0, 0.08, 128)], axis=1)
            after, info = engine_step(st, act, params)
            np.testing.assert_array_equal(
                step_reward(params, cfg, st, after, info), _numpy_step_reward(params, cfg, st, after, info)
            )
            ended |= after.collided | after.offroad
            st = after
    assert ended.any() and st.reached_goal.any()
