"""Predictors behind one interface: sampled futures of the object list under candidate ego plans.

Every predictor answers the same question for a batch of B decision points: given the observation history and
C candidate plans, draw K futures of the ego and its M nearest vehicles, as rows (B, C, K, H, N, F) in each
decision's anchor frame (the ego at the origin, x along its heading). Names used by the CLI and in JSON:

| name                | what it is                                                                          |
|---------------------|-------------------------------------------------------------------------------------|
| ``latent``          | the learned latent-variable model (:mod:`wmplan.model.world_model`)                 |
| ``deterministic``   | the least-squares model of the same size; its K futures coincide                    |
| ``constant-velocity`` | every other vehicle keeps its velocity                                            |
| ``oracle``          | the true simulator from the true state, drivers' traits known, events re-drawn      |
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from wmplan.data.windows import frame_window
from wmplan.model.baselines import ConstantVelocity
from wmplan.model.ego import EgoKinematics
from wmplan.model.world_model import WorldModel
from wmplan.plan.base import HISTORY_STEPS as HISTORY
from wmplan.sim.features import F_HEADING, F_X, F_Y
from wmplan.sim.observe import road_features
from wmplan.sim.oracle import object_futures, oracle_futures_batch
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState

PREDICTOR_NAMES = ("latent", "deterministic", "constant-velocity", "oracle")
NUM_OBJECTS = 8
"""Other vehicles in the object list the built-in predictors see (the nearest ones)."""


@dataclass(frozen=True, eq=False)
class DecisionContext:
    """What a planner knows at one decision for B scenes.

    Attributes:
        history: (B, W, N, F) float32 object rows over the last W decision steps, anchor frame.
        slots: (B, N) simulator slots of the object list (-1 padding); used only by the oracle.
        road: (B, 6) road context of the ego.
        ego_speed_mps, ego_steer_rad: (B,).
        ego_pose: (B, 3) world x, y, heading of the ego at the anchor.
        state: the true simulator state of the B scenes (read only by the oracle predictor).
        scenes: (B,) indices of these scenes in ``state``.
    """

    history: torch.Tensor
    slots: np.ndarray
    road: torch.Tensor
    ego_speed_mps: torch.Tensor
    ego_steer_rad: torch.Tensor
    ego_pose: np.ndarray
    state: TrafficState
    scenes: np.ndarray

    def model_batch(self) -> dict:
        """The inputs a forward model's ``sample`` takes."""
        return {
            "history": self.history,
            "road": self.road,
            "ego_speed_mps": self.ego_speed_mps,
            "ego_steer_rad": self.ego_steer_rad,
        }


def make_context(
    params: SimParams,
    state: TrafficState,
    rows_hist: np.ndarray,
    ids_hist: np.ndarray,
    num_objects: int,
    scenes: np.ndarray | None = None,
) -> DecisionContext:
    """Build the decision context from a history buffer of world rows (B, W, V, F) and identities (B, W, V)."""
    scenes = np.arange(state.num_scenes) if scenes is None else np.asarray(scenes)
    w = rows_hist.shape[1]
    framed, slots = frame_window(rows_hist, ids_hist, w - 1, num_objects)
    ego = rows_hist[:, -1, EGO]
    road = road_features(params, ego[:, F_X], ego[:, F_Y])
    return DecisionContext(
        history=torch.from_numpy(framed.astype(np.float32)),
        slots=slots,
        road=torch.from_numpy(road.astype(np.float32)),
        ego_speed_mps=torch.from_numpy(state.ego_speed_mps[scenes].astype(np.float32)),
        ego_steer_rad=torch.from_numpy(state.ego_steer_rad[scenes].astype(np.float32)),
        ego_pose=np.stack([ego[:, F_X], ego[:, F_Y], ego[:, F_HEADING]], axis=-1),
        state=state,
        scenes=scenes,
    )


class Predictor:
    """Base class: ``predict(ctx, actions (B, C, H, 2), K, generator) -> rows (B, C, K, H, N, F)``."""

    name = "base"

    def predict(
        self, ctx: DecisionContext, actions: torch.Tensor, num_futures: int, *, generator: torch.Generator
    ) -> torch.Tensor:
        """Rows (B, C, K, H, N, F) of K futures under each of the C plans ``actions`` (B, C, H, 2)."""
        raise NotImplementedError


class ModelPredictor(Predictor):
    """A trained model (latent or deterministic) or the constant-velocity baseline."""

    def __init__(self, model: WorldModel | ConstantVelocity, name: str):
        self.model = model
        self.name = name

    @property
    def ego(self) -> EgoKinematics:
        """The ego's kinematics the model was trained with."""
        return self.model.ego

    def predict(self, ctx, actions, num_futures, *, generator):
        """Rows (B, C, K, H, N, F) of K futures under each of the C plans ``actions`` (B, C, H, 2)."""
        return self.model.sample(ctx.model_batch(), actions, num_futures, generator=generator, moments=False)["rows"]


class OraclePredictor(Predictor):
    """The true simulator, branched from the true state (``known`` traits by default)."""

    name = "oracle"

    def __init__(self, params: SimParams, ego: EgoKinematics, plan_dt_s: float, mode: str = "known"):
        self.params = params
        self.ego = ego
        self.plan_dt_s = plan_dt_s
        self.mode = mode
        self._calls = 0

    def predict(self, ctx, actions, num_futures, *, generator):
        """Rows (B, C, K, H, N, F) of K futures under each of the C plans ``actions`` (B, C, H, 2)."""
        gens = [generator] * len(ctx.scenes) if isinstance(generator, torch.Generator) else generator
        seed = np.array([int(torch.randint(0, 2**31 - 1, (1,), generator=g)) for g in gens])
        fut = oracle_futures_batch(
            ctx.state,
            self.params,
            ctx.scenes,
            actions.double().numpy(),
            num_futures,
            mode=self.mode,
            plan_dt_s=self.plan_dt_s,
            seed=seed,
        )
        anchor_ids = np.take_along_axis(
            ctx.state.vehicle_id[ctx.scenes], np.where(ctx.slots >= 0, ctx.slots, 0), axis=1
        )
        return torch.from_numpy(object_futures(fut, ctx.slots, anchor_ids, ctx.ego_pose))


def builtin_predictor(
    kind: str, params: SimParams, *, horizon: int, plan_dt_s: float, model_dir=None, deterministic_dir=None
) -> Predictor:
    """A built-in predictor by name (one of PREDICTOR_NAMES) for a scenario.

    ``model_dir`` is required for 'latent' (and sets the constant-velocity predictor's layout when given);
    ``deterministic_dir`` for 'deterministic'.

    Raises:
        ConfigError: an unknown name or a missing model folder.
    """
    from wmplan.errors import ConfigError
    from wmplan.model.checkpoint import load_model
    from wmplan.model.config import ModelConfig

    ego = EgoKinematics.from_scenario(params.scenario, plan_dt_s)
    if kind == "oracle":
        return OraclePredictor(params, ego, plan_dt_s)
    if kind == "latent":
        if not model_dir:
            raise ConfigError("planner mpc+latent needs --model MODEL_DIR (a latent model from `wmplan train`)")
        return ModelPredictor(load_model(model_dir)[0], "latent")
    if kind == "deterministic":
        if not deterministic_dir:
            raise ConfigError(
                "planner mpc+deterministic needs --deterministic DIR (from `wmplan train --deterministic`)"
            )
        return ModelPredictor(load_model(deterministic_dir)[0], "deterministic")
    if kind != "constant-velocity":
        raise ConfigError(f"unknown predictor {kind!r}; choose from {', '.join(PREDICTOR_NAMES)}")
    mcfg = ModelConfig(history=HISTORY, horizon=horizon, num_objects=NUM_OBJECTS, plan_dt_s=plan_dt_s)
    if model_dir:
        mcfg = load_model(model_dir)[0].cfg
    return ModelPredictor(ConstantVelocity(mcfg, ego), "constant-velocity")
