"""Datasets: rolling out episodes with behaviour policies, storing them with a manifest, loading them back."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from wmplan.data.collect import POLICIES, Trajectories, collect, episode_seeds
from wmplan.data.store import Dataset, load_dataset, write_dataset
from wmplan.errors import ConfigError
from wmplan.scenario import Scenario
from wmplan.sim.params import SimParams

__all__ = [
    "POLICIES",
    "Dataset",
    "Trajectories",
    "collect",
    "episode_seeds",
    "load_dataset",
    "simulate_dataset",
    "write_dataset",
]


def simulate_dataset(scenario: Scenario, out_dir: Path | str, *, episodes: int, seed: int = 0, batch_size: int = 256,
                     policy_mix: float = 0.5, decision_every: int = 2,
                     progress: Callable[[int], None] | None = None) -> Dataset:
    """Simulate ``episodes`` episodes of a scenario in batches and write them as a dataset folder.

    Episode e gets scene seed ``episode_seeds(seed, episodes)[e]``, so the data do not depend on ``batch_size``.
    ``progress`` is called with the number of decision steps done (summed over batches).
    """
    if episodes < 1:
        raise ConfigError(f"episodes must be >= 1, got {episodes}")
    if batch_size < 1:
        raise ConfigError(f"batch_size must be >= 1, got {batch_size}")
    if not 0.0 <= policy_mix <= 1.0:
        raise ConfigError(f"policy_mix must lie in [0, 1], got {policy_mix}")
    params = SimParams.from_scenario(scenario)
    seeds = episode_seeds(seed, episodes)
    parts = [
        collect(params, seeds[i:i + batch_size], policy_mix=policy_mix, decision_every=decision_every, progress=progress)
        for i in range(0, episodes, batch_size)
    ]
    traj = Trajectories.concat(parts)
    write_dataset(Path(out_dir), scenario, traj, seed=seed, policy_mix=policy_mix, decision_every=decision_every)
    return load_dataset(out_dir)


def decisions_per_episode(scenario: Scenario, decision_every: int = 2) -> int:
    """Number of recorded decision steps in one episode of a scenario."""
    return int(np.floor(round(scenario.duration_s / scenario.dt_s) / decision_every))
