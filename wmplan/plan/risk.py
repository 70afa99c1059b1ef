"""Risk measures that turn K sampled futures into numbers a planner can rank candidates by (torch).

Letters used in shapes: ``B*`` any leading axes (typically ``(C, K)`` candidates x futures), ``C`` candidates,
``K`` sampled futures, ``H`` horizon steps, ``V`` vehicles (row 0 is the ego), ``F`` vehicle features in the
order of :data:`wmplan.sim.features.VEHICLE_FEATURES`: ``[x_m, y_m, vx_mps, vy_mps, heading_rad, length_m,
width_m, valid]``. Any common planar frame works (world frame or the ego frame of the decision time): every
geometric quantity below is computed from positions and velocities relative to the ego's own row at that step.

Formulas and sources:

- Collision probability over K equally likely futures: the fraction that collide; its Wilson (1927) score
  interval (:func:`wmplan.intervals.wilson_interval`).
- CVaR (Rockafellar & Uryasev, J. Risk 2(3), 2000, Theorem 1; atoms: J. Banking & Finance 26, 2002):
  ``CVaR_a(L) = min_c c + E[(L - c)^+] / (1 - a)``, the mean of the worst ``1 - a`` probability mass of ``L``,
  splitting the sample that straddles the ``a``-quantile. VaR is ``inf{c : P(L <= c) >= a}``.
- Time to collision (Hayward 1972) for a follower-leader pair at constant speeds: ``gap / (v_f - v_l)`` if
  ``v_f > v_l`` else +inf; deceleration to avoid a crash (DRAC, leader at constant speed):
  ``(v_f - v_l)^2 / (2 gap)`` if closing else 0.
- Clearance: the exact signed distance between two oriented rectangles (vehicle footprints). Positive: the
  Euclidean distance between the rectangles (attained at a vertex of one of them, so the minimum of the 8
  vertex-to-rectangle distances). Zero or negative: the boxes touch or overlap, and the value is minus the
  penetration depth, the smallest overlap of the projections on the four edge normals (separating-axis theorem;
  Gottschalk, Lin, Manocha 1996; Ericson 2005). We chose rectangles over discs because a single disc around a
  4.5 x 1.8 m car reaches 2.4 m sideways and would report a collision with every car in the next lane.

Functions accept torch tensors or numpy arrays; they return torch tensors (float inputs keep their dtype,
integer and boolean inputs become float32). They do not track gradients specially: call them inside the
planner's ``torch.inference_mode()`` block. These numbers describe a simplified traffic model; they certify
nothing about a real vehicle.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch import Tensor

from wmplan.errors import ConfigError
from wmplan.intervals import Z_95, wilson_interval
from wmplan.sim.features import (
    F_HEADING,
    F_LENGTH,
    F_VALID,
    F_VX,
    F_VY,
    F_WIDTH,
    F_X,
    F_Y,
    NUM_VEHICLE_FEATURES,
    VEHICLE_FEATURES,
)

BOX_FIELDS = ("x_m", "y_m", "heading_rad", "length_m", "width_m")
"""Layout of the last axis of the boxes taken by :func:`box_signed_distance_m`."""


# --- conversions ----------------------------------------------------------------------------------------------


def _float(name: str, value: object) -> Tensor:
    try:
        out = torch.as_tensor(value)
    except (TypeError, ValueError, RuntimeError) as exc:
        raise ConfigError(f"{name}: cannot convert {type(value).__name__} to a tensor ({exc})") from None
    return out if out.is_floating_point() else out.to(torch.float32)


def _futures(futures: object) -> Tensor:
    out = _float("futures", futures)
    if out.ndim < 3 or out.shape[-1] != NUM_VEHICLE_FEATURES or out.shape[-2] < 1:
        raise ConfigError(
            f"futures has shape {tuple(out.shape)}; expected (B*, H, V, {NUM_VEHICLE_FEATURES}) with the ego in "
            f"row 0 of V and features {VEHICLE_FEATURES}"
        )
    return out


def _alpha(alpha: float) -> float:
    alpha = float(alpha)
    if not 0.0 <= alpha < 1.0:
        raise ConfigError(f"alpha (CVaR/VaR level) must lie in [0, 1), got {alpha!r}")
    return alpha


# --- probabilities and intervals ------------------------------------------------------------------------------


def collision_probability(collided: object) -> Tensor:
    """Fraction of K equally likely futures in which a collision happens.

    Args:
        collided: (B*, K) bool (or 0/1) flags.

    Returns:
        (B*,) float32 probabilities.
    """
    flags = torch.as_tensor(collided)
    if flags.ndim < 1 or flags.shape[-1] < 1:
        raise ConfigError(f"collided has shape {tuple(flags.shape)}; expected (B*, K) with K >= 1")
    return flags.to(torch.float32).mean(dim=-1)


# --- VaR and CVaR ---------------------------------------------------------------------------------------------


def value_at_risk(losses: object, alpha: float) -> Tensor:
    """``VaR_a = inf{c : P(L <= c) >= a}`` of K equally likely samples (the lower a-quantile).

    Args:
        losses: (B*, K).
        alpha: level in [0, 1); alpha = 0 gives the smallest sample.

    Returns:
        (B*,) tensor of the input's float dtype.
    """
    alpha = _alpha(alpha)
    values = _float("losses", losses)
    num = values.shape[-1] if values.ndim else 0
    if num < 1:
        raise ConfigError(f"losses has shape {tuple(values.shape)}; expected (B*, K) with K >= 1")
    # Index of the ceil(alpha K)-th smallest sample; the tolerance absorbs rounding of alpha * K (0.7 * 10).
    idx = max(math.ceil(alpha * num - 1e-9) - 1, 0)
    return torch.sort(values, dim=-1).values[..., idx]


def cvar(losses: object, alpha: float) -> Tensor:
    """Conditional value-at-risk of K equally likely samples, splitting the atom at the quantile.

    The worst ``1 - alpha`` probability mass is averaged: sorted from the largest down, sample i (1-based)
    carries mass ``clip(1 - alpha - (i - 1)/K, 0, 1/K)``. On ``[0,0,0,0,0,0,0,1,5,10]`` with alpha = 0.85 this
    counts 10 fully and half of 5, giving 8.3333 (not the 7.5 of "mean of the worst ceil(0.15 K) samples").
    Equals ``min_c c + mean((L - c)^+) / (1 - alpha)`` (Rockafellar & Uryasev 2000).

    Args:
        losses: (B*, K) samples; +inf allowed (the CVaR is then +inf if it reaches the tail).
        alpha: level in [0, 1); alpha = 0 gives the mean.

    Returns:
        (B*,) tensor of the input's float dtype.
    """
    alpha = _alpha(alpha)
    values = _float("losses", losses)
    if values.ndim < 1 or values.shape[-1] < 1:
        raise ConfigError(f"losses has shape {tuple(values.shape)}; expected (B*, K) with K >= 1")
    if bool(torch.isnan(values).any()):
        raise ConfigError("losses contains NaN; CVaR needs every sample to be a number (+inf is allowed)")
    num = values.shape[-1]
    tail_mass = 1.0 - alpha
    rank = torch.arange(num, dtype=torch.float64)  # i - 1
    mass = (tail_mass - rank / num).clamp(0.0, 1.0 / num)  # (K,) float64
    worst_first = torch.sort(values, dim=-1, descending=True).values.to(torch.float64)
    contrib = torch.where(mass > 0, mass * worst_first, 0.0)  # 0 * inf would be NaN
    return (contrib.sum(dim=-1) / tail_mass).to(values.dtype)


# --- car-following surrogate measures -------------------------------------------------------------------------


def time_to_collision(gap_m: object, closing_speed_mps: object) -> Tensor:
    """Seconds until the gap closes if both vehicles keep their current speed (Hayward 1972).

    Args:
        gap_m: (B*,) bumper-to-bumper gap to the leader.
        closing_speed_mps: (B*,) follower speed minus leader speed, broadcastable with gap_m.

    Returns:
        (B*,) time to collision in seconds; +inf where the gap is not closing, 0 where the gap is already <= 0.
    """
    gap = _float("gap_m", gap_m)
    closing = _float("closing_speed_mps", closing_speed_mps).to(gap.dtype)
    ttc = torch.where(closing > 0, gap / closing, torch.inf)
    return torch.where(gap <= 0, 0.0, ttc).to(gap.dtype)


def deceleration_to_avoid_crash_mps2(gap_m: object, closing_speed_mps: object) -> Tensor:
    """DRAC: braking the follower needs to match a constant-speed leader's speed just as the gap closes.

    Args:
        gap_m: (B*,) bumper-to-bumper gap to the leader.
        closing_speed_mps: (B*,) follower speed minus leader speed.

    Returns:
        (B*,) ``closing^2 / (2 gap)`` in m/s^2 (a positive deceleration); 0 where not closing; +inf where closing
        with no gap left.
    """
    gap = _float("gap_m", gap_m)
    closing = _float("closing_speed_mps", closing_speed_mps).to(gap.dtype)
    drac = torch.where(gap > 0, closing * closing / (2 * gap), torch.inf)
    return torch.where(closing > 0, drac, 0.0).to(gap.dtype)


# --- oriented boxes -------------------------------------------------------------------------------------------


def _vertex_distance_sq(
    px: Tensor, py: Tensor, ex: Tensor, ey: Tensor, fx: Tensor, fy: Tensor, hl: Tensor, hw: Tensor
) -> Tensor:
    """Smallest squared distance from the 4 points p +- e +- f to the axis-aligned box [-hl, hl] x [-hw, hw].

    All inputs (B*,); e and f are the half-length and half-width vectors of the other box. Returns (B*,).
    """
    ux, uy, wx, wy = ex + fx, ey + fy, ex - fx, ey - fy
    # Corners on a new leading axis: torch broadcasts much faster along leading axes than trailing ones.
    vx = torch.stack([px + ux, px - ux, px + wx, px - wx])  # (4, B*)
    vy = torch.stack([py + uy, py - uy, py + wy, py - wy])
    qx = vx.abs_().sub_(hl).clamp_(min=0.0)
    qy = vy.abs_().sub_(hw).clamp_(min=0.0)
    return qx.mul_(qx).addcmul_(qy, qy).amin(dim=0)


def _signed_distance(
    dx_a: Tensor,
    dy_a: Tensor,
    cos_rel: Tensor,
    sin_rel: Tensor,
    hl_a: Tensor,
    hw_a: Tensor,
    hl_b: Tensor,
    hw_b: Tensor,
) -> Tensor:
    """Signed distance between boxes a and b, all inputs broadcast to (B*,).

    ``(dx_a, dy_a)`` is b's centre minus a's in a's frame (x along a's length); ``cos_rel, sin_rel`` are of
    b's yaw minus a's; ``hl, hw`` are half lengths and half widths.
    """
    abs_c, abs_s = cos_rel.abs(), sin_rel.abs()
    dx_b = cos_rel * dx_a + sin_rel * dy_a  # the same offset in b's frame
    dy_b = -sin_rel * dx_a + cos_rel * dy_a
    # Projection overlaps on the four edge normals (negative: separated along that axis); the smallest
    # is the penetration depth when all are >= 0.
    penetration = torch.minimum(
        torch.minimum(
            hl_a + hl_b * abs_c + hw_b * abs_s - dx_a.abs(),
            hw_a + hl_b * abs_s + hw_b * abs_c - dy_a.abs(),
        ),
        torch.minimum(
            hl_b + hl_a * abs_c + hw_a * abs_s - dx_b.abs(),
            hw_b + hl_a * abs_s + hw_a * abs_c - dy_b.abs(),
        ),
    )
    # Apart: the closest points include a vertex of one box, so check b's corners against a and a's against b.
    b_in_a = _vertex_distance_sq(
        dx_a, dy_a, hl_b * cos_rel, hl_b * sin_rel, -hw_b * sin_rel, hw_b * cos_rel, hl_a, hw_a
    )
    a_in_b = _vertex_distance_sq(
        -dx_b, -dy_b, hl_a * cos_rel, -hl_a * sin_rel, hw_a * sin_rel, hw_a * cos_rel, hl_b, hw_b
    )
    apart = torch.minimum(b_in_a, a_in_b).sqrt()
    return torch.where(penetration >= 0, -penetration, apart)


def box_signed_distance_m(box_a: object, box_b: object) -> Tensor:
    """Signed distance between oriented rectangles; <= 0 means touching or overlapping.

    Args:
        box_a: (B*, 5) rows ``[x_m, y_m, heading_rad, length_m, width_m]`` (centre, yaw, footprint).
        box_b: (B*, 5), broadcastable with box_a.

    Returns:
        (B*,) metres: the gap between the boxes where they are apart, minus the penetration depth (the shortest
        translation that separates them) where they overlap, 0 where they touch.
    """
    a, b = _float("box_a", box_a), _float("box_b", box_b)
    if a.shape[-1:] != (5,) or b.shape[-1:] != (5,):
        raise ConfigError(
            f"boxes have shapes {tuple(a.shape)} and {tuple(b.shape)}; expected (B*, 5) rows {BOX_FIELDS}"
        )
    a, b = torch.broadcast_tensors(a, b.to(a.dtype))
    cos_a, sin_a = torch.cos(a[..., 2]), torch.sin(a[..., 2])
    dx, dy = b[..., 0] - a[..., 0], b[..., 1] - a[..., 1]
    rel = b[..., 2] - a[..., 2]
    return _signed_distance(
        cos_a * dx + sin_a * dy,
        -sin_a * dx + cos_a * dy,
        torch.cos(rel),
        torch.sin(rel),
        0.5 * a[..., 3],
        0.5 * a[..., 4],
        0.5 * b[..., 3],
        0.5 * b[..., 4],
    )


# --- futures: clearance, collisions, time to collision --------------------------------------------------------


@dataclass(frozen=True)
class _Relative:
    """Other vehicles relative to the ego in the ego's heading frame; every field (V-1, B*, H), vehicles first.

    The vehicle axis leads so that the ego's values broadcast along a leading axis (fast in torch on CPU) and
    reductions over vehicles run over contiguous rows.
    """

    ahead_m: Tensor
    lateral_m: Tensor
    closing_mps: Tensor
    cos_rel: Tensor
    sin_rel: Tensor
    ego_half_length_m: Tensor
    ego_half_width_m: Tensor
    half_length_m: Tensor
    half_width_m: Tensor
    is_valid: Tensor


def _relative(futures: object) -> _Relative:
    rows = _futures(futures)
    cols = rows.movedim((-1, -2), (0, 1)).contiguous()  # (F, V, B*, H): one contiguous block per feature
    ego, oth = cols[:, 0], cols[:, 1:]  # (F, B*, H), (F, V-1, B*, H)
    cos_e, sin_e = torch.cos(ego[F_HEADING]), torch.sin(ego[F_HEADING])  # (B*, H)
    dx, dy = oth[F_X] - ego[F_X], oth[F_Y] - ego[F_Y]  # (V-1, B*, H)
    dvx, dvy = ego[F_VX] - oth[F_VX], ego[F_VY] - oth[F_VY]
    rel = oth[F_HEADING] - ego[F_HEADING]
    return _Relative(
        ahead_m=cos_e * dx + sin_e * dy,
        lateral_m=-sin_e * dx + cos_e * dy,
        closing_mps=cos_e * dvx + sin_e * dvy,
        cos_rel=torch.cos(rel),
        sin_rel=torch.sin(rel),
        ego_half_length_m=(0.5 * ego[F_LENGTH]).expand_as(dx),
        ego_half_width_m=(0.5 * ego[F_WIDTH]).expand_as(dx),
        half_length_m=0.5 * oth[F_LENGTH],
        half_width_m=0.5 * oth[F_WIDTH],
        is_valid=oth[F_VALID] > 0.5,
    )


def clearance_m(futures: object) -> Tensor:
    """Smallest signed box distance between the ego (row 0) and any other valid vehicle, per time step.

    Args:
        futures: (B*, H, V, F) predicted futures, e.g. (C, K, H, V, F).

    Returns:
        (B*, H) metres (see :func:`box_signed_distance_m`); +inf where no other vehicle is valid.
    """
    return _clearance(_relative(futures))


def _clearance(r: _Relative, exact_below_m: float | None = None) -> Tensor:
    return _clearances(r, exact_below_m).amin(dim=0)


def _clearances(r: _Relative, exact_below_m: float | None = None) -> Tensor:
    """Clearance to each other vehicle per step (V-1, B*, H), +inf for empty slots (``_clearance``: the
    smallest, (B*, H)). With ``exact_below_m``, pairs whose centres are so far apart that even their
    circumscribed discs are more than ``exact_below_m`` apart get that disc bound (a lower bound of their true
    distance, itself above ``exact_below_m``) instead of the exact box distance: the result is exact wherever the
    true clearance is below ``exact_below_m``, and above ``exact_below_m`` elsewhere. The planner uses this to skip
    the exact computation for the many far-away pairs."""
    if r.ahead_m.shape[0] == 0:
        return torch.full((1, *r.ahead_m.shape[1:]), torch.inf, dtype=r.ahead_m.dtype)
    args = (
        r.ahead_m,
        r.lateral_m,
        r.cos_rel,
        r.sin_rel,
        r.ego_half_length_m,
        r.ego_half_width_m,
        r.half_length_m,
        r.half_width_m,
    )
    if exact_below_m is None:
        dist = _signed_distance(*args)  # (V-1, B*, H)
    else:
        radius = torch.hypot(r.ego_half_length_m, r.ego_half_width_m) + torch.hypot(r.half_length_m, r.half_width_m)
        dist = torch.hypot(r.ahead_m, r.lateral_m) - radius  # disc bound
        near = r.is_valid & (dist <= exact_below_m)
        idx = near.nonzero(as_tuple=True)
        if idx[0].numel():
            dist = dist.index_put(idx, _signed_distance(*(a[idx] for a in args)))
    return torch.where(r.is_valid, dist, torch.inf)


def collides(futures: object) -> Tensor:
    """Whether the ego's footprint touches or overlaps another valid vehicle's, per time step.

    Args:
        futures: (B*, H, V, F).

    Returns:
        (B*, H) bool, ``clearance_m(futures) <= 0``.
    """
    return clearance_m(futures) <= 0


def leader_gap_and_closing(futures: object, lateral_margin_m: float = 0.0) -> tuple[Tensor, Tensor]:
    """Gap to, and closing speed on, the nearest vehicle ahead in the ego's path, per time step.

    In the frame of the ego's heading at that step, a valid vehicle is *in the path* if its centre is ahead of
    the ego's centre and its lateral offset is at most half the sum of the two widths plus ``lateral_margin_m``.
    The gap is the longitudinal centre distance minus half the sum of the lengths (the other vehicle's yaw
    relative to the ego is ignored, which is fine for near-parallel lane traffic); the closing speed is the ego's
    velocity minus the other's, projected on the ego's heading.

    Args:
        futures: (B*, H, V, F).
        lateral_margin_m: extra lateral half-width of the path (>= 0).

    Returns:
        ``(gap_m, closing_speed_mps)``, each (B*, H); gap +inf and closing 0 where no vehicle is in the path.
    """
    if not lateral_margin_m >= 0:
        raise ConfigError(f"lateral_margin_m must be >= 0, got {lateral_margin_m!r}")
    return _leader(_relative(futures), lateral_margin_m)


def _leader(r: _Relative, lateral_margin_m: float) -> tuple[Tensor, Tensor]:
    shape = r.ahead_m.shape[1:]
    if r.ahead_m.shape[0] == 0:
        return torch.full(shape, torch.inf, dtype=r.ahead_m.dtype), torch.zeros(shape, dtype=r.ahead_m.dtype)
    half_widths = r.ego_half_width_m + r.half_width_m + lateral_margin_m
    in_path = r.is_valid & (r.ahead_m > 0) & (r.lateral_m.abs() <= half_widths)
    gap = torch.where(in_path, r.ahead_m - r.ego_half_length_m - r.half_length_m, torch.inf)  # (V-1, B*, H)
    nearest_gap, idx = gap.min(dim=0, keepdim=True)  # (1, B*, H)
    nearest_closing = torch.gather(r.closing_mps, 0, idx)
    nearest_closing = torch.where(torch.isfinite(nearest_gap), nearest_closing, 0.0)
    return nearest_gap.squeeze(0), nearest_closing.squeeze(0)


def ttc_to_leader_s(futures: object, lateral_margin_m: float = 0.0) -> Tensor:
    """Time to collision with the nearest vehicle ahead in the ego's path, per time step.

    Args:
        futures: (B*, H, V, F).
        lateral_margin_m: see :func:`leader_gap_and_closing`.

    Returns:
        (B*, H) seconds; +inf where there is no such vehicle or it is not being closed on.
    """
    gap, closing = leader_gap_and_closing(futures, lateral_margin_m)
    return time_to_collision(gap, closing)


def min_ttc_along_lane(futures: object, lateral_margin_m: float = 0.0) -> Tensor:
    """Smallest time to collision with the in-path leader over the horizon.

    Args:
        futures: (B*, H, V, F), e.g. (C, K, H, V, F).
        lateral_margin_m: see :func:`leader_gap_and_closing`.

    Returns:
        (B*,) seconds, e.g. (C, K); +inf if the ego never closes on a vehicle in its path.
    """
    return ttc_to_leader_s(futures, lateral_margin_m).min(dim=-1).values


def clearance_shortfall_m(clearance: object, safe_distance_m: float) -> Tensor:
    """Largest amount by which the clearance falls short of a safe distance over the horizon.

    Args:
        clearance: (B*, H) metres, from :func:`clearance_m`.
        safe_distance_m: desired clearance (>= 0).

    Returns:
        (B*,) ``max_t max(0, safe_distance_m - clearance_t)``; above ``safe_distance_m`` means a collision.
    """
    if not safe_distance_m >= 0:
        raise ConfigError(f"safe_distance_m must be >= 0, got {safe_distance_m!r}")
    values = _float("clearance", clearance)
    return (safe_distance_m - values).clamp(min=0.0).amax(dim=-1)


# --- one call for the planner ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class RiskSummary:
    """Risk of each candidate from its K sampled futures (B* is usually (C,)).

    Attributes:
        p_collision: (B*,) fraction of futures with a collision at any step.
        p_collision_low: (B*,) lower end of its Wilson interval.
        p_collision_high: (B*,) upper end of its Wilson interval.
        cvar_shortfall_m: (B*,) CVaR over futures of :func:`clearance_shortfall_m`.
        min_ttc_s: (B*,) smallest in-path TTC over futures and steps.
        collided: (B*, K) bool per future.
        shortfall_m: (B*, K) clearance shortfall per future.
        ttc_s: (B*, K) smallest in-path TTC per future.
    """

    p_collision: Tensor
    p_collision_low: Tensor
    p_collision_high: Tensor
    cvar_shortfall_m: Tensor
    min_ttc_s: Tensor
    collided: Tensor
    shortfall_m: Tensor
    ttc_s: Tensor
    leader_gap_m: Tensor | None = None
    """(B*, K, H) gap to the vehicle ahead in the ego's path (+inf if none)."""
    p_near: Tensor | None = None
    """(B*,) fraction of futures whose clearance falls to ``margin_m`` or below at some step (the footprint
    inflated by the margin); equals ``p_collision`` when the margin is 0."""
    p_near_high: Tensor | None = None
    """(B*,) upper end of its Wilson interval."""
    p_near_from_behind: Tensor | None = None
    """(B*,) fraction of futures whose first near contact is only with vehicles coming up from behind in the
    ego's lane (faster than the ego, behind it, overlapping it sideways): being run into, not running into."""


def summarise_risk(
    futures: object,
    *,
    cvar_alpha: float = 0.9,
    safe_distance_m: float = 2.0,
    lateral_margin_m: float = 0.0,
    margin_m: float = 0.0,
    z: float = Z_95,
) -> RiskSummary:
    """Collision probability (with Wilson interval), CVaR of the clearance shortfall and min TTC per candidate.

    Args:
        futures: (B*, K, H, V, F), usually (C, K, H, V, F).
        cvar_alpha: CVaR level over the K futures, in [0, 1).
        safe_distance_m: clearance below which the shortfall cost starts.
        lateral_margin_m: path half-width margin for the TTC leader search.
        margin_m: clearance at or below which a future counts as a near contact (``p_near``); the planner ranks
            candidates by it so that prediction errors of a few decimetres do not turn a predicted near miss into
            a contact (inflating footprints by a buffer is common practice, no source).
        z: normal quantile of the Wilson interval.

    Returns:
        A :class:`RiskSummary`.
    """
    rows = _futures(futures)
    if rows.ndim < 4:
        raise ConfigError(f"futures has shape {tuple(rows.shape)}; expected (B*, K, H, V, F) with a futures axis")
    if not lateral_margin_m >= 0:
        raise ConfigError(f"lateral_margin_m must be >= 0, got {lateral_margin_m!r}")
    if not 0 <= margin_m <= safe_distance_m + 1.0:
        raise ConfigError(f"margin_m must lie in [0, safe_distance_m + 1], got {margin_m!r}")
    rel = _relative(rows)  # shared by the clearance and the leader search
    # exact box distances only where they can matter: below the safe distance (plus a margin)
    each = _clearances(rel, exact_below_m=safe_distance_m + 1.0)  # (V-1, B*, K, H)
    clear = each.amin(dim=0)  # (B*, K, H)
    collided = (clear <= 0).any(dim=-1)  # (B*, K)
    p = collision_probability(collided)
    low, high = wilson_interval(collided.sum(dim=-1), collided.shape[-1], z=z)
    if margin_m > 0:
        near = (clear <= margin_m).any(dim=-1)
        p_near, p_near_high = collision_probability(near), wilson_interval(near.sum(dim=-1), near.shape[-1], z=z)[1]
    else:
        p_near, p_near_high = p, high
    # near contacts only with vehicles coming up from behind in the ego's lane, at the first step of near contact
    near_v = each <= margin_m  # (V-1, B*, K, H)
    behind = (rel.ahead_m < 0) & (rel.closing_mps < 0) & (rel.lateral_m.abs() < rel.ego_half_width_m + rel.half_width_m)
    near_t = near_v.any(dim=0)  # (B*, K, H)
    first = near_t.to(torch.int8).argmax(dim=-1, keepdim=True)  # first step of near contact (0 if none)
    other_t = (near_v & ~behind).any(dim=0)
    from_behind = near_t.any(dim=-1) & ~other_t.gather(-1, first).squeeze(-1)  # (B*, K)
    shortfall = clearance_shortfall_m(clear, safe_distance_m)  # (B*, K)
    gap, closing = _leader(rel, lateral_margin_m)  # (B*, K, H)
    ttc = time_to_collision(gap, closing).amin(dim=-1)  # (B*, K)
    return RiskSummary(
        p_collision=p,
        p_collision_low=low,
        p_collision_high=high,
        cvar_shortfall_m=cvar(shortfall, cvar_alpha),
        min_ttc_s=ttc.min(dim=-1).values,
        collided=collided,
        shortfall_m=shortfall,
        ttc_s=ttc,
        leader_gap_m=gap,
        p_near=p_near,
        p_near_high=p_near_high,
        p_near_from_behind=from_behind.to(clear.dtype).mean(dim=-1),
    )
