"""How well latent models foresee the follower's reaction when the ego brakes (wmplan/evaluate/reaction.py).

For each scenario, held-out states with a vehicle close behind the ego (rule-driven episodes, seeds no dataset
uses) and the planner's keep-speed, firm and full braking plans: every model's P(run into from behind), the
follower's smallest gap and its speed at the end, against the oracle's, with the constant-velocity predictor
beside them. Compare a model trained on data without the exploring policy's manoeuvres with one trained on data
with them (same budget) by naming both.

Usage: ``python benchmarks/braking_reaction.py --model old=runs/latent-old --model new=runs/latent
[--scenarios onramp-merge,cut-in] [--episodes 64] [--states 96] [--samples 32] [--seed 0] [--json FILE]``.
Importing this module runs nothing. Results on a simplified traffic model certify nothing about a real vehicle.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from wmplan.caution import CAUTION
from wmplan.errors import ConfigError, WmplanError
from wmplan.evaluate.reaction import assess_braking
from wmplan.io import atomic_write_json
from wmplan.scenario import load_scenario


def _models(specs: list[str]) -> dict[str, str]:
    out = {}
    for spec in specs:
        name, sep, path = spec.partition("=")
        if not sep or not name.strip() or not path.strip() or name.strip() in ("oracle", "constant-velocity"):
            raise ConfigError(f"--model {spec!r}: give NAME=MODEL_DIR (NAME not 'oracle' or 'constant-velocity')")
        out[name.strip()] = path.strip()
    return out


def run(models: dict[str, str], scenarios: list[str], *, episodes: int, states: int, samples: int, seed: int) -> dict:
    """The assessment of every scenario (``per_state`` arrays left out)."""
    res = {}
    for name in scenarios:
        t0 = time.perf_counter()
        out = assess_braking(
            load_scenario(name), models, episodes=episodes, max_states=states, samples=samples, seed=seed
        )
        out.pop("per_state")
        out.pop("caution")
        out["seconds"] = round(time.perf_counter() - t0, 1)
        res[name] = out
    return {"models": models, "seed": seed, "scenarios": res, "caution": CAUTION}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", action="append", default=[], help="NAME=MODEL_DIR of a latent model (repeat)")
    ap.add_argument("--scenarios", default="onramp-merge")
    ap.add_argument("--episodes", type=int, default=64)
    ap.add_argument("--states", type=int, default=96)
    ap.add_argument("--samples", type=int, default=32)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", type=Path, default=None)
    args = ap.parse_args(argv)
    try:
        for flag in ("episodes", "states", "samples"):
            if not 1 <= getattr(args, flag) <= 10_000:
                raise ConfigError(f"--{flag} {getattr(args, flag)}: give 1 to 10000")
        out = run(
            _models(args.model),
            [s.strip() for s in args.scenarios.split(",") if s.strip()],
            episodes=args.episodes,
            states=args.states,
            samples=args.samples,
            seed=args.seed,
        )
    except (WmplanError, OSError, ValueError) as err:
        print(f"braking_reaction: {err}", file=sys.stderr)
        return 2
    if args.json is not None:
        atomic_write_json(args.json, out)
    print(json.dumps(out, indent=2, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
