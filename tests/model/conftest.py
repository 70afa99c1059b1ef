"""Shared fixtures of the forward-model tests: a tiny simulated dataset and tiny trained models.

Everything is seeded explicitly. The trained models are deliberately small (a few thousand parameters, 2 x 10
optimiser steps): they exercise the training, checkpoint and assessment machinery, not prediction quality.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.model.model_helpers import SCENARIO, tiny_model_config, tiny_train_config
from wmplan.data import Dataset, load_dataset, simulate_dataset
from wmplan.model.train import TrainResult, train
from wmplan.scenario import load_scenario

DATA_SEED = 11
DATA_EPISODES = 16


@pytest.fixture(scope="session")
def dataset_dir(tmp_path_factory) -> Path:
    """A 16-episode onramp-merge dataset (seed 11), simulated once per test session."""
    path = tmp_path_factory.mktemp("data") / "onramp"
    simulate_dataset(load_scenario(SCENARIO), path, episodes=DATA_EPISODES, seed=DATA_SEED)
    return path


@pytest.fixture(scope="session")
def dataset(dataset_dir) -> Dataset:
    return load_dataset(dataset_dir)


@pytest.fixture(scope="session")
def latent_run(dataset_dir, tmp_path_factory) -> TrainResult:
    """A tiny latent model trained for 2 epochs of 10 steps (seed 0); its folder must not be modified."""
    out = tmp_path_factory.mktemp("models") / "latent"
    return train(dataset_dir, out, model_cfg=tiny_model_config(), train_cfg=tiny_train_config())


@pytest.fixture(scope="session")
def deterministic_run(dataset_dir, tmp_path_factory) -> TrainResult:
    """The least-squares baseline of the same size, trained the same way (seed 0)."""
    out = tmp_path_factory.mktemp("models") / "deterministic"
    return train(dataset_dir, out, model_cfg=tiny_model_config(deterministic=True), train_cfg=tiny_train_config())
