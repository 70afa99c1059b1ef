"""Replaying one failed episode while recording what the planner believed, and its counterfactual replays.

The failed episode runs again through the one closed loop (:func:`wmplan.evaluate.closed_loop.run_batch`, the
same planner, scene seed and run seed, so the same episode) with the planner wrapped in a :class:`Recorder`. At
every decision the recorder keeps the true simulator state (the starting points of the search over the ego's
actions, :mod:`wmplan.triage.search`), the action, the planner's predicted P(collision) and, for the sampling
planner, the chosen plan and its predicted futures.

Counterfactual replays run the same episode with the same planner whose predictor is replaced by the oracle
(:class:`wmplan.plan.predictors.OraclePredictor`): ``known`` (the drivers' hidden traits known) and ``resampled``
(the traits re-drawn). A planner that is not the sampling planner has no predictor to swap; its counterfactuals
are the sampling planner at its default settings over the same oracle futures.

Shapes: H plan steps, K sampled futures, N objects (the ego first), F world-row features.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from wmplan.evaluate.closed_loop import run_batch
from wmplan.evaluate.planners import make_planner
from wmplan.plan.base import Decision, Observation, Planner
from wmplan.plan.mpc import SamplingPlanner
from wmplan.plan.predictors import OraclePredictor
from wmplan.sim.features import F_VALID, F_X, F_Y
from wmplan.sim.observe import to_frame
from wmplan.sim.oracle import oracle_futures_batch
from wmplan.sim.params import SimParams
from wmplan.sim.state import EGO, TrafficState

ORACLE_MODES = ("known", "resampled")


@dataclass
class DecisionRecord:
    """One decision of the recorded episode.

    Attributes:
        index: decision number (0 at the start of the episode).
        time_s: its simulated time.
        state: the true simulator state of the one scene at the decision.
        action: (2,) the command applied until the next decision (accel m/s^2, steering rad).
        believed_p: the planner's predicted P(collision) of its chosen plan within its horizon, or None.
        plan: (H, 2) the chosen plan (sampling planner), or None.
        predicted: (K, H, N, F) the chosen plan's predicted futures in the decision's anchor frame, or None.
        object_ids: (N,) vehicle identities of those objects (-1: none), or None.
        anchor_pose: (3,) world x, y, heading of the ego at the decision, or None.
    """

    index: int
    time_s: float
    state: TrafficState
    action: np.ndarray
    believed_p: float | None = None
    plan: np.ndarray | None = None
    predicted: np.ndarray | None = None
    object_ids: np.ndarray | None = None
    anchor_pose: np.ndarray | None = None


class Recorder:
    """A planner wrapped so that every decision of a one-episode run is kept (:class:`DecisionRecord`).

    It satisfies :class:`wmplan.plan.base.Planner` and decides exactly as the wrapped planner does: for the
    sampling planner it asks :meth:`~wmplan.plan.mpc.SamplingPlanner.plan` to keep its candidates, which changes
    no draw.
    """

    def __init__(self, inner: Planner):
        self.inner = inner
        self.decision_dt_s = float(inner.decision_dt_s)
        self.horizon_decisions = int(inner.horizon_decisions)
        if hasattr(inner, "history_steps"):
            self.history_steps = inner.history_steps
        self.records: list[DecisionRecord] = []
        self._kept: list = []
        if isinstance(inner, SamplingPlanner):
            plan = inner.plan

            def keeping_plan(ctx, **kwargs):
                res = plan(ctx, **{**kwargs, "keep": True})
                self._kept.append((ctx, res))
                return res

            inner.plan = keeping_plan  # an instance attribute: decide() calls it in place of the method

    def reset(self, episode_keys: np.ndarray) -> None:
        """Reset the wrapped planner and forget the records."""
        self.records = []
        self.inner.reset(episode_keys)

    def decide(self, obs: Observation) -> Decision:
        """The wrapped planner's decision; records it (the run must hold one episode)."""
        if obs.state.num_scenes != 1:
            raise ValueError("Recorder keeps one episode; run it with one scene seed")
        self._kept.clear()
        dec = self.inner.decide(obs)
        p = None if dec.p_collision is None else float(np.asarray(dec.p_collision).reshape(-1)[0])
        rec = DecisionRecord(
            index=len(self.records),
            time_s=float(obs.time_s),
            state=obs.state,
            action=np.asarray(dec.actions, dtype=np.float64).reshape(-1, 2)[0].copy(),
            believed_p=p,
        )
        if self._kept:
            ctx, res = self._kept[-1]
            c = int(res.chosen[0])
            rec.plan = res.plans[0, c].double().numpy().copy()
            rec.predicted = res.futures[0, c].double().numpy().copy()
            slots = np.asarray(ctx.slots[0])
            ids = ctx.state.vehicle_id[ctx.scenes[0]]
            rec.object_ids = np.where(slots >= 0, ids[np.where(slots >= 0, slots, 0)], -1)
            rec.anchor_pose = np.asarray(ctx.ego_pose[0], dtype=np.float64).copy()
        self.records.append(rec)
        return dec


@dataclass
class Replay:
    """A replayed episode: its row (:data:`wmplan.evaluate.rows.COLUMNS`) and, if recorded, its decisions."""

    row: dict
    records: list[DecisionRecord] = field(default_factory=list)

    @property
    def failed(self) -> bool:
        """The episode collided or left the road."""
        return bool(self.row["collision"] or self.row["offroad"])


def record_failure(params: SimParams, planner: str, options: dict[str, Any], seed: int, eval_seed: int) -> Replay:
    """Run the episode of scene seed ``seed`` again (run seed ``eval_seed``) with its decisions recorded."""
    rec = Recorder(make_planner(planner, params, options))
    row = run_batch(params, rec, np.array([seed]), seed=eval_seed, name=planner).rows[0]
    return Replay(row=row, records=rec.records)


def oracle_planner(params: SimParams, planner: str, options: dict[str, Any], mode: str) -> tuple[Planner, str]:
    """The planner of ``planner`` with its predictor replaced by the oracle in ``mode`` ('known' or 'resampled'),
    and a label saying what it is. A planner that is not the sampling planner is replaced by the sampling planner
    at its defaults over the oracle's futures."""
    if mode not in ORACLE_MODES:
        raise ValueError(f"mode must be one of {ORACLE_MODES}, got {mode!r}")
    built = make_planner(planner, params, options)
    label = f"{planner} with the oracle predictor ({mode} traits)"
    if not isinstance(built, SamplingPlanner):
        built = make_planner("mpc+oracle", params, {})
        label = f"mpc+oracle ({mode} traits) in place of {planner}, which has no predictor to swap"
    built.predictor = OraclePredictor(params, built.ego, built.cfg.plan_dt_s, mode=mode)
    return built, label


def counterfactual(
    params: SimParams, planner: str, options: dict[str, Any], seed: int, eval_seed: int, mode: str
) -> tuple[Replay, str]:
    """The episode replayed with the oracle predictor in ``mode`` (:func:`oracle_planner`) and its label."""
    built, label = oracle_planner(params, planner, options, mode)
    row = run_batch(params, built, np.array([seed]), seed=eval_seed, name=planner).rows[0]
    return Replay(row=row), label


def oracle_risk(
    params: SimParams, records: list[DecisionRecord], horizon: int, plan_dt_s: float, num_futures: int, seed: int
) -> np.ndarray:
    """(D,) the oracle's P(collision) (contact, drivers' traits known, events re-drawn) of each decision's chosen
    plan over ``horizon`` plan steps; where a planner gives no plan, of the actions it then applied (the last
    one held past the end). All decisions run as one batch of the engine."""
    if not records:
        return np.zeros(0)
    d_n = len(records)
    executed = np.stack([r.action for r in records])
    plans = np.empty((d_n, 1, horizon, 2))
    for i, r in enumerate(records):
        if r.plan is not None and r.plan.shape[0] >= horizon:
            plans[i, 0] = r.plan[:horizon]
        else:
            idx = np.minimum(np.arange(i, i + horizon), d_n - 1)
            plans[i, 0] = executed[idx]
    state = TrafficState.concat([r.state for r in records])
    fut = oracle_futures_batch(
        state, params, np.arange(d_n), plans, num_futures, mode="known", plan_dt_s=plan_dt_s, seed=seed
    )
    return fut.collided[:, 0].mean(axis=-1)


def prediction_errors(records: list[DecisionRecord]) -> list[dict | None]:
    """Per decision, the chosen plan's predicted futures of the other vehicles against what they then did.

    The true positions come from the recorded states of the following decisions (one per plan step), in the
    decision's anchor frame; only objects present in both count. Returns, per decision, ``{"mean_m", "best_m",
    "objects", "steps"}``: the displacement averaged over objects and steps, averaged over the K futures (mean)
    or for the closest future (best); None where the planner gave no futures or nothing could be compared.
    """
    out: list[dict | None] = []
    for i, r in enumerate(records):
        if r.predicted is None or r.object_ids is None or i + 1 >= len(records):
            out.append(None)
            continue
        k_n, h_n, n_n, _ = r.predicted.shape
        later = records[i + 1 : i + 1 + h_n]
        truth = np.full((len(later), n_n, 2), np.nan)
        for h, nxt in enumerate(later):
            st = nxt.state
            ids = st.vehicle_id[0]
            for n in range(1, n_n):  # the other vehicles (object 0 is the ego)
                vid = r.object_ids[n]
                hit = np.nonzero((ids == vid) & st.valid[0])[0] if vid >= 0 else []
                if len(hit):
                    truth[h, n] = st.x_m[0, hit[0]], st.y_m[0, hit[0]]
        rows = np.zeros((len(later), n_n, r.predicted.shape[-1]))
        rows[..., F_X], rows[..., F_Y] = np.nan_to_num(truth[..., 0]), np.nan_to_num(truth[..., 1])
        rows[..., F_VALID] = 1.0
        framed = to_frame(
            rows, np.broadcast_to(r.anchor_pose[:2], (len(later), 2)), np.broadcast_to(r.anchor_pose[2], (len(later),))
        )
        pred = r.predicted[:, : len(later)]
        ok = np.isfinite(truth[..., 0]) & (pred[..., F_VALID] > 0.5).all(axis=0)
        ok[:, EGO] = False
        if not ok.any():
            out.append(None)
            continue
        dist = np.hypot(pred[..., F_X] - framed[None, ..., F_X], pred[..., F_Y] - framed[None, ..., F_Y])
        per_future = np.where(ok[None], dist, 0.0).sum(axis=(1, 2)) / ok.sum()
        out.append(
            {
                "mean_m": float(per_future.mean()),
                "best_m": float(per_future.min()),
                "objects": int(ok.any(axis=0).sum()),
                "steps": len(later),
            }
        )
    return out
