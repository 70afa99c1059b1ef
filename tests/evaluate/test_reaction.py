"""The braking-reaction assessment (wmplan/evaluate/reaction.py) on a worked example.

One lane, no random traffic, the ego at 100 km/h and one vehicle about 20 m behind it. Under the constant-velocity
predictor the follower keeps its velocity, so its bumper gap to the ego at time t of a plan of constant
acceleration a is ``g0 + (v_ego - v_follower) t + a t^2 / 2`` (constant-acceleration kinematics, common practice, no
source: docs/references.md#practice-kinematics; the ego does not stop within the 3 s horizon from 27.8 m/s at
8 m/s^2). The assessment's smallest gap of each plan must equal that formula's smallest value over the horizon's
steps, and a gap that closes fully (braking at 8 m/s^2: 36 m in 3 s) must count as being run into from behind.
The oracle's follower is the simulator's IDM driver, which brakes when its leader does
(docs/references.md#treiber-2000-idm): at the end of a full braking it is slower than the constant-velocity one.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

from wmplan.data import collect
from wmplan.evaluate.reaction import PLANS, braking_reaction, follower_index
from wmplan.plan.mpc import FIRM_BRAKE_MPS2, PlannerConfig
from wmplan.plan.predictors import NUM_OBJECTS, builtin_predictor, make_context
from wmplan.scenario import load_scenario, parse_scenario, scenario_to_dict
from wmplan.sim import SimParams
from wmplan.sim.features import F_LENGTH, F_VX, F_X
from wmplan.sim.state import TrafficState

SPEED_MPS = 100 / 3.6
W = 5


def _follower_behind() -> SimParams:
    d = copy.deepcopy(scenario_to_dict(load_scenario("open-road")))
    d["name"] = "follower-behind"
    d["road"]["lanes"] = [{"start_m": 0.0}]
    d["ego"]["lane"] = 0
    d["ego"]["goal"]["lanes"] = [0]
    d["ego"]["speed_mps"] = SPEED_MPS
    d["road"]["speed_limit_mps"] = SPEED_MPS
    d["traffic"]["density_veh_per_km"] = [0.0]
    d["traffic"]["window_behind_m"] = 80.0
    d["traffic"]["placed"] = [{"lane": 0, "offset_m": -25.0, "speed_mps": SPEED_MPS, "desired_speed_mps": SPEED_MPS}]
    d["drivers"]["hard_brake_rate_per_min"] = 0.0
    d["duration_s"] = 3.0
    return SimParams.from_scenario(parse_scenario(d, source="follower-behind"))


def _states(params: SimParams, seeds: list[int]) -> tuple[TrafficState, np.ndarray, np.ndarray]:
    snaps = {}

    def keep(t, state):
        if t == W - 1:
            snaps[t] = state

    traj = collect(params, np.asarray(seeds), policy_mix=0.0, on_decision=keep)
    return snaps[W - 1], traj.vehicles[:, :W], traj.vehicle_id[:, :W]


def test_constant_velocity_follower_gaps_follow_the_kinematics_and_the_oracle_follower_brakes():
    params = _follower_behind()
    state, rows, ids = _states(params, [1, 2])
    cfg = PlannerConfig()
    cv = builtin_predictor("constant-velocity", params, horizon=cfg.horizon, plan_dt_s=cfg.plan_dt_s)
    out = braking_reaction(params, state, rows, ids, {"cv": cv}, samples=4, seed=0, cfg=cfg)
    assert out["states"] == 2 and out["states_with_follower_in_object_list"] == 2
    ctx = make_context(params, state, rows, ids, NUM_OBJECTS)
    f = follower_index(ctx, params.lane_width_m)
    last = ctx.history[:, -1].double().numpy()
    t = cfg.plan_dt_s * np.arange(1, cfg.horizon + 1)
    for s in range(2):
        ego, fol = last[s, 0], last[s, f[s]]
        g0 = -fol[F_X] - 0.5 * (ego[F_LENGTH] + fol[F_LENGTH])
        assert 15.0 < g0 < 25.0
        v_e = float(ctx.ego_speed_mps[s])
        for c, a in enumerate((0.0, -FIRM_BRAKE_MPS2, -params.max_brake_mps2)):
            expected = (g0 + (v_e - fol[F_VX]) * t + 0.5 * a * t**2).min()
            got = out["per_state"]["cv"]["min_gap"][c][s]
            assert got == pytest.approx(expected, abs=0.05), (PLANS[c], s)
    cv_res, oracle = out["predictors"]["cv"], out["predictors"]["oracle"]
    assert cv_res["keep-speed"]["p_from_behind_mean"] == 0.0
    assert cv_res["brake-fully"]["p_from_behind_mean"] == 1.0
    assert cv_res["brake-fully"]["p_from_behind_abs_err"] == pytest.approx(
        1.0 - oracle["brake-fully"]["p_from_behind_mean"]
    )
    assert cv_res["brake-fully"]["follower_end_speed_err_mps"] > 2.0  # the oracle's follower slowed down
    assert oracle["brake-fully"]["follower_min_gap_err_m"] == 0.0


def test_the_oracle_name_is_reserved():
    params = _follower_behind()
    state, rows, ids = _states(params, [3])
    with pytest.raises(ValueError, match="oracle"):
        braking_reaction(params, state, rows, ids, {"oracle": None}, samples=2)


@pytest.mark.parametrize(
    ("module", "argv", "flag"),
    [
        ("braking_reaction", ["--model", "no-equals-sign"], "--model"),
        ("braking_reaction", ["--model", "oracle=somewhere"], "--model"),
        ("braking_reaction", ["--states", "0"], "--states"),
        ("from_behind_discount", ["--model", "a=b", "--shares", "0.25,2"], "--shares"),
        ("from_behind_discount", ["--shares", "0.25"], "--model"),
    ],
)
def test_the_scripts_refuse_bad_flags_in_one_line(module, argv, flag, capsys):
    """Bad input: exit status 2 and one line naming the flag, before any simulation."""
    import importlib

    main = importlib.import_module(f"benchmarks.{module}").main
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and flag in err
