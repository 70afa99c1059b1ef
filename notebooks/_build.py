"""Write the four notebooks of ``notebooks/`` from the cell texts below (stored without outputs).

The notebooks are generated so that their text can be reviewed and edited as ordinary Python: change a cell here,
run ``python notebooks/_build.py`` and commit both files. ``python notebooks/_build.py --check`` exits with status 1
if a notebook on disk differs from what this script would write (``tests/test_notebooks.py`` runs the same check).

Each notebook reads like a report: a title and a short introduction, one config cell (``WMPLAN_QUICK=1`` in the
environment shrinks the work to a smoke run of well under three minutes on two cores), calls into ``wmplan``,
figures from ``wmplan.viz`` and short prose between cells.
"""

from __future__ import annotations

import argparse
import sys
import textwrap
from pathlib import Path

import nbformat

HERE = Path(__file__).resolve().parent

CAUTION = (
    "> wmplan is a research sandbox. Its traffic is a simplified model (straight roads, idealised drivers), so "
    "nothing shown here — collision rates, intervals, calibration — certifies anything about a real vehicle or road."
)

QUICK_LINE = 'QUICK = os.environ.get("WMPLAN_QUICK", "0") == "1"  # WMPLAN_QUICK=1: a small smoke run (CI)'


def md(text: str) -> tuple[str, str]:
    return "markdown", textwrap.dedent(text).strip("\n")


def code(text: str) -> tuple[str, str]:
    return "code", textwrap.dedent(text).strip("\n")


# --- 01 -------------------------------------------------------------------------------------------------------------

NB01 = [
    md(f"""
    # 01 · Traffic sandbox

    This notebook is a tour of the simulator. You will load the `onramp-merge` scenario from its YAML file and build a
    denser variant of it in code; run 256 scenes of each at once with the rule-based ego and read off how often the
    ego merges, collides or leaves the road; look at one moment of a scene and at a whole episode as an animation;
    drive the same scenario through its gymnasium interface; and finally branch one moment into many possible
    futures with the *oracle* (the simulator itself), once with the drivers' hidden traits known and once with them
    re-drawn.

    {CAUTION}
    """),
    code(f"""
    import os
    from pathlib import Path

    {QUICK_LINE}
    SCENARIO = "onramp-merge"
    SEED = 0
    NUM_SCENES = 256  # scenes simulated together in one state
    DENSE_VEH_PER_KM = [4.0, 40.0, 30.0]  # the variant's traffic density per lane (lane 0 is the ramp)
    DENSE_YIELD_PROB = 0.3  # ... and its drivers' mean probability of letting a merging car in
    SCENE = 106  # the scene we follow (scene seed SEED + SCENE): its ego is about to merge at the snapshot
    SNAPSHOT_S = 4.0  # the moment we branch into futures, seconds after the start
    PLAN_DT_S = 0.2  # one step of the ego's plan (two simulator steps)
    HORIZON_STEPS = 15  # plan steps of the futures (3 s)
    NUM_FUTURES = 12 if QUICK else 48  # oracle futures per mode
    GYM_STEPS = 20
    OUT = Path("runs/notebooks/01_traffic_sandbox")
    """),
    code("""
    %matplotlib inline
    import time

    import gymnasium
    import numpy as np
    from gymnasium.utils.env_checker import check_env
    from IPython.display import Image, display
    from matplotlib.collections import LineCollection
    from matplotlib.figure import Figure
    from PIL import Image as PILImage

    import wmplan  # noqa: F401  (importing wmplan registers the gymnasium environments)
    from wmplan.errors import ScenarioError
    from wmplan.evaluate.stats import wilson_interval
    from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
    from wmplan.scenario.loader import BUILTIN_DIR
    from wmplan.sim import EGO, SimParams, initial_state, step
    from wmplan.sim.ego_rules import rule_actions
    from wmplan.sim.env import env_id
    from wmplan.sim.features import F_VALID, F_X, F_Y
    from wmplan.sim.oracle import oracle_futures
    from wmplan.viz import draw_scene, render_rgb, scene_figure, style
    from wmplan.viz.anim import episode_frames, save_episode_animation

    OUT.mkdir(parents=True, exist_ok=True)
    """),
    md("""
    ## A scenario from its file

    The built-in scenarios are YAML files shipped with the package. Each starts with a comment block saying what
    situation it describes and where every default value comes from. `load_scenario` accepts a built-in name or a
    path; here we give it the path of the file itself.
    """),
    code("""
    path = BUILTIN_DIR / f"{SCENARIO}.yaml"
    print("".join(path.read_text(encoding="utf-8").splitlines(keepends=True)[:18]))
    base = load_scenario(path)
    print(f"{base.name}: {base.road.num_lanes} lanes, density {base.traffic.density_veh_per_km} veh/km, "
          f"ego starts at x = {base.ego.x_m} m in lane {base.ego.lane}, goal: x = {base.ego.goal.x_m} m in lanes "
          f"{base.ego.goal.lanes}, {base.duration_s} s at {base.dt_s} s steps")
    """),
    md("""
    ## A variant built in code

    `scenario_to_dict` writes out every field, defaults included; change what you like and validate the result with
    `parse_scenario`. A value the schema refuses comes back as a one-line error naming the source, the field, the
    value and the rule.
    """),
    code("""
    data = scenario_to_dict(base)
    data["name"] = f"{SCENARIO}-dense"
    data["traffic"]["density_veh_per_km"] = DENSE_VEH_PER_KM
    data["drivers"]["yield_prob"]["mean"] = DENSE_YIELD_PROB
    dense = parse_scenario(data, source="notebook 01: dense variant")
    print(f"{dense.name}: density {dense.traffic.density_veh_per_km} veh/km, mean yield probability "
          f"{dense.drivers.yield_prob.mean}")

    try:
        parse_scenario({**data, "dt_s": -0.1}, source="notebook 01: a broken variant")
    except ScenarioError as err:
        print("refused:", err)
    """),
    md("""
    ## Many scenes in one batch

    The simulator state holds every scene in arrays shaped `(scenes, vehicles)`, and one `step` advances all of
    them. The rule-based ego (car following by IDM, lane changes by MOBIL, a merge rule) drives in every scene. A
    finished scene keeps being stepped with the others, so we record each scene's outcome at the moment it first
    ends: collision, off the road, goal reached (the merge), or none of these within the scenario's duration.
    The rates come with Wilson 95% intervals.
    """),
    code("""
    outcomes, snapshots = {}, {}
    for scn in (base, dense):
        params = SimParams.from_scenario(scn)
        state = initial_state(params, seeds=np.arange(SEED, SEED + NUM_SCENES))
        first = np.zeros((NUM_SCENES, 3), dtype=bool)  # collision, off road, goal: how each scene first ended
        t0 = time.perf_counter()
        for k in range(params.num_steps):
            state, _ = step(state, rule_actions(state, params), params)
            new = state.done & ~first.any(axis=1)
            first[new] = np.stack([state.collided, state.offroad, state.reached_goal], axis=1)[new]
            if k + 1 == round(SNAPSHOT_S / params.dt_s):
                snapshots[scn.name] = state
        seconds = time.perf_counter() - t0
        outcomes[scn.name] = first
        rate = NUM_SCENES * params.num_vehicles * params.num_steps / seconds
        print(f"{scn.name}: {NUM_SCENES} scenes x {params.num_steps} steps in {seconds:.2f} s "
              f"({rate / 1e6:.1f} M vehicle-steps/s, including the rule-based ego)")

    print(f"\\n{'scenario':<22}" + "".join(f"{w:>26}" for w in ("collision", "off the road", "goal (merged)")))
    for name, first in outcomes.items():
        lo, hi = wilson_interval(first.sum(axis=0), NUM_SCENES)
        cells = [f"{p:.3f} [{a:.3f}, {b:.3f}]" for p, a, b in zip(first.mean(axis=0), lo, hi, strict=True)]
        print(f"{name:<22}" + "".join(f"{c:>26}" for c in cells))
    """),
    md("""
    ## One moment of one scene

    The scene drawing uses the project's visual language: the road light grey with white markings, the ego deep
    orange, other vehicles slate grey, the goal as a dashed line across the goal lanes. We follow one scene whose ego is
    about to merge at the snapshot.
    """),
    code("""
    base_params = SimParams.from_scenario(base)
    snapshot = snapshots[base.name]
    scene_figure(snapshot.vehicles()[SCENE], base_params,
                 title=f"{base.name}, scene seed {SEED + SCENE}, t = {SNAPSHOT_S:.1f} s")
    """),
    md("""
    ## An episode as an animation

    `episode_frames` runs one scene with the rule-based ego and keeps every moment; `save_episode_animation` writes
    a GIF (or an MP4 where ffmpeg exists). The episode ends when the ego merges, collides or leaves the road. Below
    the animation, the frame at the end of the episode.
    """),
    code("""
    frames, outcome = episode_frames(base_params, seed=SEED + SCENE)
    gif = save_episode_animation(frames, base_params, OUT / "episode.gif", collided_at=outcome.collided_at,
                                 offroad_at=outcome.offroad_at, goal_at=outcome.goal_at, width_px=800,
                                 title=f"{base.name}   seed {SEED + SCENE}")
    print(f"{len(frames)} frames -> {gif}; {outcome}")
    display(Image(filename=str(gif)))
    last = len(frames) - 1
    PILImage.fromarray(render_rgb(frames[last], base_params, collided=outcome.collided,
                                  title=f"t = {last * base.dt_s:.1f} s: the last frame"))
    """),
    md("""
    ## As a gymnasium environment

    Every built-in scenario is registered as `wmplan/<CamelCaseName>-v0` when `wmplan` is imported. The registered
    environments take normalised actions in [-1, 1] (throttle or brake, steering); the observation is the
    ego-centred object list (the ego and its 8 nearest vehicles, 8 features each) and six road features. Gymnasium's
    own `check_env` checks the spaces and the reset/step contract.
    """),
    code("""
    env = gymnasium.make(env_id(SCENARIO), render_mode="rgb_array")
    check_env(env.unwrapped)
    print(f"{env_id(SCENARIO)}: check_env passed; actions {env.action_space}")
    obs, info = env.reset(seed=SEED)
    total = 0.0
    for _ in range(GYM_STEPS):
        obs, reward, terminated, truncated, info = env.step(np.array([0.2, 0.0], dtype=np.float32))  # light throttle
        total += reward
        if terminated or truncated:
            break
    print(f"after {info['step']} steps: reward {total:.3f}, ego speed {info['ego_speed_mps']:.1f} m/s; "
          f"objects {obs['objects'].shape}, road features {np.round(obs['road'], 2)}")
    picture = env.render()
    env.close()
    PILImage.fromarray(picture)
    """),
    md("""
    ## Oracle futures from a snapshot

    From the snapshot, the oracle rolls the true simulator forward many times under one plan of the ego (here the
    rule-based ego's own continuation over the next 3 s). Each future re-draws the random events — whether a
    driver lets the ego in, whether someone brakes hard. In `known` mode every driver keeps its hidden traits; in
    `resampled` mode the traits are drawn again from the scenario's distributions, as an observer who knows nothing
    about the drivers would have to assume. Look for the fan of each vehicle (teal): where a driver beside the ego
    may or may not yield, its futures split into two bundles; with re-drawn traits the fans widen.
    """),
    code("""
    snap = snapshot.take([SCENE])
    sub = round(PLAN_DT_S / base.dt_s)  # simulator steps per plan step
    st, plan = snap, []
    for _ in range(HORIZON_STEPS):  # the rule-based ego's own continuation, one action per plan step
        action = rule_actions(st, base_params)
        plan.append(action[0])
        for _ in range(sub):
            st, _ = step(st, action, base_params)
    plan = np.stack(plan)[None]  # (C = 1 plan, H, 2)
    futures = {mode: oracle_futures(snap, base_params, plan, NUM_FUTURES, mode=mode, plan_dt_s=PLAN_DT_S, seed=SEED)
               for mode in ("known", "resampled")}

    fig = Figure(figsize=(11, 3.2), layout="constrained")
    for ax, (mode, fut) in zip(fig.subplots(2, 1), futures.items(), strict=True):
        rows = fut.vehicles[0]  # (K, H, V, F) world frame
        same = (fut.vehicle_id[0] == snap.vehicle_id) & (rows[..., F_VALID] > 0.5)  # the snapshot's vehicles
        same[..., EGO] = False
        tracks = np.where(same[..., None], rows[..., [F_X, F_Y]], np.nan).transpose(0, 2, 1, 3)  # (K, V, H, 2)
        draw_scene(ax, snap.vehicles()[0], base_params, title=f"{mode}: {NUM_FUTURES} oracle futures over "
                   f"{HORIZON_STEPS * PLAN_DT_S:.0f} s, ego collides in {fut.collided.mean():.0%} of them")
        ax.add_collection(LineCollection(list(tracks.reshape(-1, HORIZON_STEPS, 2)), colors=style.ORACLE_FUTURE_COLOUR,
                                         alpha=style.ORACLE_FUTURE_ALPHA, linewidths=1.0, zorder=3))
        ax.plot(tracks[:, :, -1, 0].ravel(), tracks[:, :, -1, 1].ravel(), "o", ms=2.5, color=style.ORACLE_FUTURE_COLOUR,
                alpha=0.6, zorder=3)  # where each future ends
        ax.plot(rows[0, :, EGO, F_X], rows[0, :, EGO, F_Y], "--", color=style.EGO_COLOUR, lw=1.5, zorder=3)
        ax.set_xlabel("x along the road [m]")
        ax.set_ylabel("y across [m]")
    fig
    """),
    md("""
    The dashed orange line is the ego's plan (the same in every future). Notebook 02 trains a model to produce such
    fans from what an observer can see; notebook 03 plans with them.
    """),
]

# --- 02 -------------------------------------------------------------------------------------------------------------

NB02 = [
    md(f"""
    # 02 · Training the world model

    This notebook makes one dataset of every built-in scenario, trains two forward models of the other vehicles on
    it — the latent-variable model (a conditional VAE: one draw of its latent variable is one coherent future) and a
    deterministic network of the same size trained by least squares — and compares them at one held-out decision of
    `onramp-merge` with the oracle's true futures. The least-squares model predicts the *average* of the possible
    futures, a single blurred track that runs between the modes; the latent model should spread its samples over the
    modes as the oracle does. Last, `assess` scores both models and constant velocity on fresh episodes of every
    scenario, one row each: one model serves the whole library.

    {CAUTION}
    """),
    code(f"""
    import os
    from pathlib import Path

    {QUICK_LINE}
    SCENARIO = "onramp-merge"  # the scenario of the held-out decision below
    SEED = 0
    EPISODES = 8 if QUICK else 256  # of each built-in scenario: 6 x 256 episodes give about 100 k training windows
    TRAIN_MINUTES = 0.5 if QUICK else 4.5  # wall-clock cap per model
    TRAIN_EPOCHS = 2 if QUICK else 16  # the learning rate decays over these
    STEPS_PER_EPOCH = 25 if QUICK else 200
    BATCH_SIZE = 128 if QUICK else 256
    THREADS = 1 if QUICK else 2  # torch threads; the quick run's small batches go faster on one
    HELDOUT_SEED = 121  # the scene of the decision we look at (not among the training episodes) ...
    ANCHOR = 14  # ... and its decision step (0.2 s each): the ego merges, its neighbours' futures split
    NUM_FUTURES = 16 if QUICK else 32  # futures drawn per predictor at that decision
    ASSESS = dict(episodes=4, oracle_states=2, oracle_samples=4) if QUICK else dict(episodes=96, oracle_states=48,
                                                                                   oracle_samples=32)  # per scenario
    OUT = Path("runs/notebooks/02_train_world_model")
    """),
    code("""
    %matplotlib inline
    import shutil

    import numpy as np
    import torch

    from wmplan.data import simulate_dataset
    from wmplan.data.windows import Windows, WindowSpec, anchor_index
    from wmplan.model.assess import assess_scenarios, format_scenario_table
    from wmplan.model.checkpoint import load_model
    from wmplan.model.config import ModelConfig, TrainConfig
    from wmplan.model.train import train
    from wmplan.plan.predictors import ModelPredictor, OraclePredictor, make_context
    from wmplan.scenario import builtin_names, load_scenario
    from wmplan.sim import SimParams, initial_state, step
    from wmplan.sim.ego_rules import rule_actions
    from wmplan.viz import futures_figure, training_figure

    torch.set_num_threads(THREADS)
    OUT.mkdir(parents=True, exist_ok=True)
    """),
    md("""
    ## A dataset

    `simulate_dataset` rolls out episodes of each scenario in batches. Half of them are driven by the rule-based ego
    with a little noise, half by an *exploring* ego (random smooth accelerations and lane targets), so that the model
    sees the ego do many different things. The folder holds the arrays of all scenarios and one manifest that lists
    each scenario with its content hash, episode count and outcomes (`wmplan simulate all` does the same).
    Training cuts it into *windows*: a short history and the next 3 s of the ego and its 8 nearest vehicles, in the
    ego's frame at the decision.
    """),
    code("""
    library = [load_scenario(name) for name in builtin_names()]
    scn = load_scenario(SCENARIO)
    ds = simulate_dataset(library, OUT / "data", episodes=EPISODES, seed=SEED)
    m = ds.manifest
    print(f"{m['num_episodes']} episodes (at most {m['num_decisions']} decisions of {m['decision_dt_s']} s, "
          f"{m['num_vehicles']} vehicle slots); outcomes {m['outcomes']}")
    for e in m["scenarios"]:
        print(f"  {e['name']:<18} {e['num_episodes']} episodes x {e['num_decisions']} decisions, hash {e['hash'][:12]}")

    spec = WindowSpec()  # 5 steps of history, 15 of future, 8 other vehicles: the defaults of ModelConfig
    index = anchor_index(ds, spec)
    batch = Windows(ds, spec).batch(index[:4])
    print(f"{len(index)} training windows; one batch of 4: history {batch.history.shape}, future "
          f"{batch.future.shape}, ego actions {batch.actions.shape}")
    """),
    md("""
    ## Two models, trained in minutes

    Both models share the encoder (attention over the object list) and the decoder; the latent model adds a prior
    and a posterior over a small latent variable per vehicle and is trained on the evidence lower bound, the
    deterministic one on squared error. `train` writes a checkpoint (safetensors + JSON) after every epoch and a
    `metrics.csv`; a folder that already holds a model is refused, so this cell starts each model afresh.
    """),
    code("""
    train_cfg = TrainConfig(minutes=TRAIN_MINUTES, max_epochs=TRAIN_EPOCHS, steps_per_epoch=STEPS_PER_EPOCH,
                            batch_size=BATCH_SIZE, threads=THREADS, seed=SEED)
    runs = {}
    for name, model_cfg in (("latent", ModelConfig()), ("deterministic", ModelConfig(deterministic=True))):
        shutil.rmtree(OUT / name, ignore_errors=True)  # this notebook's own output from an earlier run
        runs[name] = train(OUT / "data", OUT / name, model_cfg=model_cfg, train_cfg=train_cfg)
        last = runs[name].history[-1]
        print(f"{name}: {runs[name].model.num_parameters()} parameters, {len(runs[name].history)} epochs in "
              f"{last['elapsed_s']:.0f} s; validation best-of-6 final displacement {last['val/min_fde_k6_m']:.2f} m")
    training_figure({name: run.history for name, run in runs.items()}, title="Training curves (dashed: validation)")
    """),
    md("""
    ## One held-out decision: sampled futures against the oracle's

    We drive a scene the models never saw with the rule-based ego up to the decision, keep the last five
    observations as the history, and take the ego's next 3 s of actions as the plan. Then three predictors answer
    the same question — what will the others do under this plan? — through the planner's predictor interface:

    * the latent model (violet): `NUM_FUTURES` samples,
    * the least-squares model (dark grey, dashed): its one prediction,
    * the oracle (teal): the true simulator branched from the true state, drivers' traits known, random events
      re-drawn.

    Both models are loaded back from their checkpoints with `load_model`. Look at the vehicles near the ego and at
    the dots where the futures end: the oracle's futures spread out (a driver lets the ego in or does not, brakes
    hard or does not), the dashed least-squares track follows their average — where they split into two bundles, a
    track between them, a future that never happens — and the violet samples of a well-trained latent model spread
    like the teal ones. (In quick mode the models have trained for seconds; judge them after a full run.)
    """),
    code("""
    params = SimParams.from_scenario(scn)
    assert HELDOUT_SEED not in m["episode_seeds"], "pick a scene seed the training data do not use"
    latent, _ = load_model(OUT / "latent")
    deterministic, _ = load_model(OUT / "deterministic")
    cfg = latent.cfg
    sub = round(cfg.plan_dt_s / scn.dt_s)  # simulator steps per decision
    state = initial_state(params, [HELDOUT_SEED])
    rows, ids, plan = [], [], []
    for t in range(ANCHOR + cfg.horizon):
        rows.append(state.vehicles())
        ids.append(state.vehicle_id)
        if t == ANCHOR:
            snapshot = state
        action = rule_actions(state, params)
        if t >= ANCHOR:
            plan.append(action)  # from the decision on, the ego's actions are the plan
        for _ in range(sub):
            state, _ = step(state, action, params)
    past = slice(ANCHOR - cfg.history + 1, ANCHOR + 1)
    ctx = make_context(params, snapshot, np.stack(rows[past], axis=1), np.stack(ids[past], axis=1), cfg.num_objects)
    plan = torch.from_numpy(np.stack(plan, axis=1)).float()[:, None]  # (B = 1, C = 1, H, 2)

    predictors = {"latent": ModelPredictor(latent, "latent"),
                  "deterministic": ModelPredictor(deterministic, "deterministic"),
                  "oracle": OraclePredictor(params, latent.ego, cfg.plan_dt_s)}
    gen = torch.Generator().manual_seed(SEED)
    futures = {name: p.predict(ctx, plan, NUM_FUTURES, generator=gen)[0, 0].numpy() for name, p in predictors.items()}
    futures_figure(ctx.history[0].numpy(), futures["latent"], futures["oracle"], params,
                   deterministic_rows=futures["deterministic"][0], anchor_pose=ctx.ego_pose[0],
                   model_label="latent model",
                   title=f"Scene seed {HELDOUT_SEED}, t = {ANCHOR * cfg.plan_dt_s:.1f} s: futures over the next "
                         f"{cfg.horizon * cfg.plan_dt_s:.0f} s")
    """),
    md("""
    ## Assessment on fresh episodes

    `assess_scenarios` simulates episodes of each scenario with seeds no dataset uses and scores each predictor on
    them (keys as in `wmplan.model.assess`):

    * `min_ade_k6_m`, `min_fde_k6_m`: best of 6 futures, mean and final displacement error (m);
    * `nll`: negative log-likelihood of the true positions under the predictive mixture (nats; lower is better);
    * `coverage_90`: share of true coordinates inside the central 90% interval (0.90 is calibrated);
    * `energy_distance`: distance between the model's and the oracle's distributions of futures, same states and
      plans (m; lower is better);
    * `collision_prob_gap`: mean |P_model(collision) − P_oracle(collision)| over the oracle states and plans.

    The table has one row per scenario: the latent model's errors against constant velocity and least squares, and
    the ratios of the final errors (below 1: the latent model is better). With the quick settings the numbers are
    noisy and the models undertrained; run without `WMPLAN_QUICK` for the real budget.
    """),
    code("""
    result = assess_scenarios(OUT / "latent", library, deterministic_dir=OUT / "deterministic", seed=SEED, **ASSESS)
    print(format_scenario_table(result["table"]))
    one = result["by_scenario"][SCENARIO]  # every scenario's full result is kept
    print(f"\\n{SCENARIO}: {one['heldout_windows']} held-out windows from {one['heldout_episodes']} episodes; "
          f"{one['oracle_states']} oracle states x {one['oracle_plans_per_state']} plans x "
          f"{one['oracle_samples']} futures; oracle collision probability {one['oracle_collision_prob_mean']}")
    """),
    md("""
    The latent model is what notebook 03 plans with: it looks for `runs/notebooks/02_train_world_model/latent`.
    """),
]

# --- 03 -------------------------------------------------------------------------------------------------------------

NB03 = [
    md(f"""
    # 03 · Planning under uncertainty

    The sampling planner proposes candidate plans for the ego (a target lane and a smooth acceleration profile),
    rolls each through a *predictor*'s sampled futures of the other vehicles, scores progress, comfort and collision
    risk, applies the first action of the best plan and repeats every 0.2 s. This notebook builds the planner with
    three predictors — constant velocity, the oracle (the true simulator) and the latent model of notebook 02 —
    and puts it in a harder variant of the on-ramp merge: dense main lanes whose drivers brake hard often. It looks
    inside one decision (the candidates, their futures and their risk), then compares the planners and the
    rule-based ego in closed loop on two scenarios — that variant and `short-gap-cut-in`, where a neighbour's
    hidden intent decides the outcome — each planner paired with the oracle planner on the same scenes, and checks
    whether the predicted collision probabilities are calibrated.

    {CAUTION}
    """),
    code(f"""
    import os
    from pathlib import Path

    {QUICK_LINE}
    SCENARIO = "onramp-merge"
    CUT_IN_SCENARIO = "short-gap-cut-in"  # the second scenario of the closed loop
    DENSITY_VEH_PER_KM = [4.0, 50.0, 36.0]  # the variant we plan in: dense main lanes (lane 0 is the ramp) ...
    HARD_BRAKES_PER_MIN = 6.0  # ... whose drivers brake hard often
    SEED = 0
    MODEL_DIR = Path("runs/notebooks/02_train_world_model/latent")  # notebook 02's model; trained here if missing
    PLANNERS = ("rules", "mpc+constant-velocity", "mpc+oracle", "mpc+latent")
    REFERENCE = "mpc+oracle"  # every other planner is compared with it, scene by scene
    NUM_CANDIDATES = 16 if QUICK else 64  # candidate plans per decision
    NUM_FUTURES = 4 if QUICK else 8  # sampled futures per candidate
    EPISODES = 8 if QUICK else 40  # closed-loop episodes per planner and scenario (the same scenes for every planner)
    SCENE_SEED = 37  # the scene of the decision we look inside ...
    DECISION = 15  # ... and its decision step (0.2 s each): many of the ego's possible plans are risky
    THREADS = 1  # torch threads: the planner's tensors are small, one thread is fastest
    OUT = Path("runs/notebooks/03_plan_under_uncertainty")
    """),
    code("""
    %matplotlib inline
    import time

    import numpy as np
    import torch

    from wmplan.data import simulate_dataset
    from wmplan.caution import CAUTION
    from IPython.display import display

    from wmplan.evaluate.compare import compare_planners
    from wmplan.evaluate.paired import clear_differences, comparison_table
    from wmplan.evaluate.planners import make_planner
    from wmplan.evaluate.tables import format_table
    from wmplan.model.checkpoint import load_model
    from wmplan.model.config import TrainConfig
    from wmplan.model.train import train
    from wmplan.plan.mpc import PlannerConfig
    from wmplan.plan.predictors import make_context
    from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
    from wmplan.sim import SimParams, initial_state, step
    from wmplan.sim.ego_rules import rule_actions
    from wmplan.viz import candidate_arrays, candidates_figure, closed_loop_figure, reliability_figure
    from wmplan.viz.plots import paired_difference_figure

    torch.set_num_threads(THREADS)
    OUT.mkdir(parents=True, exist_ok=True)
    base = load_scenario(SCENARIO)
    data = scenario_to_dict(base)
    data["name"] = f"{SCENARIO}-dense-braking"
    data["traffic"]["density_veh_per_km"] = DENSITY_VEH_PER_KM
    data["drivers"]["hard_brake_rate_per_min"] = HARD_BRAKES_PER_MIN
    scn = parse_scenario(data, source="notebook 03: dense variant")
    params = SimParams.from_scenario(scn)
    """),
    md("""
    ## The latent model

    If notebook 02 has run in this folder, its model is used. Otherwise a small one is trained here on a small
    dataset in about a minute — enough to run the notebook, too little to plan well: for real numbers run
    notebook 02 (or `wmplan train`) first. Either way the model learnt the base scenario's traffic; the dense
    variant is new to it, which is part of the test.
    """),
    code("""
    if not (MODEL_DIR / "latest").is_file():
        MODEL_DIR = OUT / "latent"
        if not (MODEL_DIR / "latest").is_file():
            simulate_dataset(base, OUT / "data", episodes=64, seed=SEED)
            train(OUT / "data", MODEL_DIR, train_cfg=TrainConfig(minutes=0.5, max_epochs=2, steps_per_epoch=25,
                                                                  batch_size=128, threads=THREADS, seed=SEED))
    model, meta = load_model(MODEL_DIR)
    print(f"latent model {MODEL_DIR}: {model.num_parameters()} parameters, "
          f"trained on {meta['dataset']['num_episodes']} "
          f"episodes of {meta['dataset']['scenario_name']} for {meta['epoch'] + 1} epochs")
    """),
    md("""
    ## The planners

    `make_planner` builds a planner from its name (the same names the command line takes, or an import path of
    your own); the sampling planners run CEM over the candidates by default around a predictor; `"rules"` is the
    rule-based ego, which predicts nothing. All sampling planners share one configuration.
    """),
    code("""
    cfg = PlannerConfig(num_candidates=NUM_CANDIDATES, num_futures=NUM_FUTURES)
    options = {"model": MODEL_DIR, "config": cfg}
    planners = {name: make_planner(name, params, options) for name in PLANNERS if name != "rules"}
    print(f"{cfg.sampler.upper()}, {cfg.num_candidates} candidates x {cfg.num_futures} futures "
          f"x {cfg.horizon} steps of "
          f"{cfg.plan_dt_s} s, risk as a {cfg.risk_mode} (weight {cfg.weights.collision} per unit of P(collision))")
    """),
    md("""
    ## Inside one decision

    We drive one scene with the rule-based ego up to the decision and hand the same situation to each planner.
    `plan(..., keep=True)` returns, besides the action, every candidate with its cost, its predicted collision
    probability (the share of its futures in which the ego touches another vehicle, with a Wilson interval) and
    the futures themselves.
    """),
    code("""
    sub = round(cfg.plan_dt_s / scn.dt_s)
    state = initial_state(params, [SCENE_SEED])
    rows, ids = [state.vehicles()], [state.vehicle_id]
    for _ in range(DECISION):  # the rule-based ego drives up to the decision
        action = rule_actions(state, params)
        for _ in range(sub):
            state, _ = step(state, action, params)
        rows.append(state.vehicles())
        ids.append(state.vehicle_id)
    hist = model.cfg.history
    ctx = make_context(params, state, np.stack(rows[-hist:], axis=1), np.stack(ids[-hist:], axis=1),
                       model.cfg.num_objects)

    decisions = {}
    for name, planner in planners.items():
        planner.reset_state(1)
        t0 = time.perf_counter()
        decisions[name] = res = planner.plan(ctx, generator=torch.Generator().manual_seed(SEED), keep=True)
        lo, hi = res.p_collision_ci[0]
        print(f"{name:<24} accel {res.action[0, 0]:+5.2f} m/s2, steer {res.action[0, 1]:+.3f} rad;  chosen plan: "
              f"P(collision) {res.p_collision[0]:.2f} [{lo:.2f}, {hi:.2f}], min TTC {res.min_ttc_s[0]:5.1f} s;  "
              f"{(time.perf_counter() - t0) * 1e3:.0f} ms")
    """),
    md("""
    The candidates of the planner with the latent model: each line is the ego's path under one plan, coloured by its
    predicted collision probability; the chosen plan is outlined, and the violet fans are the latent model's futures
    under it. Below, every candidate's cost against its risk: the planner trades progress against risk, and the
    collision term dominates the cost once the risk is more than a few per cent.
    """),
    code("""
    here = dict(current=ctx.history[0, -1].numpy(), params=params, anchor_pose=ctx.ego_pose[0])
    candidates_figure(**candidate_arrays(decisions["mpc+latent"]), **here,
                      title=f"mpc+latent at t = {DECISION * cfg.plan_dt_s:.1f} s, scene seed {SCENE_SEED}")
    """),
    md("""
    The same decision planned with the oracle's futures (drawn again in violet, as the planner's futures): the risk
    it sees is the true risk of each plan, up to the sampling error of a few futures.
    """),
    code("""
    candidates_figure(**candidate_arrays(decisions["mpc+oracle"]), **here,
                      title=f"mpc+oracle at t = {DECISION * cfg.plan_dt_s:.1f} s, scene seed {SCENE_SEED}")
    """),
    md("""
    ## Closed loop on two scenarios

    Each planner now drives `EPISODES` episodes in the true simulator, in two scenarios: the dense on-ramp variant
    above, and `short-gap-cut-in`: a neighbour stuck behind a slow truck in the next lane may or may not swerve
    into the ego's lane a few metres ahead of it. Whether it does is a hidden trait of its driver, drawn anew
    every episode; the only cue is its lateral motion once it has begun. A planner that only extrapolates what it
    sees (constant velocity) learns of the swerve late; one that weighs the possible futures can ease off early.

    Every planner meets the same scenes, so each is compared with the oracle planner scene by scene (`compare_planners`
    is what `wmplan evaluate` runs): differences planner minus oracle with paired 95% intervals (Newcombe's method
    10 for rates, paired t for means), exact McNemar p-values, and the number of scenes needed for 80% power. Where
    neither planner ever failed, the table says in words that the comparison has no power. Rates alone carry
    Wilson 95% intervals; with few episodes they are wide, which is the honest answer.
    """),
    code("""
    scenarios = {scn.name: scn, CUT_IN_SCENARIO: load_scenario(CUT_IN_SCENARIO)}
    runs = {}
    for name, s in scenarios.items():
        t0 = time.perf_counter()
        runs[name], _ = compare_planners(s, PLANNERS, episodes=EPISODES, seed=SEED, options=options,
                                         batch_size=EPISODES, reference=REFERENCE)
        print(f"{name}: {len(PLANNERS)} planners x {EPISODES} episodes in {time.perf_counter() - t0:.0f} s")
        print(format_table(runs[name]["results"]))
        print()
        print(comparison_table(runs[name]["comparisons"]))
        print()
    print(CAUTION)
    for name, summary in runs.items():
        display(closed_loop_figure(summary["results"], title=f"{name}: {EPISODES} episodes per planner"))
    """),
    md("""
    The paired differences to the oracle planner, one figure per scenario: a filled point is a difference whose 95%
    interval excludes zero, a hollow one could be chance. In the dense on-ramp variant collisions are rare, so the
    collision comparisons there often have no power; in `short-gap-cut-in` the planner that trusts constant velocity
    collides where the oracle does not. Below the figures, every difference whose interval excludes zero, in words.
    """),
    code("""
    for name, summary in runs.items():
        display(paired_difference_figure(summary, title=f"{name}: paired differences to {REFERENCE}, 95% intervals"))
    for name, summary in runs.items():
        clear = clear_differences(summary["comparisons"])
        print(f"{name}:")
        for d in clear:
            print("   ", d["text"])
        if not clear:
            print(f"    no difference to {REFERENCE} has a 95% interval that excludes zero at {EPISODES} episodes")
    """),
    md("""
    ## Calibration

    At every decision a sampling planner predicts the collision probability of the plan it chose; the evaluation
    records whether the ego then collided within that plan's horizon. A reliability diagram bins the predictions and
    compares each bin's mean prediction with the observed frequency (on the diagonal is calibrated). Brier score and
    expected calibration error (ECE) summarise it. With few episodes and fewer collisions the bins are nearly empty:
    run without `WMPLAN_QUICK` and look again. The diagram shows `short-gap-cut-in`, where collisions happen.
    """),
    code("""
    for name, summary in runs.items():
        for planner, c in summary["calibration"].items():
            if c.get("decisions"):
                print(f"{name:<28} {planner:<24} {c['decisions']:>6} decisions, with P > 0.01: "
                      f"{c['decisions_p_above_0_01']:>5}, mean predicted {c['mean_predicted']:.4f}, observed "
                      f"{c['observed_rate']:.4f}, Brier {c['brier']:.4f}, ECE {c['ece']:.4f}")
    reliability_figure(runs[CUT_IN_SCENARIO]["calibration"],
                       title=f"{CUT_IN_SCENARIO}: predicted collision probability of the chosen plan vs what happened")
    """),
]

# --- 04 -------------------------------------------------------------------------------------------------------------

NB04 = [
    md(f"""
    # 04 · Sweeps and stress tests

    A single closed-loop table answers "how safe is this planner in this scenario". This notebook asks *where* it
    breaks. First a sweep: a small sweep file, written in code, varies the main-lane density and the drivers'
    willingness to let a merging car in, and runs two planners over every combination on a local process pool;
    the result is a heatmap of collision rates with intervals. Then a stress test searches the scenario's knobs and
    the traffic's random events for failures, estimates how likely a failure is under the nominal variation, and
    saves every failure it finds as a scenario file — which we replay and watch.

    {CAUTION}
    """),
    code(f"""
    import os
    from pathlib import Path

    {QUICK_LINE}
    SCENARIO = "onramp-merge"
    SEED = 0
    WORKERS = 2  # processes of the local pool
    DENSITIES = [12.0, 36.0] if QUICK else [12.0, 24.0, 36.0, 48.0]  # lane 1 (the lane the ego merges into), veh/km
    YIELD_PROBS = [0.2, 0.8] if QUICK else [0.1, 0.5, 0.9]  # mean probability that a driver lets the ego in
    SWEEP_PLANNERS = ["rules", "mpc+constant-velocity"]
    MPC_OPTIONS = {{"num_candidates": 16, "num_futures": 4}} if QUICK else {{"num_candidates": 32, "num_futures": 8}}
    EPISODES_PER_CELL = 4 if QUICK else 32
    STRESS_PLANNER = "rules"  # any registered planner; the sampling ones cost far more episodes per second
    STRESS_DENSITY = [4.0, 50.0, 36.0]  # the stressed variant: dense traffic ...
    STRESS_HARD_BRAKES_PER_MIN = 6.0  # ... whose drivers brake hard often ...
    STRESS_EGO_BRAKE = 3.0  # ... on a snowy road: the ego brakes at 3 m/s^2 at most (8 on a dry road)
    STRESS_BUDGET = 120 if QUICK else 1000  # episodes per estimator (importance sampling; plain Monte Carlo)
    OUT = Path("runs/notebooks/04_sweeps_and_stress")
    """),
    code("""
    %matplotlib inline
    import json
    import time

    import numpy as np
    import yaml
    from IPython.display import Image, display
    from PIL import Image as PILImage

    from wmplan.io import atomic_write_text
    from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
    from wmplan.sim import SimParams
    from wmplan.stress import replay, run_stress
    from wmplan.sweep import load_sweep, read_results, run_sweep
    from wmplan.sweep.plots import heatmap_figure
    from wmplan.viz import render_rgb
    from wmplan.viz.anim import episode_frames, save_episode_animation

    OUT.mkdir(parents=True, exist_ok=True)
    """),
    md("""
    ## A sweep file, written in code

    A sweep file names a base scenario, the values to vary (dotted paths into the scenario), the planners and the
    seeds. Every combination of values and planners is a *cell*; all planners of a combination meet the same
    traffic (the episode seeds depend on the combination only).
    """),
    code("""
    sweep_file = OUT / "merge-density-yield.yaml"
    atomic_write_text(sweep_file, yaml.safe_dump({
        "name": "notebook-merge-density-yield",
        "description": "On-ramp merge: main-lane density x yield probability, rule-based ego vs sampling planner.",
        "base": SCENARIO,
        "vary": {"traffic.density_veh_per_km[1]": DENSITIES, "drivers.yield_prob.mean": YIELD_PROBS},
        "planners": SWEEP_PLANNERS,
        "planner_options": {"mpc+constant-velocity": MPC_OPTIONS},
        "seed": SEED,
        "episodes_per_cell": EPISODES_PER_CELL,
    }, sort_keys=False))
    print(sweep_file.read_text(encoding="utf-8"))
    sweep = load_sweep(sweep_file)
    """),
    md("""
    ## Running it

    `run_sweep` sends one task per cell to a pool of `WORKERS` processes and writes each finished cell to its own
    Parquet file at once, so a rerun skips the cells already done (run this cell twice: the second time is
    instant). At the end it rebuilds `results.parquet` (one row per episode), `summary.json` and a plot.
    """),
    code("""
    t0 = time.perf_counter()
    summary = run_sweep(sweep, OUT / "sweep", workers=WORKERS, progress=False)
    print(f"{summary['cells_done']} of {summary['num_cells']} cells, {summary['num_episodes']} episodes, "
          f"{time.perf_counter() - t0:.0f} s; {read_results(OUT / 'sweep').num_rows} rows in results.parquet\\n")
    for c in sorted(summary["cells"], key=lambda c: (c["planner"], *c["params"].values())):
        values = ", ".join(f"{path} = {v}" for path, v in c["params"].items())
        lo, hi = c["collision_ci95"]
        print(f"{c['planner']:<23}{values:<66} collision {c['collision_rate']:.2f} [{lo:.2f}, {hi:.2f}]  "
              f"success {c['success_rate']:.2f}  n = {c['n']}")
    """),
    md("""
    Collision rate per cell, one panel per planner; each square is labelled with the rate and its Wilson 95%
    interval. With a handful of episodes per cell the intervals are wide: a square at 0 means "no collision seen",
    not "safe".
    """),
    code("""
    path_x, path_y = list(sweep.spec.vary)
    heatmap_figure(summary["cells"], path_x, path_y, summary["planners"],
                   title=f"{sweep.spec.name}: collision rate ({EPISODES_PER_CELL} episodes per cell)")
    """),
    md("""
    ## A stress test

    We stress a harder variant of the scenario (denser traffic, frequent hard braking, a snowy road on which the ego
    brakes at 3 m/s^2 at most), built in code. The stress test turns six scenario *knobs* (density, yield
    probability, hard-braking rate, desired speed, the ego's start speed and its braking limit) into standard-normal
    coordinates and

    1. searches them, together with the traffic's random events, for failures (collision or leaving the road) with
       the multilevel cross-entropy method, which moves the sampling distribution toward the failures step by step;
    2. estimates the failure probability under the nominal knob distribution by importance sampling from the last
       of those distributions, with a 95% interval and the effective sample size;
    3. compares it with plain Monte Carlo at the same number of episodes.
    """),
    code("""
    data = scenario_to_dict(load_scenario(SCENARIO))
    data["name"] = f"{SCENARIO}-stressed"
    data["traffic"]["density_veh_per_km"] = STRESS_DENSITY
    data["drivers"]["hard_brake_rate_per_min"] = STRESS_HARD_BRAKES_PER_MIN
    data["limits"]["max_brake_mps2"] = STRESS_EGO_BRAKE
    stressed = parse_scenario(data, source="notebook 04: stressed variant")

    t0 = time.perf_counter()
    report = run_stress(stressed, STRESS_PLANNER, STRESS_BUDGET, OUT / "stress", seed=SEED, workers=WORKERS,
                        progress=False)
    fp, mc = report["failure_prob"], report["plain_mc"]
    print(f"{report['simulations']} episodes in {time.perf_counter() - t0:.0f} s; {report['failures_found']} distinct "
          f"failures of {STRESS_PLANNER} ({report['failure_definition']})")
    print(f"failure probability, importance sampling: {fp['estimate']:.3g}  95% interval [{fp['ci95'][0]:.3g}, "
          f"{fp['ci95'][1]:.3g}], effective sample size {fp['ess']:.1f}")
    print(f"failure probability, plain Monte Carlo:   {mc['estimate']:.3g}  95% interval [{mc['ci95'][0]:.3g}, "
          f"{mc['ci95'][1]:.3g}] from {mc['n']} episodes")
    """),
    md("""
    The failures found, most plausible under the nominal distribution first. Each is saved as a scenario file with
    the knob values applied, plus a JSON record of the planner, the scene seed and what happened.
    """),
    code("""
    assert report["failures_saved"], (
        "no failure found within the budget: raise STRESS_BUDGET or stress a harder variant")
    failure_files = [OUT / "stress" / "failures" / name for name in report["failures_saved"]]
    for path in failure_files:
        info = json.loads(path.read_text(encoding="utf-8"))
        what = "collision" if info["outcome"]["collision"] else "off the road"
        knobs = ", ".join(f"{k} {np.round(v['value'], 2).tolist()}" for k, v in info["knobs"].items())
        print(f"{path.stem}: {what} after {info['outcome']['time_s']:.1f} s ({info['stage']}); {knobs}")
    """),
    md("""
    ## Replaying a failure

    The simulator is deterministic given the scenario and the scene seed, so a saved failure replays exactly:
    `replay` runs it again with its planner and says whether it fails again. Then we draw the episode (the
    rule-based ego, stepped as the stress test stepped it) and show the moment of the failure.
    """),
    code("""
    first = failure_files[0]
    info = json.loads(first.read_text(encoding="utf-8"))
    print(f"{first.name}: fails again on replay: {replay(first)}")
    variant = load_scenario(first.parent / info["scenario_file"])
    vparams = SimParams.from_scenario(variant)
    frames, outcome = episode_frames(vparams, info["seed"])  # the rule-based ego (STRESS_PLANNER = "rules")
    gif = save_episode_animation(frames, vparams, OUT / "failure.gif", collided_at=outcome.collided_at,
                                 offroad_at=outcome.offroad_at, goal_at=outcome.goal_at, width_px=800,
                                 title=f"{info['planner']}, seed {info['seed']}")
    display(Image(filename=str(gif)))
    t_fail = outcome.collided_at if outcome.collided else outcome.offroad_at
    PILImage.fromarray(render_rgb(frames[t_fail], vparams, collided=outcome.collided,
                                  title=f"t = {t_fail * variant.dt_s:.1f} s: the failure"))
    """),
    md("""
    The scenario file beside the record is an ordinary scenario: load it, sweep around it, or hand it to
    `wmplan evaluate` with another planner to see whether that one copes.
    """),
]

NOTEBOOKS = {
    "01_traffic_sandbox": NB01,
    "02_train_world_model": NB02,
    "03_plan_under_uncertainty": NB03,
    "04_sweeps_and_stress": NB04,
}


def build(stem: str, cells: list[tuple[str, str]]) -> nbformat.NotebookNode:
    """A notebook without outputs, with stable cell ids (``<stem>-<index>``) so that rebuilding changes nothing."""
    nb = nbformat.v4.new_notebook()
    nb.metadata = {
        "kernelspec": {"display_name": "Python 3 (ipykernel)", "language": "python", "name": "python3"},
        "language_info": {"name": "python"},
    }
    for i, (kind, text) in enumerate(cells):
        cell = nbformat.v4.new_markdown_cell(text) if kind == "markdown" else nbformat.v4.new_code_cell(text)
        cell.id = f"{stem.split('_')[0]}-{i:02d}"
        nb.cells.append(cell)
    nbformat.validate(nb)
    return nb


def rendered() -> dict[Path, str]:
    """The text of every notebook file as this script writes it."""
    return {HERE / f"{stem}.ipynb": nbformat.writes(build(stem, cells)) + "\n" for stem, cells in NOTEBOOKS.items()}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="only check that the notebooks on disk are up to date")
    args = parser.parse_args(argv)
    stale = []
    for path, text in rendered().items():
        if args.check:
            if not path.is_file() or path.read_text(encoding="utf-8") != text:
                stale.append(path.name)
        else:
            from wmplan.io import atomic_write_text

            atomic_write_text(path, text)
            print(f"wrote {path}")
    if stale:
        print(f"out of date: {', '.join(stale)}; run python notebooks/_build.py", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
