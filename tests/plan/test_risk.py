"""Reference tests of ``wmplan.plan.risk``: collision probability, Wilson interval, CVaR, TTC, DRAC, box clearance.

Sources (the tags [S], [M], [D], [C] are explained at the top of docs/references.md):
- Wilson (1927) score interval: docs/references.md#wilson-1927; reference library
  scipy.stats.binomtest(...).proportion_ci(method='wilson') [S] (docs/references.md#lib-scipy); table values [D].
- CVaR: Rockafellar & Uryasev, J. Risk 2(3) (2000) 21-41, Theorem 1 [S]; worked example [D] of
  docs/references.md#rockafellar-uryasev-2000-cvar; the minimisation formula evaluated with
  scipy.optimize.minimize_scalar as the reference.
- TTC: Hayward (1972), checks [D] of docs/references.md#hayward-1972-ttc; DRAC: the constant-deceleration form
  (docs/references.md#cooper-ferguson-1976-drac, docs/references.md#practice-kinematics), checks [D].
- Oriented boxes: the table [D] of docs/references.md#gottschalk-1996-obbtree and shapely (reference library,
  docs/references.md#lib-shapely) for distances and intersection; penetration depth as the distance from the origin to
  the boundary of the Minkowski difference A - B (the convex hull of all corner differences; standard
  computational geometry, from memory [M]: docs/references.md#ericson-2005-collision-detection).
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import scipy.optimize
import scipy.stats
import shapely
import shapely.affinity
import shapely.geometry
import torch

from wmplan.errors import ConfigError
from wmplan.plan import risk as R
from wmplan.sim.features import F_HEADING, F_LENGTH, F_VALID, F_VX, F_VY, F_WIDTH, F_X, F_Y

# --- helpers --------------------------------------------------------------------------------------------------


def shapely_box(x: float, y: float, heading_rad: float, length: float, width: float):
    geom = shapely.geometry.box(-length / 2, -width / 2, length / 2, width / 2)
    geom = shapely.affinity.rotate(geom, heading_rad, origin=(0, 0), use_radians=True)
    return shapely.affinity.translate(geom, x, y)


def corners(x: float, y: float, heading_rad: float, length: float, width: float) -> np.ndarray:
    c, s = math.cos(heading_rad), math.sin(heading_rad)
    local = np.array([[1, 1], [-1, 1], [-1, -1], [1, -1]]) * [length / 2, width / 2]
    return local @ np.array([[c, s], [-s, c]]) + [x, y]


def minkowski_signed_distance(a, b) -> float:
    """Signed distance via the Minkowski difference A - B: outside -> +distance, inside -> -depth (shapely)."""
    diff = shapely.geometry.MultiPoint((corners(*a)[:, None, :] - corners(*b)[None, :, :]).reshape(-1, 2)).convex_hull
    origin = shapely.geometry.Point(0.0, 0.0)
    d = diff.exterior.distance(origin)
    return -d if diff.contains(origin) else d


def vehicle_row(x, y, vx=0.0, vy=0.0, heading=0.0, length=4.5, width=1.8, valid=1.0) -> list[float]:
    row = [0.0] * 8
    row[F_X], row[F_Y], row[F_VX], row[F_VY] = x, y, vx, vy
    row[F_HEADING], row[F_LENGTH], row[F_WIDTH], row[F_VALID] = heading, length, width, valid
    return row


def rotate_scene(rows: torch.Tensor, angle: float) -> torch.Tensor:
    """Rotate positions, velocities and headings of (..., V, 8) rows about the origin."""
    c, s = math.cos(angle), math.sin(angle)
    out = rows.clone()
    out[..., F_X] = c * rows[..., F_X] - s * rows[..., F_Y]
    out[..., F_Y] = s * rows[..., F_X] + c * rows[..., F_Y]
    out[..., F_VX] = c * rows[..., F_VX] - s * rows[..., F_VY]
    out[..., F_VY] = s * rows[..., F_VX] + c * rows[..., F_VY]
    out[..., F_HEADING] = rows[..., F_HEADING] + angle
    return out


def random_futures(seed: int, shape: tuple[int, ...], num_vehicles: int) -> torch.Tensor:
    """Random float64 scenes (..., V, 8) on a 40 x 12 m patch: near-parallel traffic with some invalid rows."""
    rng = np.random.default_rng(seed)
    rows = np.zeros((*shape, num_vehicles, 8))
    rows[..., F_X] = rng.uniform(-20, 20, rows.shape[:-1])
    rows[..., F_Y] = rng.uniform(-6, 6, rows.shape[:-1])
    rows[..., F_VX] = rng.uniform(5, 30, rows.shape[:-1])
    rows[..., F_VY] = rng.normal(0, 1, rows.shape[:-1])
    rows[..., F_HEADING] = rng.normal(0, 0.3, rows.shape[:-1])
    rows[..., F_LENGTH] = rng.uniform(3.5, 12.0, rows.shape[:-1])
    rows[..., F_WIDTH] = rng.uniform(1.6, 2.6, rows.shape[:-1])
    rows[..., F_VALID] = (rng.uniform(size=rows.shape[:-1]) < 0.8).astype(float)
    rows[..., 0, F_VALID] = 1.0
    return torch.from_numpy(rows)


# --- probabilities and intervals ------------------------------------------------------------------------------


def test_collision_probability_counts_futures():
    """Fraction of colliding futures along the last axis (definition of the Monte-Carlo estimate, [C])."""
    flags = torch.tensor([[True, False, False, False], [True, True, False, True]])
    assert R.collision_probability(flags).tolist() == [0.25, 0.75]
    assert R.collision_probability(np.array([1, 0, 1, 1, 1])).item() == pytest.approx(0.8)


# --- CVaR -----------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("alpha", "expected", "var"), [(0.8, 7.5, 1.0), (0.85, 25 / 3, 5.0), (0.9, 10.0, 5.0), (0.95, 10.0, 10.0)]
)
def test_cvar_worked_example(alpha, expected, var):
    """Ten equally likely losses [0,0,0,0,0,0,0,1,5,10]: table [D] of
    docs/references.md#rockafellar-uryasev-2000-cvar, with the split atom at alpha = 0.85 (8.3333, not 7.5);
    VaR is the left end of the minimising interval."""
    losses = torch.tensor([0, 0, 0, 0, 0, 0, 0, 1, 5, 10.0])
    assert R.cvar(losses, alpha).item() == pytest.approx(expected, rel=1e-6)
    assert R.value_at_risk(losses, alpha).item() == var
    assert R.cvar(
        losses[torch.randperm(10, generator=torch.Generator().manual_seed(0))], alpha
    ).item() == pytest.approx(expected, rel=1e-6)


def ru_objective(c: float, losses: np.ndarray, alpha: float) -> float:
    return c + np.maximum(losses - c, 0.0).mean() / (1 - alpha)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("num", [7, 50, 1000])
@pytest.mark.parametrize("alpha", [0.5, 0.9, 0.95, 0.99])
def test_cvar_matches_rockafellar_uryasev_minimum(seed, num, alpha):
    """CVaR_a = min_c c + E[(L - c)^+] / (1 - a) (Rockafellar & Uryasev 2000, Theorem 1 [S]).

    Reference: scipy.optimize.minimize_scalar (bounded, on [min L - 1, max L + 1] so that the minimiser is
    interior even when it is max L) on the objective; the objective is also evaluated at c = VaR, where it attains
    the minimum exactly (same theorem).
    """
    losses = np.random.default_rng(seed).lognormal(0.0, 1.0, num)
    got = R.cvar(losses, alpha).item()  # float64 in, float64 out
    opt = scipy.optimize.minimize_scalar(
        ru_objective,
        bounds=(losses.min() - 1, losses.max() + 1),
        args=(losses, alpha),
        method="bounded",
        options={"xatol": 1e-10},
    )
    assert got == pytest.approx(opt.fun, rel=1e-7)
    assert got <= opt.fun + 1e-12  # nothing scipy finds beats the closed form
    assert got == pytest.approx(ru_objective(R.value_at_risk(losses, alpha).item(), losses, alpha), rel=1e-12)


def test_cvar_batched_limits_and_infinity():
    """alpha = 0 gives the mean; batched rows are independent; +inf in the tail gives +inf ([D])."""
    losses = torch.tensor([[1.0, 2.0, 3.0, 4.0], [4.0, 4.0, 0.0, 0.0]])
    assert R.cvar(losses, 0.0).tolist() == [2.5, 2.0]
    assert R.cvar(losses, 0.5).tolist() == [3.5, 4.0]
    assert R.cvar(torch.tensor([0.0, 1.0, float("inf")]), 0.5).item() == math.inf
    assert R.cvar(torch.tensor([0.0, 1.0, float("inf")]), 0.5).dtype == torch.float32


# --- TTC and DRAC ---------------------------------------------------------------------------------------------


def test_time_to_collision_reference_checks():
    """Gap 30 m, 25 vs 15 m/s -> 3.0 s; gap 20 m, 30 vs 20 m/s -> 2.0 s; not closing -> inf ([D],
    docs/references.md#hayward-1972-ttc)."""
    ttc = R.time_to_collision(torch.tensor([30.0, 20.0, 30.0, 30.0]), torch.tensor([25 - 15, 30 - 20, 0.0, -5.0]))
    assert ttc.tolist() == [3.0, 2.0, math.inf, math.inf]
    assert R.time_to_collision(np.array([0.0, -1.0]), np.array([3.0, 0.0])).tolist() == [0.0, 0.0]


def test_drac_reference_checks():
    """DRAC = (v_f - v_l)^2 / (2 gap): 1.6667 and 2.5 m/s^2 for the two section 5.3 cases [D]; 0 if not closing."""
    drac = R.deceleration_to_avoid_crash_mps2(torch.tensor([30.0, 20.0, 30.0]), torch.tensor([10.0, 10.0, -2.0]))
    np.testing.assert_allclose(drac.numpy(), [10**2 / 60, 2.5, 0.0], rtol=1e-6)
    assert drac[0].item() == pytest.approx(1.6667, abs=5e-5)


def one_step(rows: list[list[float]]) -> torch.Tensor:
    return torch.tensor([rows], dtype=torch.float64)  # (H=1, V, 8)


def test_ttc_to_leader_picks_the_in_path_leader():
    """Ego 25 m/s, leader 30 m ahead (bumper to bumper) at 15 m/s -> 3.0 s ([D],
    docs/references.md#hayward-1972-ttc); a slower car in the next lane (3.6 m over), a car behind and an invalid
    row are ignored; the nearer of two leaders counts."""
    ego = vehicle_row(0.0, 0.0, vx=25.0)
    leader = vehicle_row(30.0 + 4.5, 0.3, vx=15.0)  # centre gap = bumper gap + half lengths (4.5 / 2 * 2)
    far_leader = vehicle_row(60.0, 0.0, vx=0.0)
    next_lane = vehicle_row(10.0, 3.6, vx=0.0)
    behind = vehicle_row(-10.0, 0.0, vx=40.0)
    ghost = vehicle_row(5.0, 0.0, vx=0.0, valid=0.0)
    scene = one_step([ego, next_lane, far_leader, behind, ghost, leader])
    gap, closing = R.leader_gap_and_closing(scene)
    assert gap.item() == pytest.approx(30.0) and closing.item() == pytest.approx(10.0)
    assert R.ttc_to_leader_s(scene).item() == pytest.approx(3.0)
    # The next-lane car enters the path once the margin covers its 3.6 - 1.8 = 1.8 m offset.
    assert R.ttc_to_leader_s(scene, lateral_margin_m=1.9).item() == pytest.approx((10.0 - 4.5) / 25.0)
    # Rotating the whole scene changes nothing (the measure is frame independent, [D]).
    assert R.ttc_to_leader_s(rotate_scene(scene, 0.7)).item() == pytest.approx(3.0)
    only_ego = one_step([ego, next_lane])
    assert R.ttc_to_leader_s(only_ego).item() == math.inf


def test_min_ttc_over_a_constant_speed_horizon():
    """Constant speeds over H = 10 steps of 0.2 s from gap 20 m, 30 vs 20 m/s: TTC_t = 2.0 - 0.2 t, min 0.2 s ([D])."""
    steps = torch.arange(10, dtype=torch.float64)
    dt = 0.2
    futures = torch.zeros(10, 2, 8, dtype=torch.float64)
    futures[:, 0] = torch.tensor(vehicle_row(0.0, 0.0, vx=30.0), dtype=torch.float64)
    futures[:, 1] = torch.tensor(vehicle_row(24.5, 0.0, vx=20.0), dtype=torch.float64)
    futures[:, 0, F_X] = 30.0 * dt * steps
    futures[:, 1, F_X] = 24.5 + 20.0 * dt * steps
    ttc = R.ttc_to_leader_s(futures)
    np.testing.assert_allclose(ttc.numpy(), 2.0 - dt * steps.numpy(), rtol=1e-12, atol=1e-12)
    assert R.min_ttc_along_lane(futures[None, None]).shape == (1, 1)
    assert R.min_ttc_along_lane(futures).item() == pytest.approx(0.2)


def slow_leader_ttc(scene: np.ndarray, margin: float) -> float:
    """Per-vehicle loop version of the in-path leader TTC for one (V, 8) scene (equivalence reference)."""
    ego = scene[0]
    c, s = math.cos(ego[F_HEADING]), math.sin(ego[F_HEADING])
    best_gap, best_closing = math.inf, 0.0
    for row in scene[1:]:
        if row[F_VALID] <= 0.5:
            continue
        dx, dy = row[F_X] - ego[F_X], row[F_Y] - ego[F_Y]
        ahead, lateral = c * dx + s * dy, -s * dx + c * dy
        if ahead <= 0 or abs(lateral) > (ego[F_WIDTH] + row[F_WIDTH]) / 2 + margin:
            continue
        gap = ahead - (ego[F_LENGTH] + row[F_LENGTH]) / 2
        if gap < best_gap:
            best_gap = gap
            best_closing = c * (ego[F_VX] - row[F_VX]) + s * (ego[F_VY] - row[F_VY])
    if best_gap <= 0:
        return 0.0
    return best_gap / best_closing if best_closing > 0 else math.inf


@pytest.mark.parametrize("seed", [0, 1])
def test_ttc_matches_per_vehicle_loop(seed):
    """Vectorised in-path leader TTC equals a plain loop over vehicles
    (docs/references.md#practice-equivalence-test)."""
    futures = random_futures(seed, (3, 4, 5), 6)  # (C, K, H, V, 8)
    got = R.ttc_to_leader_s(futures, lateral_margin_m=0.3).numpy()
    flat = futures.reshape(-1, 6, 8).numpy()
    ref = np.array([slow_leader_ttc(scene, 0.3) for scene in flat]).reshape(3, 4, 5)
    np.testing.assert_allclose(got, ref, rtol=1e-12)
    assert np.isfinite(ref).any() and np.isinf(ref).any()  # both cases exercised


# --- boxes and clearance --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("b", "distance"),
    [((5.0, 2.5, 30.0), 0.9316), ((0.0, 3.6, 0.0), 1.8), ((4.4, 0.0, 90.0), 1.25), ((4.5, 0.0, 0.0), 0.0)],
)
def test_box_distance_reference_table(b, distance):
    """A = 4.5 x 1.8 m car at the origin: distances [D] of docs/references.md#gottschalk-1996-obbtree (shapely),
    touching -> 0."""
    box_b = torch.tensor([b[0], b[1], math.radians(b[2]), 4.5, 1.8], dtype=torch.float64)
    got = R.box_signed_distance_m(torch.tensor([0.0, 0.0, 0.0, 4.5, 1.8], dtype=torch.float64), box_b).item()
    assert got == pytest.approx(distance, abs=5e-5)
    ref = shapely_box(0, 0, 0, 4.5, 1.8).distance(shapely_box(b[0], b[1], math.radians(b[2]), 4.5, 1.8))
    assert got == pytest.approx(ref, abs=1e-12)


def test_box_penetration_by_hand():
    """Aligned boxes overlapping 0.5 m end to end -> -0.5; a crossing pair with no corner inside the other box
    (two 10 x 1 m bars at right angles, centred together) -> -(5 + 0.5) = -5.5 ([D], by hand)."""
    a = torch.tensor([0.0, 0.0, 0.0, 4.0, 2.0], dtype=torch.float64)
    assert R.box_signed_distance_m(
        a, torch.tensor([3.5, 0.0, 0.0, 4.0, 2.0], dtype=torch.float64)
    ).item() == pytest.approx(-0.5)
    bar = torch.tensor([0.0, 0.0, 0.0, 10.0, 1.0], dtype=torch.float64)
    cross = torch.tensor([0.0, 0.0, math.pi / 2, 10.0, 1.0], dtype=torch.float64)
    assert R.box_signed_distance_m(bar, cross).item() == pytest.approx(-5.5)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_box_signed_distance_against_shapely(seed):
    """2,000 random pairs (centres in +-6 x +-4 m, any yaw, car to truck sizes): where apart, the distance equals
    shapely's; the sign agrees with shapely.intersects outside a 1e-9 m band; where overlapping, minus the
    distance from the origin to the boundary of the Minkowski difference (shapely convex hull) [M]."""
    rng = np.random.default_rng(seed)
    n = 2000
    a = np.column_stack(
        [
            rng.uniform(-6, 6, n),
            rng.uniform(-4, 4, n),
            rng.uniform(-np.pi, np.pi, n),
            rng.uniform(3, 12, n),
            rng.uniform(1.5, 2.6, n),
        ]
    )
    b = np.column_stack(
        [
            rng.uniform(-6, 6, n),
            rng.uniform(-4, 4, n),
            rng.uniform(-np.pi, np.pi, n),
            rng.uniform(3, 12, n),
            rng.uniform(1.5, 2.6, n),
        ]
    )
    got = R.box_signed_distance_m(torch.from_numpy(a), torch.from_numpy(b)).numpy()
    num_overlap = 0
    for i in range(n):
        pa, pb = shapely_box(*a[i]), shapely_box(*b[i])
        if abs(got[i]) > 1e-9:
            assert (got[i] <= 0) == pa.intersects(pb)
        if got[i] > 0:
            assert got[i] == pytest.approx(pa.distance(pb), abs=1e-9)
        else:
            num_overlap += 1
            assert got[i] == pytest.approx(minkowski_signed_distance(a[i], b[i]), abs=1e-9)
    assert 100 < num_overlap < n - 100  # both branches exercised


def slow_clearance(scene: np.ndarray) -> tuple[float, bool]:
    """Per-vehicle shapely loop for one (V, 8) scene: (distance clipped at 0, intersects any)."""
    ego = shapely_box(scene[0, F_X], scene[0, F_Y], scene[0, F_HEADING], scene[0, F_LENGTH], scene[0, F_WIDTH])
    best, hit = math.inf, False
    for row in scene[1:]:
        if row[F_VALID] <= 0.5:
            continue
        other = shapely_box(row[F_X], row[F_Y], row[F_HEADING], row[F_LENGTH], row[F_WIDTH])
        best = min(best, ego.distance(other))
        hit = hit or ego.intersects(other)
    return best, hit


@pytest.mark.parametrize("seed", [0, 1])
def test_clearance_and_collides_match_shapely_loop(seed):
    """clearance_m (clipped at 0) equals the minimum shapely distance over valid others and collides equals
    shapely.intersects over valid others, on random (C, K, H, V, F) futures (shapely as reference library)."""
    futures = random_futures(seed, (2, 3, 4), 5)
    clear = R.clearance_m(futures).numpy()
    hit = R.collides(futures).numpy()
    flat = futures.reshape(-1, 5, 8).numpy()
    ref = [slow_clearance(scene) for scene in flat]
    np.testing.assert_allclose(np.maximum(clear, 0.0).ravel(), [r[0] for r in ref], atol=1e-9)
    assert hit.ravel().tolist() == [r[1] for r in ref]
    assert hit.any() and not hit.all()


def test_clearance_no_other_vehicle_is_inf_and_float32_ok():
    """With every other row invalid, clearance is +inf and nothing collides (contract); float32 input works."""
    futures = torch.tensor([[vehicle_row(0, 0), vehicle_row(1, 0, valid=0.0)]], dtype=torch.float32)
    assert R.clearance_m(futures).tolist() == [math.inf]
    assert R.collides(futures).tolist() == [False]
    assert R.clearance_m(futures[..., :1, :]).tolist() == [math.inf]


# --- summary --------------------------------------------------------------------------------------------------


def test_summarise_risk_on_a_crafted_scene():
    """C = 2 candidates x K = 4 futures x H = 3 steps: candidate 0 hits the leader in one future, candidate 1 in none.

    Checks the collision probability (1/4 and 0), its Wilson interval against scipy [S], the CVaR of the clearance
    shortfall against the section 9.2 definition evaluated by hand, and the min TTC (gap / closing, [D]).
    """
    futures = torch.zeros(2, 4, 3, 2, 8, dtype=torch.float64)
    futures[..., 0, :] = torch.tensor(vehicle_row(0.0, 0.0, vx=20.0), dtype=torch.float64)
    futures[..., 1, :] = torch.tensor(vehicle_row(14.5, 0.0, vx=10.0), dtype=torch.float64)  # gap 10 m
    futures[0, 0, 2, 1, F_X] = 4.0  # overlap in one future at the last step: clearance -0.5 m
    futures[1, :, :, 1, F_X] = 24.5  # candidate 1 stays 20 m back
    summary = R.summarise_risk(futures, cvar_alpha=0.75, safe_distance_m=12.0)
    assert summary.p_collision.tolist() == [0.25, 0.0]
    ref = scipy.stats.binomtest(1, 4).proportion_ci(method="wilson")
    assert summary.p_collision_low[0].item() == pytest.approx(ref.low, rel=1e-6)
    assert summary.p_collision_high[0].item() == pytest.approx(ref.high, rel=1e-6)
    # Shortfalls (12 - clearance)^+: candidate 0 -> [12.5, 2, 2, 2], candidate 1 -> [0] * 4; CVaR_0.75 = worst 1/4.
    np.testing.assert_allclose(summary.shortfall_m.numpy(), [[12.5, 2, 2, 2], [0, 0, 0, 0]])
    np.testing.assert_allclose(summary.cvar_shortfall_m.numpy(), [12.5, 0.0])
    assert summary.min_ttc_s.tolist() == [0.0, 2.0]  # overlap -> 0 s; 20 m at 10 m/s -> 2 s
    assert summary.collided.shape == (2, 4) and summary.ttc_s.shape == (2, 4)


def test_summarise_risk_counts_near_contacts_within_the_margin():
    """``p_near``: the fraction of futures whose clearance falls to ``margin_m`` or below (an inflated footprint,
    common practice, no source); its Wilson upper end against scipy [S]. Contact itself (``p_collision``) is
    unchanged, and with no margin the two agree.

    C = 1 candidate x K = 4 futures x H = 2 steps; the leader (4.5 m long, like the ego) is 4.70 m ahead, centre to
    centre, in two futures (bumper clearance 0.20 m) and 30 m ahead in the other two.
    """
    futures = torch.zeros(1, 4, 2, 2, 8, dtype=torch.float64)
    futures[..., 0, :] = torch.tensor(vehicle_row(0.0, 0.0, vx=20.0), dtype=torch.float64)
    futures[..., 1, :] = torch.tensor(vehicle_row(30.0, 0.0, vx=20.0), dtype=torch.float64)
    futures[0, :2, 1, 1, F_X] = 4.7
    assert R.clearance_m(futures)[0, :, 1].tolist() == pytest.approx([0.2, 0.2, 25.5, 25.5])
    near = R.summarise_risk(futures, margin_m=0.3)
    assert near.p_collision.tolist() == [0.0] and near.p_near.tolist() == [0.5]
    ref = scipy.stats.binomtest(2, 4).proportion_ci(method="wilson")
    assert near.p_near_high[0].item() == pytest.approx(ref.high, rel=1e-6)
    assert R.summarise_risk(futures, margin_m=0.1).p_near.tolist() == [0.0]
    plain = R.summarise_risk(futures)
    assert plain.p_near.tolist() == plain.p_collision.tolist() == [0.0]
    with pytest.raises(ConfigError, match="margin_m"):
        R.summarise_risk(futures, margin_m=-0.1)


def test_near_contacts_from_behind_are_told_apart():
    """``p_near_from_behind``: futures whose first near contact is only with a faster vehicle coming up from behind
    in the ego's lane (being run into, which the driver behind must avoid: common practice, no source).

    C = 1 x K = 4 futures x H = 2 steps, the ego at 10 m/s. Future 0: a car at 20 m/s touches the ego's rear at
    step 1. Future 1: the ego touches a slower car ahead at step 1. Future 2: both at step 1 (it counts as the
    ego's own). Future 3: a car from behind in the next lane passes 0.1 m away beside the ego (not in its lane:
    not "from behind") at step 1.
    """
    futures = torch.zeros(1, 4, 2, 3, 8, dtype=torch.float64)
    futures[..., 0, :] = torch.tensor(vehicle_row(0.0, 0.0, vx=10.0), dtype=torch.float64)
    futures[..., 1, :] = torch.tensor(vehicle_row(-30.0, 0.0, vx=20.0), dtype=torch.float64)  # behind
    futures[..., 2, :] = torch.tensor(vehicle_row(40.0, 0.0, vx=5.0), dtype=torch.float64)  # ahead
    futures[0, 0, 1, 1, F_X] = -4.55  # 0.05 m from the ego's rear
    futures[0, 1, 1, 2, F_X] = 4.55
    futures[0, 2, 1, 1, F_X], futures[0, 2, 1, 2, F_X] = -4.55, 4.55
    futures[0, 3, 1, 1, F_X], futures[0, 3, 1, 1, F_Y] = -2.0, 1.9  # beside, 0.1 m apart sideways
    risk = R.summarise_risk(futures, margin_m=0.3)
    assert risk.p_near.tolist() == [1.0]
    assert risk.p_near_from_behind.tolist() == [0.25]
    assert risk.p_collision.tolist() == [0.0]


# --- errors ---------------------------------------------------------------------------------------------------


def test_errors_name_the_argument():
    """Bad input raises a one-line ConfigError naming the argument, the value and the rule (DEVELOPERS.md,
    "Errors and files")."""
    with pytest.raises(ConfigError, match=re.escape("futures has shape (3, 2, 5); expected (B*, H, V, 8)")):
        R.clearance_m(torch.zeros(3, 2, 5))
    with pytest.raises(ConfigError, match=re.escape("alpha (CVaR/VaR level) must lie in [0, 1), got 1.0")):
        R.cvar(torch.zeros(4), 1.0)
    with pytest.raises(ConfigError, match=re.escape("losses contains NaN")):
        R.cvar(torch.tensor([1.0, float("nan")]), 0.5)
