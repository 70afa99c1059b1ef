"""The end-to-end demo: the whole job on ``onramp-merge``, from traffic to a report.

Stages so far: simulate a dataset, draw a scene and animate an episode. Each stage writes into ``OUT`` and the
demo ends by naming the main result.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path

from wmplan.data import decisions_per_episode, simulate_dataset
from wmplan.scenario import load_scenario

log = logging.getLogger(__name__)

SCENARIO = "onramp-merge"


def _say(msg: str) -> None:
    print(f"[demo] {msg}", file=sys.stderr, flush=True)


def run_demo(out: Path, *, quick: bool = False, seed: int = 0) -> Path:
    """Run the demo into folder ``out``; returns the path of its main result."""
    from tqdm.auto import tqdm

    from wmplan.viz.anim import render_to_file

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    scn = load_scenario(SCENARIO)
    episodes = 64 if quick else 1024
    _say(f"simulating {episodes} episodes of {SCENARIO}")
    with tqdm(total=episodes * decisions_per_episode(scn), desc="simulate", unit="step", leave=False,
              file=sys.stderr, disable=None) as bar:
        simulate_dataset(scn, out / "data", episodes=episodes, seed=seed, progress=bar.update)
    _say("drawing a scene and an episode")
    png = render_to_file(SCENARIO, out / "scene.png", seed=seed)
    gif = render_to_file(SCENARIO, out / "episode.gif", seed=seed)
    _say(f"wrote {out / 'data'}, {png}, {gif}")
    return gif
