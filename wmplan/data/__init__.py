"""Datasets: rolling out episodes with behaviour policies, storing them with a manifest, loading them back."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from wmplan.data.collect import POLICIES, Trajectories, collect, episode_seeds
from wmplan.data.store import MAX_DATASET_BYTES, Dataset, load_dataset, write_dataset
from wmplan.errors import ConfigError, DatasetError
from wmplan.scenario import Scenario
from wmplan.sim.params import SimParams

__all__ = [
    "POLICIES",
    "Dataset",
    "Trajectories",
    "check_dataset_size",
    "collect",
    "dataset_bytes",
    "episode_seeds",
    "load_dataset",
    "simulate_dataset",
    "write_dataset",
]


_BYTES_PER_SLOT = 8 * 4 + 4  # per recorded time and vehicle slot: 8 float32 features and an int32 identity


def dataset_bytes(scenario: Scenario, episodes: int, decision_every: int = 2) -> int:
    """Size in bytes of the arrays of a dataset of ``episodes`` episodes (episodes x recorded times x vehicle
    slots, plus the per-decision actions and per-episode outcomes)."""
    t = decisions_per_episode(scenario, decision_every)
    per_episode = (t + 1) * scenario.traffic.max_vehicles * _BYTES_PER_SLOT + t * 2 * 4 + (t + 1) + 16
    return int(episodes) * per_episode


def check_dataset_size(scenario: Scenario, episodes: int, decision_every: int = 2) -> None:
    """Refuse, before any simulation, a dataset with no decisions or one larger than :data:`MAX_DATASET_BYTES`.

    Raises:
        ConfigError: one line naming the flag to change (``--episodes`` or ``--decision-every``).
    """
    steps = int(round(scenario.duration_s / scenario.dt_s))
    if decisions_per_episode(scenario, decision_every) < 1:
        raise ConfigError(
            f"--decision-every {decision_every}: longer than an episode of {scenario.name} ({steps} "
            f"simulator steps); give at most {steps}"
        )
    size = dataset_bytes(scenario, episodes, decision_every)
    if size > MAX_DATASET_BYTES:
        most = MAX_DATASET_BYTES // dataset_bytes(scenario, 1, decision_every)
        t = decisions_per_episode(scenario, decision_every) + 1
        raise ConfigError(
            f"--episodes {episodes}: {episodes} episodes x {t} recorded steps x {scenario.traffic.max_vehicles} "
            f"vehicles need {size / 2**30:.1f} GiB of arrays, over the {MAX_DATASET_BYTES / 2**30:.0f} GiB limit; "
            f"give at most {most} episodes (or a larger --decision-every)"
        )


def simulate_dataset(
    scenario: Scenario,
    out_dir: Path | str,
    *,
    episodes: int,
    seed: int = 0,
    batch_size: int = 256,
    policy_mix: float = 0.5,
    decision_every: int = 2,
    progress: Callable[[int], None] | None = None,
) -> Dataset:
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
    check_dataset_size(scenario, episodes, decision_every)
    params = SimParams.from_scenario(scenario)
    seeds = episode_seeds(seed, episodes)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):  # non-finite results are refused below
        parts = [
            collect(
                params,
                seeds[i : i + batch_size],
                policy_mix=policy_mix,
                decision_every=decision_every,
                progress=progress,
            )
            for i in range(0, episodes, batch_size)
        ]
    traj = Trajectories.concat(parts)
    bad = ~(np.isfinite(traj.vehicles).all(axis=(1, 2, 3)) & np.isfinite(traj.actions).all(axis=(1, 2)))
    if bad.any():
        raise DatasetError(
            f"{out_dir}: the simulation of {scenario.name} produced NaN or inf values in {int(bad.sum())} of "
            f"{episodes} episodes (first: episode {int(np.argmax(bad))}, scene seed {int(seeds[np.argmax(bad)])}); "
            "nothing was written. The scenario's values drive the simulator outside its range"
        )
    write_dataset(Path(out_dir), scenario, traj, seed=seed, policy_mix=policy_mix, decision_every=decision_every)
    return load_dataset(out_dir)


def decisions_per_episode(scenario: Scenario, decision_every: int = 2) -> int:
    """Number of recorded decision steps in one episode of a scenario."""
    return int(np.floor(round(scenario.duration_s / scenario.dt_s) / decision_every))
