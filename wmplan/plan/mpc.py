"""The receding-horizon planner: sample candidate plans, roll each through a predictor's K futures, score, act.

At every decision (0.2 s) and for a batch of B scenes at once:

1. **Candidates.** C plans per scene. A plan is a target lane (the current one or a neighbour) and a smooth
   acceleration sequence over H steps; its steering sequence comes from a lane-tracking law run along the ego's
   kinematic bicycle model, plus a small smooth steering perturbation. The sampler (CEM or MPPI, published
   methods, :mod:`wmplan.plan.samplers`) keeps, per scene, a mean acceleration sequence, its spread and the
   probabilities of the three target lanes, warm-started from the previous decision shifted by one step. A few
   fixed candidates (the warm start itself, keeping speed, braking firmly, braking fully) are always included.
2. **Futures.** One batched predictor call: rows (B, C, K, H, N, F).
3. **Costs.** Progress, speed, comfort (acceleration, jerk, steering rate), lane keeping, the merge deadline and
   staying on the road (all from the ego's own path and the road geometry), and risk from the K futures
   (:func:`wmplan.plan.risk.summarise_risk`): collision probability, CVaR of the clearance shortfall, minimum
   time to collision. Risk enters as a weighted penalty or as a chance constraint P(collision) <= epsilon.
4. **Act.** Apply the first action of the chosen plan (CEM: the lowest-cost candidate; MPPI: the candidate of
   highest weight, while the weighted mean warm-starts the next decision) and update the sampler with the updates
   of :mod:`wmplan.plan.samplers` (CEM: :func:`~wmplan.plan.samplers.cem_update`, elites refit by maximum
   likelihood and smoothed by ``cem_alpha``; MPPI: :func:`~wmplan.plan.samplers.mppi_update`). The lane
   probabilities move halfway toward the elites' (CEM) or the weights' (MPPI) lane shares.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
import torch

from wmplan.errors import ConfigError
from wmplan.model.ego import EgoKinematics
from wmplan.model.nets import randn_rows
from wmplan.plan.base import HISTORY_STEPS, Decision, Observation
from wmplan.plan.predictors import NUM_OBJECTS, DecisionContext, Predictor, make_context
from wmplan.plan.risk import summarise_risk
from wmplan.plan.samplers import (
    ar1_filter_matrix,
    cem_update,
    mppi_update,
    mppi_weights,
    select_elites,
    shift_warm_start,
)
from wmplan.sim.params import SimParams

LANE_CHOICES = (-1, 0, 1)
NUM_FIXED = 4
"""Fixed candidates at the head of every batch: the warm start, keep speed, brake firmly, brake fully."""
FIRM_BRAKE_MPS2 = 4.0


@dataclass(frozen=True)
class CostWeights:
    """Weights of the cost terms (each term is of order one for ordinary driving)."""

    progress: float = 1.0
    """Per unit of (distance over the horizon) / (speed limit x horizon), rewarded."""
    speed: float = 0.5
    """Squared relative deviation from the target speed, averaged over the horizon."""
    accel: float = 0.05
    """Mean squared acceleration per (m/s^2)^2."""
    jerk: float = 0.02
    """Mean squared jerk per (m/s^3)^2."""
    steer_rate: float = 2.0
    """Mean squared steering rate per (rad/s)^2."""
    lane: float = 0.1
    """Mean squared lateral distance to the target lane's centre per m^2."""
    merge: float = 2.0
    """Per step spent in a lane that is about to end, scaled by how close its end is."""
    offroad: float = 100.0
    """Per step any corner of the ego is off the road."""
    collision: float = 200.0
    """Per unit of collision probability (penalty mode), counting futures that come within
    ``PlannerConfig.collision_margin_m`` of contact."""
    from_behind: float = 0.25
    """Share of ``collision`` charged for a future whose first near contact is a vehicle running into the ego from
    behind in its lane (penalty mode). The driver behind must keep a safe distance (common practice, no source),
    and a predictor that gets the follower's reaction wrong (a learned model seldom sees the ego brake hard) would
    otherwise forbid the hard braking that avoids running into the vehicle ahead."""
    cvar: float = 2.0
    """Per metre of CVaR of the clearance shortfall."""
    ttc: float = 1.0
    """Per (s)^2 by which the minimum time to collision falls below ``ttc_threshold_s``."""
    headway: float = 3.0
    """Per (s)^2 by which the time gap to the vehicle ahead falls below ``headway_s``, averaged over steps and
    futures (time headway as a safety indicator: Vogel 2003; the two-second rule is common practice)."""


@dataclass(frozen=True)
class PlannerConfig:
    """Everything the sampling planner needs to know; the defaults are the 'default budget'."""

    sampler: str = "cem"
    """'cem' or 'mppi'."""
    num_candidates: int = 64
    num_futures: int = 8
    horizon: int = 15
    plan_dt_s: float = 0.2
    risk_mode: str = "penalty"
    """'penalty' (weighted) or 'chance' (P(collision) <= epsilon as a constraint)."""
    epsilon: float = 0.05
    """Chance-constraint level on the collision probability."""
    use_upper_bound: bool = False
    """Chance constraint on the Wilson upper bound instead of the point estimate."""
    accel_std_mps2: float = 1.0
    steer_noise_rad: float = 0.01
    smoothing: float = 0.8
    """AR(1) coefficient of the sampled acceleration noise between steps."""
    num_elites: int = 8
    cem_alpha: float = 0.7
    """Weight of the new elite statistics against the old (CEM smoothing)."""
    min_std_mps2: float = 0.3
    mppi_lambda: float = 1.0
    lane_prob_floor: float = 0.05
    cvar_alpha: float = 0.8
    safe_distance_m: float = 2.0
    """Upper bound (m) of the clearance below which the CVaR shortfall cost starts. The threshold used is the
    smaller of this and the ego's own lateral room in its lane, (lane width - ego width) / 2: a vehicle that
    keeps to the next lane never comes closer than that, so passing it costs nothing, while one that drifts over
    the marking, or a gap closing to under that room, does (:meth:`SamplingPlanner.shortfall_threshold_m`)."""
    collision_margin_m: float = 0.3
    """Clearance (m) at or below which a predicted future counts as a collision in the cost and the chance
    constraint (the footprints inflated by this buffer). The logged and calibrated P(collision) stays that of
    actual contact."""
    ttc_threshold_s: float = 2.0
    headway_s: float = 1.2
    """Desired minimum time gap to the vehicle ahead in the ego's path."""
    target_speed_fraction: float = 0.95
    """Target speed as a fraction of the speed limit."""
    weights: CostWeights = field(default_factory=CostWeights)

    def __post_init__(self) -> None:
        if self.sampler not in ("cem", "mppi"):
            raise ConfigError(f"PlannerConfig.sampler must be 'cem' or 'mppi', got {self.sampler!r}")
        if self.risk_mode not in ("penalty", "chance"):
            raise ConfigError(f"PlannerConfig.risk_mode must be 'penalty' or 'chance', got {self.risk_mode!r}")
        if not 0.0 < self.epsilon < 1.0:
            raise ConfigError(f"PlannerConfig.epsilon must lie in (0, 1), got {self.epsilon}")
        for name in ("num_candidates", "num_futures", "horizon", "num_elites"):
            if getattr(self, name) < 1:
                raise ConfigError(f"PlannerConfig.{name} must be >= 1, got {getattr(self, name)}")
        if self.num_elites > self.num_candidates:
            raise ConfigError("PlannerConfig.num_elites must not exceed num_candidates")
        if self.num_candidates < NUM_FIXED:
            raise ConfigError(f"PlannerConfig.num_candidates must be >= {NUM_FIXED} (the fixed candidates)")
        if not 0.0 <= self.collision_margin_m <= self.safe_distance_m:
            raise ConfigError(
                f"PlannerConfig.collision_margin_m must lie in [0, safe_distance_m], got {self.collision_margin_m}"
            )

    def to_dict(self) -> dict:
        """The configuration as a JSON-ready dict."""
        return asdict(self)


@dataclass
class PlanResult:
    """One decision for B scenes."""

    action: np.ndarray  # (B, 2) applied now
    p_collision: np.ndarray  # (B,) predicted collision probability of the chosen plan
    p_collision_ci: np.ndarray  # (B, 2) Wilson 95% interval
    min_ttc_s: np.ndarray  # (B,)
    cost: np.ndarray  # (B,)
    plans: torch.Tensor | None = None  # (B, C, H, 2) candidates (kept when asked, for plots)
    costs: torch.Tensor | None = None  # (B, C)
    futures: torch.Tensor | None = None  # (B, C, K, H, N, F)
    chosen: np.ndarray | None = None  # (B,)
    risk: dict | None = None


class SamplingPlanner:
    """CEM or MPPI over candidate plans for B scenes at once, with a predictor for the other vehicles.

    It is a :class:`wmplan.plan.base.Planner`: ``reset(episode_keys)`` then ``decide(obs)`` in the closed loop;
    ``plan(ctx, generator=...)`` is the same decision on a ready-made :class:`DecisionContext`.
    """

    history_steps = HISTORY_STEPS
    num_objects = NUM_OBJECTS
    """Other vehicles in the object list the predictor sees (the nearest ones)."""

    def __init__(self, cfg: PlannerConfig, params: SimParams, predictor: Predictor, ego: EgoKinematics):
        self.cfg = cfg
        self.params = params
        self.predictor = predictor
        self.ego = ego
        h = cfg.horizon
        self._filter = ar1_filter_matrix(h, cfg.smoothing)  # (H, H)
        self.mean = None
        self.std = None
        self.lane_p = None
        self.prev_lane = None
        self._generators: list[torch.Generator] = []

    @property
    def decision_dt_s(self) -> float:
        """Seconds between decisions (the plan's step)."""
        return self.cfg.plan_dt_s

    @property
    def horizon_decisions(self) -> int:
        """Decisions covered by the predicted P(collision) of a plan."""
        return self.cfg.horizon

    # --- the closed loop's protocol ---------------------------------------------------------------------------

    def reset(self, episode_keys: np.ndarray) -> None:
        """Forget the warm starts and seed one torch generator per episode from its key."""
        keys = np.asarray(episode_keys, dtype=np.int64).reshape(-1)
        self.reset_state(len(keys))
        self._generators = [torch.Generator().manual_seed(int(k)) for k in keys]

    def decide(self, obs: Observation) -> Decision:
        """Plan for the episodes of ``obs`` from their history of world rows; the chosen plans' P(collision)."""
        ctx = make_context(obs.params, obs.state, obs.history, obs.history_ids, self.num_objects)
        res = self.plan(ctx, generator=[self._generators[i] for i in obs.rows], rows=obs.rows)
        return Decision(actions=res.action, p_collision=res.p_collision)

    # --- sampler state ----------------------------------------------------------------------------------------

    def reset_state(self, num_scenes: int) -> None:
        """Forget the warm starts; keep sampler state for ``num_scenes`` scenes."""
        h = self.cfg.horizon
        self.mean = torch.zeros(num_scenes, h)
        self.std = torch.full((num_scenes, h), self.cfg.accel_std_mps2)
        self.lane_p = torch.tensor([0.15, 0.7, 0.15]).repeat(num_scenes, 1)
        self.prev_lane = torch.full((num_scenes,), -1, dtype=torch.long)

    def _recentre(self, lane_p: torch.Tensor, prev_lane: torch.Tensor, lane_now: torch.Tensor) -> torch.Tensor:
        """Lane choices are relative to the current lane: after the ego changes lane, shift their probabilities
        so that the lane it was heading for stays the favoured one."""
        delta = torch.where(prev_lane >= 0, (lane_now - prev_lane).clamp(-1, 1), torch.zeros_like(lane_now))
        floor = torch.full_like(lane_p[:, 0], self.cfg.lane_prob_floor)
        up = torch.stack([lane_p[:, 1], lane_p[:, 2], floor], -1)
        down = torch.stack([floor, lane_p[:, 0], lane_p[:, 1]], -1)
        out = torch.where((delta > 0)[:, None], up, torch.where((delta < 0)[:, None], down, lane_p))
        return out / out.sum(-1, keepdim=True)

    # --- candidates -------------------------------------------------------------------------------------------

    def _lane_info(self, ctx: DecisionContext) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """Current lane, whether each of the three target lanes exists ahead, and the lateral position (road)."""
        p = self.params
        x, y = ctx.ego_pose[:, 0], ctx.ego_pose[:, 1]
        lane = p.lane_of(y)
        ok = np.stack(
            [p.lane_exists(lane + d, x) & p.lane_exists(lane + d, x + 40.0) | (d == 0) for d in LANE_CHOICES], axis=1
        )
        return torch.from_numpy(lane), torch.from_numpy(ok), torch.from_numpy(y)

    def candidates(
        self,
        ctx: DecisionContext,
        mean: torch.Tensor,
        std: torch.Tensor,
        lane_p: torch.Tensor,
        generator: torch.Generator,
    ) -> tuple[torch.Tensor, torch.Tensor]:
        """(B, C, H, 2) candidate plans and (B, C) their target-lane choice index into LANE_CHOICES, around the
        sampler state ``mean``, ``std`` (B, H) and ``lane_p`` (B, 3)."""
        cfg, p = self.cfg, self.params
        b, c, h = ctx.history.shape[0], cfg.num_candidates, cfg.horizon
        lane, lane_ok, y_road = self._lane_info(ctx)
        probs = torch.where(lane_ok, lane_p, torch.zeros_like(lane_p))
        probs = probs / probs.sum(-1, keepdim=True)
        if isinstance(generator, torch.Generator):
            choice = torch.multinomial(probs, c, replacement=True, generator=generator)  # (B, C)
        else:  # one generator per scene: a scene's candidates do not depend on the rest of the batch
            choice = torch.stack(
                [torch.multinomial(probs[i], c, replacement=True, generator=g) for i, g in enumerate(generator)]
            )
        noise = randn_rows((b, c, h), generator) @ self._filter.T  # smooth, unit marginal std
        accel = mean[:, None] + std[:, None] * noise
        # fixed candidates: the warm start on its best lane, keep speed, brake firmly, brake as hard as the limits
        # allow (the way out when a vehicle cuts in close ahead: sampled plans seldom reach full braking)
        best_lane = probs.argmax(-1)
        accel[:, 0] = mean
        choice[:, 0] = best_lane
        accel[:, 1] = 0.0
        choice[:, 1] = 1
        accel[:, 2] = -FIRM_BRAKE_MPS2
        choice[:, 2] = 1
        accel[:, 3] = -p.max_brake_mps2
        choice[:, 3] = 1
        accel = accel.clamp(-p.max_brake_mps2, p.max_accel_mps2)
        steer_noise = (randn_rows((b, c, h), generator) @ self._filter.T) * cfg.steer_noise_rad
        steer_noise[:, :NUM_FIXED] = 0.0
        d_lane = torch.tensor(LANE_CHOICES)[choice]  # (B, C)
        y_target = ((lane[:, None] + d_lane).double() + 0.5) * p.lane_width_m - y_road[:, None]  # relative, metres
        steer = self.track_lane(ctx, accel, y_target.float(), steer_noise)
        return torch.stack([accel, steer], dim=-1), choice

    def track_lane(
        self, ctx: DecisionContext, accel: torch.Tensor, y_target_m: torch.Tensor, steer_noise: torch.Tensor
    ) -> torch.Tensor:
        """Steering (B, C, H) that brings the ego to ``y_target_m`` (lateral offset from now, road frame) along
        its kinematic path under ``accel`` (B, C, H); a proportional law on lateral and heading error (the same
        law as the rule-based ego, common practice)."""
        from wmplan.sim.ego_rules import HEADING_GAIN_PER_S, LATERAL_GAIN, MAX_HEADING_RAD

        e = self.ego
        b, c, h = accel.shape
        x = torch.zeros(b, c)
        y = torch.zeros(b, c)
        psi = torch.from_numpy(ctx.ego_pose[:, 2].astype(np.float32))[:, None].expand(b, c)
        v = ctx.ego_speed_mps[:, None].expand(b, c)
        steer = ctx.ego_steer_rad[:, None].expand(b, c)
        out = []
        for k in range(h):
            err = y_target_m - y
            vv = v.clamp_min(1.0)
            head_des = torch.atan(LATERAL_GAIN * err * 10.0 / vv.clamp_min(5.0)).clamp(
                -MAX_HEADING_RAD, MAX_HEADING_RAD
            )
            cmd = torch.atan(e.wheelbase_m * HEADING_GAIN_PER_S * (head_des - psi) / vv) + steer_noise[..., k]
            cmd = cmd.clamp(-e.max_steer_rad, e.max_steer_rad)
            a = accel[..., k]
            for _ in range(e.substeps):
                x, y, psi, v, steer, _ = e.substep(x, y, psi, v, steer, a, cmd)
            out.append(cmd)
        return torch.stack(out, dim=-1)

    # --- costs ------------------------------------------------------------------------------------------------

    def shortfall_threshold_m(self) -> float:
        """Clearance (m) below which the CVaR shortfall cost starts: ``min(safe_distance_m, (lane width - ego
        width) / 2)``, and never below the collision margin."""
        p = self.params
        room = 0.5 * (p.lane_width_m - p.ego_width_m)
        return float(max(self.cfg.collision_margin_m, min(self.cfg.safe_distance_m, room)))

    def costs(self, ctx: DecisionContext, plans: torch.Tensor, choice: torch.Tensor, futures: torch.Tensor) -> dict:
        """Cost of every candidate (B, C) and its parts."""
        cfg, p, w = self.cfg, self.params, self.cfg.weights
        dt = cfg.plan_dt_s
        rows = futures  # (B, C, K, H, N, F)
        ego = rows[:, :, 0, :, 0, :]  # (B, C, H, F): the ego's path is the same in every future
        pose = torch.from_numpy(ctx.ego_pose.astype(np.float64))
        ch, sh = torch.cos(pose[:, 2]), torch.sin(pose[:, 2])
        ex = (
            pose[:, None, None, 0] + ch[:, None, None] * ego[..., 0].double() - sh[:, None, None] * ego[..., 1].double()
        )
        ey = (
            pose[:, None, None, 1] + sh[:, None, None] * ego[..., 0].double() + ch[:, None, None] * ego[..., 1].double()
        )
        heading = pose[:, None, None, 2] + ego[..., 4].double()
        speed = torch.hypot(ego[..., 2], ego[..., 3]).double()
        v_lim = p.speed_limit_mps
        horizon_s = cfg.horizon * dt
        progress = (ex[..., -1] - pose[:, None, 0]) / (v_lim * horizon_s)
        v_target = cfg.target_speed_fraction * v_lim
        speed_cost = (((speed - v_target) / v_target) ** 2).mean(-1)
        accel = plans[..., 0].double()
        prev_a = torch.cat([accel[..., :1], accel[..., :-1]], dim=-1)
        jerk = (accel - prev_a) / dt
        steer = plans[..., 1].double()
        steer_prev = torch.cat(
            [ctx.ego_steer_rad.double()[:, None, None].expand(-1, steer.shape[1], 1), steer[..., :-1]], -1
        )
        steer_rate = (steer - steer_prev) / dt
        comfort = w.accel * (accel**2).mean(-1) + w.jerk * (jerk**2).mean(-1) + w.steer_rate * (steer_rate**2).mean(-1)
        lane_now = torch.from_numpy(p.lane_of(ctx.ego_pose[:, 1]))
        target_lane = lane_now[:, None] + torch.tensor(LANE_CHOICES)[choice]
        y_c = (target_lane.double() + 0.5) * p.lane_width_m
        lane_cost = ((ey - y_c[..., None]) ** 2).mean(-1)
        # road geometry along the path
        lane_idx = torch.floor(ey / p.lane_width_m).long()
        start = torch.from_numpy(p.lane_start_m)
        end = torch.from_numpy(p.lane_end_m)
        li = lane_idx.clamp(0, p.num_lanes - 1)
        ends = torch.from_numpy(p.lane_ends_on_road)[li]
        d_end = torch.where(ends, end[li] - ex, torch.full_like(ex, math.inf))
        merge_cost = torch.where(
            d_end < p.merge_zone_m, 1.0 - d_end.clamp(0, p.merge_zone_m) / p.merge_zone_m, torch.zeros_like(ex)
        ).sum(-1)
        off = self._offroad(ex, ey, heading, start, end)
        offroad_cost = off.double().sum(-1)
        # risk from the K futures
        risk = summarise_risk(
            rows,
            cvar_alpha=cfg.cvar_alpha,
            safe_distance_m=self.shortfall_threshold_m(),
            margin_m=cfg.collision_margin_m,
        )
        p_coll = risk.p_near.double()  # contact within the margin: what the cost and the constraint see
        ttc_short = (cfg.ttc_threshold_s - risk.min_ttc_s.double().clamp(max=cfg.ttc_threshold_s)) ** 2
        gap = risk.leader_gap_m  # (B, C, K, H)
        ego_v = torch.hypot(rows[..., 0, 2], rows[..., 0, 3]).clamp_min(1.0)
        thw = gap.double() / ego_v.double()
        headway_short = ((cfg.headway_s - thw.clamp(max=cfg.headway_s)) ** 2).mean((-1, -2))
        total = (
            -w.progress * progress
            + w.speed * speed_cost
            + comfort
            + w.lane * lane_cost
            + w.merge * merge_cost
            + w.offroad * offroad_cost
            + w.cvar * risk.cvar_shortfall_m.double()
            + w.ttc * ttc_short
            + w.headway * headway_short
        )
        if cfg.risk_mode == "penalty":
            behind = risk.p_near_from_behind.double()
            total = total + w.collision * (p_coll - (1.0 - w.from_behind) * behind)
        else:
            bound = risk.p_near_high.double() if cfg.use_upper_bound else p_coll
            infeasible = bound > cfg.epsilon
            # infeasible plans rank after every feasible one, by their collision probability
            total = torch.where(infeasible, 1e6 + 1e3 * bound + total * 1e-3, total)
        return {"total": total, "risk": risk, "progress": progress, "offroad": off.any(-1)}

    def _offroad(self, ex, ey, heading, start, end) -> torch.Tensor:
        """(B, C, H) True where any corner of the ego's footprint lies where no lane exists."""
        p = self.params
        hl, hw = 0.5 * p.ego_length_m, 0.5 * p.ego_width_m
        c, s = torch.cos(heading), torch.sin(heading)
        off = torch.zeros_like(ex, dtype=torch.bool)
        for sx, sy in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
            cx = ex + c * sx * hl - s * sy * hw
            cy = ey + s * sx * hl + c * sy * hw
            li = torch.floor(cy / p.lane_width_m).long()
            inside = (li >= 0) & (li < p.num_lanes)
            lic = li.clamp(0, p.num_lanes - 1)
            off |= ~(inside & (cx >= start[lic]) & (cx <= end[lic]))
        return off

    # --- one decision -----------------------------------------------------------------------------------------

    @torch.inference_mode()
    def plan(
        self, ctx: DecisionContext, *, generator: torch.Generator, rows: np.ndarray | None = None, keep: bool = False
    ) -> PlanResult:
        """Choose the action of every scene of ``ctx``.

        Args:
            ctx: the decision context of B scenes.
            generator: the planner's only source of randomness: one generator, or a list with one per scene (then
                a scene's decisions do not depend on the other scenes of the batch).
            rows: which rows of the planner's per-scene sampler state these B scenes are (default: all, and the
                state is (re)sized to B on first use).
            keep: also return all candidates, their costs and futures (for plots).
        """
        cfg = self.cfg
        b = ctx.history.shape[0]
        if rows is None:
            if self.mean is None or self.mean.shape[0] != b:
                self.reset_state(b)
            rows = np.arange(b)
        ridx = torch.from_numpy(np.asarray(rows, dtype=np.int64))
        lane_now = torch.from_numpy(self.params.lane_of(ctx.ego_pose[:, 1]))
        mean, std = self.mean[ridx], self.std[ridx]
        lane_p = self._recentre(self.lane_p[ridx], self.prev_lane[ridx], lane_now)
        plans, choice = self.candidates(ctx, mean, std, lane_p, generator)
        futures = self.predictor.predict(ctx, plans, cfg.num_futures, generator=generator)
        parts = self.costs(ctx, plans, choice, futures)
        total = parts["total"].float()  # (B, C)
        bi = torch.arange(b)
        accel = plans[..., :1]  # (B, C, H, 1): the sampler's variable (the steering follows the target lane)
        lanes = torch.nn.functional.one_hot(choice, 3).float()[:, :, None, :]  # (B, C, 1, 3)
        if cfg.sampler == "cem":
            mean, std = cem_update(accel, total, cfg.num_elites, mean[..., None], std[..., None], alpha=cfg.cem_alpha)
            mean, std = mean[..., 0], std[..., 0]
            onehot = select_elites(lanes, total, cfg.num_elites).mean(dim=-3)[:, 0]  # (B, 3) elite lane shares
            best = total.argmin(dim=1)
        else:
            wts = mppi_weights(total, cfg.mppi_lambda)  # (B, C)
            mean = mppi_update(mean[..., None], accel, total, cfg.mppi_lambda)[..., 0]
            mean = mean.clamp(-self.params.max_brake_mps2, self.params.max_accel_mps2)
            onehot = (wts[..., None] * lanes[:, :, 0]).sum(1)
            # The weighted mean warm-starts the next decision; the action applied now is the first step of the
            # highest-weight candidate, so that the plan executed is one whose futures and risk were scored.
            best = wts.argmax(dim=1)
        action = plans[bi, best, 0]
        lane_p = (0.5 * lane_p + 0.5 * onehot).clamp_min(cfg.lane_prob_floor)
        # --- write the sampler state back, shifted one step for the next decision (warm start) ---
        self.mean[ridx] = shift_warm_start(mean[..., None])[..., 0]
        self.std[ridx] = shift_warm_start(std[..., None])[..., 0].clamp_min(cfg.min_std_mps2)
        self.lane_p[ridx] = lane_p / lane_p.sum(-1, keepdim=True)
        self.prev_lane[ridx] = lane_now
        risk = parts["risk"]
        res = PlanResult(
            action=action.double().numpy(),
            p_collision=risk.p_collision[bi, best].double().numpy(),
            p_collision_ci=torch.stack([risk.p_collision_low[bi, best], risk.p_collision_high[bi, best]], -1)
            .double()
            .numpy(),
            min_ttc_s=risk.min_ttc_s[bi, best].double().numpy(),
            cost=total[bi, best].double().numpy(),
            chosen=best.numpy(),
        )
        if keep:
            res.plans, res.costs, res.futures = plans, total, futures
            res.risk = {
                "p_collision": risk.p_collision,
                "cvar_shortfall_m": risk.cvar_shortfall_m,
                "min_ttc_s": risk.min_ttc_s,
            }
        return res
