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

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

from wmplan import rng
from wmplan.sim._jit import jit, kernel_array
from wmplan.sim.engine import Packed, param_table
from wmplan.sim.features import ACTION_DIM
from wmplan.sim.kernel import (
    E_COLLIDED,
    E_OFFROAD,
    F_CD,
    F_DECEL,
    F_H,
    F_LEN,
    F_TIMER,
    F_VX,
    F_VY,
    F_WID,
    F_X,
    F_Y,
    I_LANE,
    I_VID,
    S_EGO_SPEED,
    S_EGO_STEER,
    S_NEXT_ID,
    S_STEP,
    SPAWN_PERIOD_STEPS,
    ParamTable,
    _outcome,
    _step_scene,
)
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


@jit
def _load(src, vf, vi, valid, ys, traits, bvf, bvi, bvalid, bys, btr):
    """Copy branch row ``src`` of the packed state into buffer 0 of the rollout's double buffers."""
    for i in range(valid.shape[1]):
        for f in range(vf.shape[0]):
            bvf[0, f, i] = vf[f, src, i]
        for f in range(vi.shape[0]):
            bvi[0, f, i] = vi[f, src, i]
        bvalid[0, i], bys[0, i] = valid[src, i], ys[src, i]
        for t in range(traits.shape[2]):
            btr[0, i, t] = traits[src, i, t]


@jit
def _rollout_range(
    a,
    b,
    c_n,
    k_n,
    sub,
    group,
    p_scalars,
    p_lanes,
    p_traits,
    key,
    vf,
    vi,
    valid,
    ys,
    traits,
    sf,
    si,
    plans,
    rows,
    ids,
    first,
    collided,
    offroad,
    bvf,
    bvi,
    bvalid,
    bys,
    btr,
    bended,
    acc,
    info,
    scratch_i,
    scratch_f,
    scratch_b,
):
    """Futures [a, b) of :func:`oracle_futures_batch`, each a whole horizon in one go: future n = (s, c, k)
    (scene-major, then plan, then draw) starts from branch row s * K + k of the packed branch state (``vf`` ...
    ``si``, the layout of :class:`~wmplan.sim.engine.Packed`), holds plan ``plans[s, c, h]`` for ``sub`` engine
    steps per plan step h, and writes its world rows (H, V, 8), slot identities (H, V), first failing plan step and
    end flags. The engine steps are :func:`~wmplan.sim.kernel._step_scene` and
    :func:`~wmplan.sim.kernel._outcome`, as in :func:`~wmplan.sim.kernel.step_range`; ``bvf`` ... ``bended``
    are double buffers (two copies of one scene), ``acc``, ``info`` and ``scratch_*`` the step's work space."""
    h_n = plans.shape[2]
    order, rank, bits, centre_bit = scratch_i[0], scratch_i[1], scratch_i[2], scratch_i[3]
    lead, merge_to, new_lane = scratch_i[4], scratch_i[5], scratch_i[6]
    lead_gap, v_lead, cc, traffic, merger = scratch_f[0], scratch_f[1], scratch_f[2], scratch_b[0], scratch_b[1]
    v_n = valid.shape[1]
    for n in range(a, b):
        s, c, k = n // (c_n * k_n), (n // k_n) % c_n, n % k_n
        src = s * k_n + k
        g = group[src]
        sc, ln, pt = p_scalars[g], p_lanes[g], p_traits[g]
        _load(src, vf, vi, valid, ys, traits, bvf, bvi, bvalid, bys, btr)
        for f in range(bended.shape[1]):
            bended[0, f, 0] = False  # a branch starts with clear outcome flags
        speed, steer, stp, new_id = sf[S_EGO_SPEED, src], sf[S_EGO_STEER, src], si[S_STEP, src], si[S_NEXT_ID, src]
        cur, tcur = 0, 0
        first[n] = h_n
        for h in range(h_n):
            for _ in range(sub):
                nxt = 1 - cur
                for i in range(v_n):
                    bvf[nxt, F_LEN, i], bvf[nxt, F_WID, i] = bvf[cur, F_LEN, i], bvf[cur, F_WID, i]
                    bvi[nxt, I_VID, i] = bvi[cur, I_VID, i]
                tnxt = tcur
                if (stp + 1) % SPAWN_PERIOD_STEPS == 0:  # someone may enter: the traits change, in the other copy
                    tnxt = 1 - tcur
                    for i in range(v_n):
                        for t in range(btr.shape[2]):
                            btr[tnxt, i, t] = btr[tcur, i, t]
                o_x, o_y, o_h = bvf[nxt, F_X], bvf[nxt, F_Y], bvf[nxt, F_H]
                o_len, o_wid = bvf[nxt, F_LEN], bvf[nxt, F_WID]
                _lw, steer, speed, entered = _step_scene(
                    sc,
                    ln,
                    pt,
                    key[src],
                    stp,
                    new_id,
                    bvf[cur, F_X],
                    bvf[cur, F_Y],
                    bvf[cur, F_VX],
                    bvf[cur, F_H],
                    bvf[cur, F_LEN],
                    bvf[cur, F_WID],
                    bvalid[cur],
                    bvi[cur, I_VID],
                    bvi[cur, I_LANE],
                    btr[tcur],
                    bys[cur],
                    bvf[cur, F_TIMER],
                    bvf[cur, F_DECEL],
                    bvf[cur, F_CD],
                    speed,
                    steer,
                    plans[s, c, h, 0],
                    plans[s, c, h, 1],
                    o_x,
                    o_y,
                    bvf[nxt, F_VX],
                    bvf[nxt, F_VY],
                    o_h,
                    o_len,
                    o_wid,
                    bvalid[nxt],
                    bvi[nxt, I_VID],
                    bvi[nxt, I_LANE],
                    btr[tnxt],
                    bys[nxt],
                    bvf[nxt, F_TIMER],
                    bvf[nxt, F_DECEL],
                    bvf[nxt, F_CD],
                    acc,
                    order,
                    rank,
                    bits,
                    centre_bit,
                    lead,
                    merge_to,
                    new_lane,
                    lead_gap,
                    v_lead,
                    traffic,
                    merger,
                    cc,
                )
                stp, new_id = stp + 1, new_id + entered
                _outcome(sc, ln, o_x, o_y, o_len, o_wid, o_h, bvalid[nxt], bended[cur], 0, bended[nxt], info)
                cur, tcur = nxt, tnxt
            for i in range(v_n):
                rows[n, h, i, 0], rows[n, h, i, 1] = bvf[cur, F_X, i], bvf[cur, F_Y, i]
                rows[n, h, i, 2], rows[n, h, i, 3] = bvf[cur, F_VX, i], bvf[cur, F_VY, i]
                rows[n, h, i, 4], rows[n, h, i, 5] = bvf[cur, F_H, i], bvf[cur, F_LEN, i]
                rows[n, h, i, 6], rows[n, h, i, 7] = bvf[cur, F_WID, i], 1.0 if bvalid[cur, i] else 0.0
                ids[n, h, i] = bvi[cur, I_VID, i]
            if first[n] == h_n and (bended[cur, E_COLLIDED, 0] or bended[cur, E_OFFROAD, 0]):
                first[n] = h
        collided[n], offroad[n] = bended[cur, E_COLLIDED, 0], bended[cur, E_OFFROAD, 0]


def _rollout_buffers(packed: Packed) -> tuple:
    """Double buffers and work space of :func:`_rollout_range` for one thread."""
    v_n, nt = packed.traits.shape[1:]
    return (
        np.empty((2, packed.vf.shape[0], v_n)),
        np.empty((2, packed.vi.shape[0], v_n), dtype=np.int64),
        np.empty((2, v_n), dtype=np.bool_),
        np.empty((2, v_n), dtype=np.int8),
        np.empty((2, v_n, nt)),
        np.empty((2, packed.ended.shape[0], 1), dtype=np.bool_),
        np.empty(v_n),
        np.empty((3, 1), dtype=np.bool_),
        np.empty((7, v_n), dtype=np.int64),
        np.empty((3, v_n)),
        np.empty((2, v_n), dtype=np.bool_),
    )


def oracle_futures_batch(
    state: TrafficState,
    params: SimParams | Sequence[SimParams],
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

    All S x C x K futures run in one compiled call (each future a whole horizon of engine steps, the engine's own
    step functions). The K futures of a scene are shared by its C plans (common random numbers) and do not depend
    on which other scenes are in the batch. ``params`` is one parameter set, or one per scene (scenario variants:
    each scene's futures run with its own parameters, still in one call). ``seed`` is one integer or one per scene
    (S,). Large batches are split over ``threads`` threads (default: ``threads.sim_threads()``); the futures are
    the same for any thread count.

    Raises:
        ValueError: plans not (S, C, H, 2), ``num_futures`` < 1, ``params`` not one per scene, or parameter sets
            with different simulator steps.
    """
    plans = kernel_array(np.asarray(plans), np.float64)
    scenes = np.asarray(scenes, dtype=np.int64)
    if plans.ndim != 4 or plans.shape[-1] != ACTION_DIM or plans.shape[0] != len(scenes):
        raise ValueError(f"plans must have shape (S={len(scenes)}, C, H, {ACTION_DIM}), got {plans.shape}")
    if num_futures < 1:
        raise ValueError(f"num_futures must be >= 1, got {num_futures}")
    s_n, c_n, h_n, _ = plans.shape
    k_n = int(num_futures)
    per_scene = not isinstance(params, SimParams)
    plist = list(params) if per_scene else [params]
    if per_scene and len(plist) != s_n:
        raise ValueError(f"params must be one SimParams or one per scene ({s_n}), got {len(plist)}")
    # the oracle knows the nominal world, whatever tilt the episode runs under
    plist = [p.with_tilt(None) if p.tilt is not None else p for p in plist]
    sub = substeps_per_plan_step(plist[0], plan_dt_s)
    if any(substeps_per_plan_step(p, plan_dt_s) != sub or p.dt_s != plist[0].dt_s for p in plist):
        raise ValueError("every scene's parameters must share the simulator step dt_s")
    if per_scene:  # branch each scene with its own parameters (resampled traits), then one batch
        seeds = np.broadcast_to(np.asarray(seed, dtype=np.int64), scenes.shape)
        branches = TrafficState.concat(
            [branch(state, p, sc, k_n, mode=mode, seed=sd) for p, sc, sd in zip(plist, scenes, seeds, strict=True)]
        )
        table = ParamTable(tuple(plist))
        group = np.repeat(np.arange(s_n, dtype=np.int64), k_n)
    else:
        branches = branch(state, plist[0], scenes, k_n, mode=mode, seed=seed)  # (S*K) scenes, scene-major
        table = param_table(plist[0])
        group = np.zeros(s_n * k_n, dtype=np.int64)
    pk = Packed.of(branches)
    v_n = state.num_vehicles
    n = s_n * c_n * k_n
    rows = np.empty((n, h_n, v_n, 8))
    ids = np.empty((n, h_n, v_n), dtype=np.int64)
    first = np.empty(n, dtype=np.int64)
    collided = np.empty(n, dtype=bool)
    offroad = np.empty(n, dtype=bool)

    def run(a: int, b: int) -> None:  # futures [a, b): each chunk writes only its own rows
        _rollout_range(
            a,
            b,
            c_n,
            k_n,
            sub,
            group,
            table.scalars,
            table.lanes,
            table.traits,
            pk.key,
            pk.vf,
            pk.vi,
            pk.valid,
            pk.ys,
            pk.traits,
            pk.sf,
            pk.si,
            plans,
            rows,
            ids,
            first,
            collided,
            offroad,
            *_rollout_buffers(pk),
        )

    map_chunks(run, n, threads)
    lead = (s_n, c_n, k_n)
    return OracleFutures(
        vehicles=rows.reshape(*lead, h_n, v_n, -1),
        vehicle_id=ids.reshape(*lead, h_n, v_n),
        collided=collided.reshape(lead),
        offroad=offroad.reshape(lead),
        first_collision_step=first.reshape(lead),
    )


@jit
def _frame_futures(rows, ids, slots, anchor_ids, pose, out):
    """See :func:`object_futures`; ``rows`` (S, C, K, H, V, F), ``out`` (S, C, K, H, N, F)."""
    s_n, c_n, k_n, h_n = rows.shape[:4]
    for s in range(s_n):
        ox, oy, oh = pose[s, 0], pose[s, 1], pose[s, 2]
        c, sn = math.cos(oh), math.sin(oh)
        for ci in range(c_n):
            for k in range(k_n):
                for h in range(h_n):
                    r, o = rows[s, ci, k, h], out[s, ci, k, h]
                    for m in range(slots.shape[1]):
                        j = slots[s, m]
                        if j < 0 or ids[s, ci, k, h, j] != anchor_ids[s, m] or not r[j, 7] > 0.5:
                            for f in range(o.shape[1]):
                                o[m, f] = 0.0
                            continue
                        dx, dy = r[j, 0] - ox, r[j, 1] - oy
                        o[m, 0] = c * dx + sn * dy
                        o[m, 1] = -sn * dx + c * dy
                        o[m, 2] = c * r[j, 2] + sn * r[j, 3]
                        o[m, 3] = -sn * r[j, 2] + c * r[j, 3]
                        o[m, 4] = np.pi - (np.pi - (r[j, 4] - oh)) % (2.0 * np.pi)
                        o[m, 5], o[m, 6], o[m, 7] = r[j, 5], r[j, 6], 1.0


def object_futures(fut: OracleFutures, slots: np.ndarray, anchor_ids: np.ndarray, pose: np.ndarray) -> np.ndarray:
    """The object lists of oracle futures, float32 (S, C, K, H, N, F): for each of the N listed slots (S, N) (-1:
    padding), its vehicle's row in the frame of ``pose`` (S, 3: world x, y, heading of the ego at the decision),
    as :func:`wmplan.sim.observe.to_frame` of :func:`~wmplan.sim.observe.gather_slots` computes it, then cast; a
    row is all zero where the slot is padding, empty, or now holds another vehicle than ``anchor_ids`` (S, N)
    (the identities at the decision). Compiled."""
    s_n, c_n, k_n, h_n = fut.vehicles.shape[:4]
    out = np.empty((s_n, c_n, k_n, h_n, slots.shape[1], fut.vehicles.shape[-1]), dtype=np.float32)
    _frame_futures(
        kernel_array(fut.vehicles, np.float64),
        kernel_array(fut.vehicle_id, np.int64),
        kernel_array(np.asarray(slots), np.int64),
        kernel_array(np.asarray(anchor_ids), np.int64),
        kernel_array(np.asarray(pose), np.float64),
        out,
    )
    return out
