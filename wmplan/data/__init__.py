"""Datasets: rolling out episodes with behaviour policies, storing them with a manifest, loading them back."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from wmplan.data.collect import POLICIES, Trajectories, collect, episode_seeds
from wmplan.data.store import MAX_DATASET_BYTES, Dataset, check_scenario_list, load_dataset, write_dataset
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


def _as_list(scenarios: Scenario | Sequence[Scenario]) -> list[Scenario]:
    return [scenarios] if isinstance(scenarios, Scenario) else list(scenarios)


def dataset_bytes(scenarios: Scenario | Sequence[Scenario], episodes: int, decision_every: int = 2) -> int:
    """Size in bytes of the arrays of a dataset of ``episodes`` episodes of each scenario (episodes x recorded
    times x vehicle slots, padded to the longest episode and the most slots, plus the per-decision actions and
    per-episode outcomes)."""
    scns = _as_list(scenarios)
    t = max(decisions_per_episode(scn, decision_every) for scn in scns)
    v = max(scn.traffic.max_vehicles for scn in scns)
    per_episode = (t + 1) * v * _BYTES_PER_SLOT + t * 2 * 4 + (t + 1) + 16
    return int(episodes) * len(scns) * per_episode


def check_dataset_size(scenarios: Scenario | Sequence[Scenario], episodes: int, decision_every: int = 2) -> None:
    """Refuse, before any simulation, a dataset with no decisions or one larger than :data:`MAX_DATASET_BYTES`
    (``episodes`` of each scenario).

    Raises:
        ConfigError: one line naming the flag to change (``--episodes`` or ``--decision-every``).
    """
    scns = _as_list(scenarios)
    for scn in scns:
        steps = int(round(scn.duration_s / scn.dt_s))
        if decisions_per_episode(scn, decision_every) < 1:
            raise ConfigError(
                f"--decision-every {decision_every}: longer than an episode of {scn.name} ({steps} "
                f"simulator steps); give at most {steps}"
            )
    size = dataset_bytes(scns, episodes, decision_every)
    if size > MAX_DATASET_BYTES:
        most = MAX_DATASET_BYTES // dataset_bytes(scns, 1, decision_every)
        t = max(decisions_per_episode(scn, decision_every) for scn in scns) + 1
        v = max(scn.traffic.max_vehicles for scn in scns)
        each = " of each scenario" if len(scns) > 1 else ""
        raise ConfigError(
            f"--episodes {episodes}: {episodes * len(scns)} episodes x {t} recorded steps x {v} "
            f"vehicles need {size / 2**30:.1f} GiB of arrays, over the {MAX_DATASET_BYTES / 2**30:.0f} GiB limit; "
            f"give at most {most} episodes{each} (or a larger --decision-every)"
        )


def simulate_dataset(
    scenarios: Scenario | Sequence[Scenario],
    out_dir: Path | str,
    *,
    episodes: int,
    seed: int = 0,
    batch_size: int = 256,
    policy_mix: float = 0.5,
    decision_every: int = 2,
    progress: Callable[[int], None] | None = None,
) -> Dataset:
    """Simulate ``episodes`` episodes of each scenario in batches and write them as one dataset folder.

    The scene seeds of all episodes are ``episode_seeds(seed, episodes x number of scenarios)``, taken in the order
    of the scenarios: scenario i's episode e gets the seed at position i x episodes + e. The data therefore do not
    depend on ``batch_size``, and a dataset of one scenario is the one a single-scenario call always made.
    ``progress`` is called with the number of decision steps done (summed over batches).

    Raises:
        ConfigError: bad counts, scenarios that cannot share a dataset (:func:`check_scenario_list`) or a dataset
            over the size limit.
        DatasetError: the simulation produced non-finite values (nothing is written).
    """
    scns = _as_list(scenarios)
    if episodes < 1:
        raise ConfigError(f"episodes must be >= 1, got {episodes}")
    if batch_size < 1:
        raise ConfigError(f"batch_size must be >= 1, got {batch_size}")
    if not 0.0 <= policy_mix <= 1.0:
        raise ConfigError(f"policy_mix must lie in [0, 1], got {policy_mix}")
    check_scenario_list(scns)
    check_dataset_size(scns, episodes, decision_every)
    all_seeds = episode_seeds(seed, episodes * len(scns))
    trajs = []
    for i, scenario in enumerate(scns):
        params = SimParams.from_scenario(scenario)
        seeds = all_seeds[i * episodes : (i + 1) * episodes]
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):  # non-finite results are refused below
            parts = [
                collect(
                    params,
                    seeds[j : j + batch_size],
                    policy_mix=policy_mix,
                    decision_every=decision_every,
                    progress=progress,
                )
                for j in range(0, episodes, batch_size)
            ]
        traj = Trajectories.concat(parts)
        bad = ~(np.isfinite(traj.vehicles).all(axis=(1, 2, 3)) & np.isfinite(traj.actions).all(axis=(1, 2)))
        if bad.any():
            raise DatasetError(
                f"{out_dir}: the simulation of {scenario.name} produced NaN or inf values in {int(bad.sum())} of "
                f"{episodes} episodes (first: episode {int(np.argmax(bad))}, scene seed "
                f"{int(seeds[np.argmax(bad)])}); nothing was written. The scenario's values drive the simulator "
                "outside its range"
            )
        trajs.append(traj)
    write_dataset(Path(out_dir), scns, trajs, seed=seed, policy_mix=policy_mix, decision_every=decision_every)
    return load_dataset(out_dir)


def decisions_per_episode(scenario: Scenario, decision_every: int = 2) -> int:
    """Number of recorded decision steps in one episode of a scenario."""
    return int(np.floor(round(scenario.duration_s / scenario.dt_s) / decision_every))
