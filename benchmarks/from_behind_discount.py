"""Whether the planner still needs its discount on being run into from behind (``CostWeights.from_behind``).

Runs mpc+latent with each latent model given and each share of the collision penalty charged for futures whose
first near contact is a vehicle coming up from behind (``--shares``, e.g. 0.25 and 1.0 = no discount) on every
scenario, on common scene seeds, and reports per scenario, model and share the success and collision rates
(Wilson 95 % intervals), the collisions by side and the mean speed, plus the paired comparison of each share with
the first one (same model, same seeds: differences with Newcombe intervals and exact McNemar p-values).

The built-in scenarios seldom put the discount to work, so the run also has ``stopped-ahead-follower-behind``
(``--scenarios`` may name it): one lane, no random traffic, the ego at 100 km/h, a stopped vehicle 60 m ahead and
a vehicle 20 m behind at the same speed, 8 s. Every plan that stops in time is predicted to be run into from
behind unless the predictor foresees the follower braking; the simulator's follower does brake.

Usage: ``python benchmarks/from_behind_discount.py --model old=runs/latent-old --model new=runs/latent
[--shares 0.25,1.0] [--scenarios a,b] [--episodes 100] [--seed 5] [--json FILE]``. Importing this module runs
nothing. Results on a simplified traffic model certify nothing about a real vehicle.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError, WmplanError
from wmplan.evaluate.closed_loop import evaluate_planner
from wmplan.evaluate.paired import paired_comparison
from wmplan.evaluate.tables import summarise_planner
from wmplan.io import atomic_write_json
from wmplan.plan.mpc import CostWeights, PlannerConfig
from wmplan.scenario import Scenario, builtin_names, load_scenario, parse_scenario, scenario_to_dict

KEYS = ("success_rate", "success_ci95", "collision_rate", "collision_ci95", "collisions_by_contact_side")
KEYS += ("mean_speed_mps", "mean_speed_ci95", "timeout_rate")
STOPPED_AHEAD = "stopped-ahead-follower-behind"
SPEED_MPS = 100 / 3.6


def stopped_ahead_follower_behind() -> Scenario:
    """The scenario ``STOPPED_AHEAD`` (module docstring), from open-road; the speed limit makes the planner's target
    speed 100 km/h."""
    from wmplan.plan.mpc import PlannerConfig

    d = scenario_to_dict(load_scenario("open-road"))
    d["name"] = STOPPED_AHEAD
    d["road"]["lanes"] = [{"start_m": 0.0}]
    d["road"]["speed_limit_mps"] = SPEED_MPS / PlannerConfig().target_speed_fraction
    d["ego"].update(lane=0, speed_mps=SPEED_MPS)
    d["ego"]["goal"]["lanes"] = [0]
    d["traffic"].update(density_veh_per_km=[0.0], window_ahead_m=400.0, window_behind_m=60.0)
    d["traffic"]["placed"] = [
        {"lane": 0, "offset_m": 60.0 + 4.7, "speed_mps": 0.0, "desired_speed_mps": 0.1, "politeness": 0.0},
        {"lane": 0, "offset_m": -25.0, "speed_mps": SPEED_MPS, "desired_speed_mps": SPEED_MPS},
    ]
    d["drivers"]["hard_brake_rate_per_min"] = 0.0
    d["duration_s"] = 8.0
    return parse_scenario(d, source=STOPPED_AHEAD)


def _scenario(name: str) -> Scenario:
    return stopped_ahead_follower_behind() if name == STOPPED_AHEAD else load_scenario(name)


def one(scenario: str, model_dir: str, share: float, *, episodes: int, seed: int) -> tuple[dict, list[dict]]:
    """Summary and rows of mpc+latent with ``from_behind = share`` on one scenario."""
    cfg = PlannerConfig(weights=CostWeights(from_behind=share))
    out = evaluate_planner(
        _scenario(scenario),
        "mpc+latent",
        episodes=episodes,
        seed=seed,
        options={"model": model_dir, "config": cfg, "threads": 1},
    )
    summary = summarise_planner(out.rows)
    return {k: summary[k] for k in KEYS}, out.rows


def run(models: dict[str, str], shares: list[float], scenarios: list[str], *, episodes: int, seed: int) -> dict:
    """Every scenario x model x share (module docstring)."""
    res: dict = {}
    for scn in scenarios:
        res[scn] = {}
        for name, path in models.items():
            entry, first_rows = {}, None
            for share in shares:
                t0 = time.perf_counter()
                summary, rows = one(scn, path, share, episodes=episodes, seed=seed)
                summary["seconds"] = round(time.perf_counter() - t0, 1)
                if first_rows is None:
                    first_rows = rows
                else:
                    comp = paired_comparison(first_rows, rows, reference=f"from_behind={shares[0]}")
                    summary["vs_first_share"] = {
                        k: comp[k]
                        for k in comp
                        if k.startswith(("collision_rate_diff", "success_diff", "collision_p_value", "success_p_value"))
                    }
                entry[str(share)] = summary
                print(
                    f"{scn} {name} from_behind={share}: success {summary['success_rate']:.2f} collision "
                    f"{summary['collision_rate']:.2f} speed {summary['mean_speed_mps']:.1f}",
                    file=sys.stderr,
                )
            res[scn][name] = entry
    return {
        "models": models,
        "shares": shares,
        "episodes": episodes,
        "seed": seed,
        "scenarios": res,
        "caution": CAUTION,
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", action="append", default=[], help="NAME=MODEL_DIR of a latent model (repeat)")
    ap.add_argument("--shares", default="0.25,1.0")
    ap.add_argument("--scenarios", default=",".join([*builtin_names(), STOPPED_AHEAD]))
    ap.add_argument("--episodes", type=int, default=100)
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--json", type=Path, default=None)
    args = ap.parse_args(argv)
    try:
        models = {}
        for spec in args.model:
            name, sep, path = spec.partition("=")
            if not sep or not name.strip() or not path.strip():
                raise ConfigError(f"--model {spec!r}: give NAME=MODEL_DIR")
            models[name.strip()] = path.strip()
        if not models:
            raise ConfigError("--model: give at least one NAME=MODEL_DIR")
        try:
            shares = [float(s) for s in args.shares.split(",") if s.strip()]
        except ValueError:
            raise ConfigError(f"--shares {args.shares!r}: give numbers in [0, 1] separated by commas") from None
        if not shares or not all(0.0 <= s <= 1.0 for s in shares):
            raise ConfigError(f"--shares {args.shares!r}: give numbers in [0, 1] separated by commas")
        if not 1 <= args.episodes <= 100_000:
            raise ConfigError(f"--episodes {args.episodes}: give 1 to 100000")
        out = run(
            models,
            shares,
            [s.strip() for s in args.scenarios.split(",") if s.strip()],
            episodes=args.episodes,
            seed=args.seed,
        )
    except (WmplanError, OSError) as err:
        print(f"from_behind_discount: {err}", file=sys.stderr)
        return 2
    if args.json is not None:
        atomic_write_json(args.json, out)
    print(json.dumps(out, indent=2, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
