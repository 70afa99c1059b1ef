"""The oracle: true futures of a saved scene, drawn by the simulator itself.

From a snapshot of one scene, :func:`oracle_futures` rolls out K futures under each of C ego plans in one batch
of C x K scenes. Each future gets a fresh random key, so the random *events* (whether a driver yields to a merging
vehicle, when a driver brakes hard) are re-drawn; the same K keys are used for every plan (common random numbers,
which make plans comparable). Two modes:

* ``known``: every driver keeps its hidden traits and the decisions it has already taken; only future events are
  re-drawn. This is the best any predictor could do.
* ``resampled``: the hidden traits of every traffic driver are re-drawn from the scenario's distributions and
  pending decisions are forgotten; only what an observer can see (positions, speeds, sizes, lanes, ongoing
  hard braking) is kept. This is an observer who knows nothing about the drivers.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from wmplan import rng
from wmplan.sim.engine import step
from wmplan.sim.features import ACTION_DIM
from wmplan.sim.params import SimParams
from wmplan.sim.spawn import draw_traits
from wmplan.sim.state import EGO, TrafficState
from wmplan.sim.threads import map_chunks

OracleMode = Literal["known", "resampled"]


@dataclass(frozen=True, eq=False)
class OracleFutures:
    """Futures of one scene under C plans, K draws each.

    Attributes:
        vehicles: (C, K, H, V, F) world-frame vehicle rows after each plan step (``VEHICLE_FEATURES`` order).
        vehicle_id: (C, K, H, V) identity of the vehicle in each slot (slots may be refilled during a future).
        collided: (C, K) the ego collided within the horizon.
        offroad: (C, K) the ego left the road within the horizon.
        first_collision_step: (C, K) plan step (0-based) of the first collision or off-road, H if none.
    """

    vehicles: np.ndarray
    vehicle_id: np.ndarray
    collided: np.ndarray
    offroad: np.ndarray
    first_collision_step: np.ndarray

    @property
    def failed(self) -> np.ndarray:
        """(C, K) collision or off-road."""
        return self.collided | self.offroad


def substeps_per_plan_step(params: SimParams, plan_dt_s: float) -> int:
    """Simulator steps per plan step; ``plan_dt_s`` must be a whole multiple of the simulator step."""
    n = plan_dt_s / params.dt_s
    if n < 1 - 1e-9 or abs(n - round(n)) > 1e-6:
        raise ValueError(f"plan_dt_s ({plan_dt_s}) must be a whole multiple of the simulator step dt_s ({params.dt_s})")
    return int(round(n))


def branch(
    state: TrafficState,
    params: SimParams,
    scene: int | np.ndarray,
    num_branches: int,
    *,
    mode: OracleMode,
    seed: int | np.ndarray,
) -> TrafficState:
    """``num_branches`` copies of each given scene (scene-major), each with its own random key (and, if
    resampled, new traits). Branch k of a scene gets the same key derivation whatever the other scenes are."""
    if mode not in ("known", "resampled"):
        raise ValueError(f"mode must be 'known' or 'resampled', got {mode!r}")
    scenes = np.atleast_1d(np.asarray(scene, dtype=np.int64))
    base = state.take(np.repeat(scenes, num_branches))
    k_idx = np.tile(np.arange(num_branches), len(scenes))
    seeds = np.broadcast_to(np.asarray(seed, dtype=np.int64), scenes.shape)  # one seed, or one per scene
    keys = rng.combine(base.key, np.repeat(seeds, num_branches), rng.STREAM_ORACLE, k_idx)
    new = base.replace(
        key=keys,
        collided=np.zeros_like(base.collided),
        offroad=np.zeros_like(base.offroad),
        reached_goal=np.zeros_like(base.reached_goal),
    )
    if mode == "resampled":
        traffic = base.valid.copy()
        traffic[:, EGO] = False
        traits = np.where(traffic[..., None], draw_traits(params, keys[:, None], base.vehicle_id, salt=1), base.traits)
        new = new.replace(traits=traits, yield_state=np.zeros_like(base.yield_state))
    return new


def oracle_futures(
    state: TrafficState,
    params: SimParams,
    plans: np.ndarray,
    num_futures: int,
    *,
    scene: int = 0,
    mode: OracleMode = "known",
    plan_dt_s: float = 0.2,
    seed: int = 0,
) -> OracleFutures:
    """Roll out ``num_futures`` true futures of one scene under each of C ego plans, batched.

    Args:
        state: a batched state; only scene ``scene`` is used.
        params: the scenario's arrays.
        plans: (C, H, 2) ego actions (accel m/s^2, steering rad), each held for one plan step.
        num_futures: K.
        scene: which scene of ``state`` to branch from.
        mode: ``"known"`` or ``"resampled"`` (see the module docstring).
        plan_dt_s: length of a plan step; a whole multiple of the simulator step.
        seed: selects the K random futures; the same seed gives the same futures.

    Returns:
        An :class:`OracleFutures` with leading axes (C, K).
    """
    plans = np.asarray(plans, dtype=np.float64)
    if plans.ndim != 3 or plans.shape[-1] != ACTION_DIM:
        raise ValueError(f"plans must have shape (C, H, {ACTION_DIM}), got {plans.shape}")
    out = oracle_futures_batch(
        state, params, np.array([scene]), plans[None], num_futures, mode=mode, plan_dt_s=plan_dt_s, seed=seed
    )
    return OracleFutures(
        *(getattr(out, f)[0] for f in ("vehicles", "vehicle_id", "collided", "offroad", "first_collision_step"))
    )


def oracle_futures_batch(
    state: TrafficState,
    params: SimParams,
    scenes: np.ndarray,
    plans: np.ndarray,
    num_futures: int,
    *,
    mode: OracleMode = "known",
    plan_dt_s: float = 0.2,
    seed: int | np.ndarray = 0,
    threads: int | None = None,
) -> OracleFutures:
    """:func:`oracle_futures` for several scenes at once: plans (S, C, H, 2) -> leading axes (S, C, K).

    All S x C x K futures run as one batch of the engine. The K futures of a scene are shared by its C plans
    (common random numbers) and do not depend on which other scenes are in the batch. ``seed`` is one integer or
    one per scene (S,). Large batches are split over ``threads`` threads (default: ``threads.sim_threads()``);
    the futures are the same for any thread count.
    """
    plans = np.asarray(plans, dtype=np.float64)
    scenes = np.asarray(scenes, dtype=np.int64)
    if plans.ndim != 4 or plans.shape[-1] != ACTION_DIM or plans.shape[0] != len(scenes):
        raise ValueError(f"plans must have shape (S={len(scenes)}, C, H, {ACTION_DIM}), got {plans.shape}")
    if num_futures < 1:
        raise ValueError(f"num_futures must be >= 1, got {num_futures}")
    s_n, c_n, h_n, _ = plans.shape
    k_n = int(num_futures)
    if params.tilt is not None:  # the oracle knows the nominal world, whatever tilt the episode runs under
        params = params.with_tilt(None)
    sub = substeps_per_plan_step(params, plan_dt_s)
    branches = branch(state, params, scenes, k_n, mode=mode, seed=seed)  # (S*K) scenes, scene-major
    # order (S, C, K): for scene s and plan c, the K branches of scene s
    take = (np.arange(s_n)[:, None, None] * k_n + np.arange(k_n)[None, None, :]).repeat(c_n, axis=1)
    st = branches.take(take.reshape(-1))
    actions = np.repeat(plans, k_n, axis=1).reshape(s_n * c_n * k_n, h_n, ACTION_DIM)
    v_n = state.num_vehicles
    n = s_n * c_n * k_n
    rows = np.empty((n, h_n, v_n, 8))
    ids = np.empty((n, h_n, v_n), dtype=np.int64)
    first = np.full(n, h_n, dtype=np.int64)
    collided = np.empty(n, dtype=bool)
    offroad = np.empty(n, dtype=bool)

    def run(a: int, b: int) -> None:  # futures [a, b): each chunk writes only its own rows
        chunk = st.rows(a, b)
        for h in range(h_n):
            act = actions[a:b, h]
            for _ in range(sub):
                chunk, _info = step(chunk, act, params)
            rows[a:b, h] = chunk.vehicles()
            ids[a:b, h] = chunk.vehicle_id
            first[a:b] = np.where((first[a:b] == h_n) & (chunk.collided | chunk.offroad), h, first[a:b])
        collided[a:b], offroad[a:b] = chunk.collided, chunk.offroad

    map_chunks(run, n, threads)
    lead = (s_n, c_n, k_n)
    return OracleFutures(
        vehicles=rows.reshape(*lead, h_n, v_n, -1),
        vehicle_id=ids.reshape(*lead, h_n, v_n),
        collided=collided.reshape(lead),
        offroad=offroad.reshape(lead),
        first_collision_step=first.reshape(lead),
    )
