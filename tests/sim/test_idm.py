"""Reference tests of the Intelligent Driver Model (IDM) in ``wmplan.sim.behaviour`` and in the engine.

Sources: Treiber, Hennecke, Helbing, Phys. Rev. E 62, 1805 (2000) for the law [S]
(docs/references.md#treiber-2000-idm); Treiber & Kesting, *Traffic Flow Dynamics*, Springer 2013, ch. 11 for
the book form of s* with the ``max(0, .)`` guard [S] and the highway parameter set of Table 11.2 (v0 120 km/h,
T 1 s, s0 2 m, a 1, b 1.5, delta 4; values from memory [M]) (docs/references.md#treiber-kesting-2013-book).
All check numbers are derived [D] from the published formula with that set (listed in the same entry); the
tabled ones are rounded to 4 decimals, so they are compared to 5e-5, and the same quantities are also compared
at rtol 1e-9 with the formula written out here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from wmplan.sim import engine
from wmplan.sim.behaviour import idm_accel, idm_desired_gap, idm_equilibrium_gap
from wmplan.sim.params import MAX_PHYSICAL_DECEL_MPS2, T_A, T_B, T_S0, T_T, T_V0, SimParams

TABLE_TOL = 5e-5  # half a unit of the 4th decimal of the tabled [D] values


@pytest.mark.parametrize(
    ("speed_mps", "expected_gap_m"),
    [(0.0, 2.0000), (10.0, 12.0489), (20.0, 23.5811), (30.0, 54.5675)],
)
def test_equilibrium_gap_highway_set(highway, speed_mps, expected_gap_m):
    """s_e(v) = (s0 + v T) / sqrt(1 - (v/v0)^4), highway set.

    Source: Treiber & Kesting 2013, ch. 11 (formula [S], Table 11.2 parameters [M]); check values [D],
    docs/references.md#treiber-kesting-2013-book (hand check at 20 m/s: 22 / sqrt(0.8704) = 23.581 m).
    """
    got = idm_equilibrium_gap(speed_mps, highway.desired_mps, highway.t_s, highway.s0_m)
    assert got == pytest.approx(expected_gap_m, abs=TABLE_TOL)
    by_hand = (highway.s0_m + speed_mps * highway.t_s) / math.sqrt(1.0 - (speed_mps / highway.desired_mps) ** 4)
    assert got == pytest.approx(by_hand, rel=1e-9)


@pytest.mark.parametrize("speed_mps", [0.0, 5.0, 10.0, 20.0, 25.0, 30.0, 33.0])
def test_zero_acceleration_at_equilibrium(highway, speed_mps):
    """At (v, s_e(v), dv = 0) the IDM acceleration is 0 to machine precision.

    Source: definition of the equilibrium gap (Treiber & Kesting 2013, ch. 11, [S],
    docs/references.md#treiber-kesting-2013-book); in float64 the formula gives about -2.2e-16 at 20 m/s and
    5.6e-17 at 30 m/s ([D]).
    """
    gap = idm_equilibrium_gap(speed_mps, highway.desired_mps, highway.t_s, highway.s0_m)
    acc = idm_accel(speed_mps, highway.desired_mps, gap, 0.0, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2)
    assert abs(acc) < 1e-12


@pytest.mark.parametrize(("speed_mps", "fraction"), [(0.0, 1.0), (120.0 / 3.6 / 2.0, 0.9375)])
def test_free_road_acceleration(highway, speed_mps, fraction):
    """On a free road (s = inf, dv = 0) the IDM gives a [1 - (v/v0)^4]: a at rest, 0.9375 a at v0/2.

    Source: THH 2000 / Treiber & Kesting 2013 free-road term [S] (docs/references.md#treiber-2000-idm); values [D].
    """
    acc = idm_accel(
        speed_mps, highway.desired_mps, np.inf, 0.0, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2
    )
    assert acc == pytest.approx(fraction * highway.a_mps2, rel=1e-12)


def test_approach_to_stopped_car(highway):
    """v = 20, dv = 20 (leader standing), s = 50: s* = 185.2993 m and dv/dt = -12.8639 m/s^2.

    Source: Treiber & Kesting 2013 ch. 11 formula [S]; values [D],
    docs/references.md#treiber-kesting-2013-book (the IDM itself has no bound on deceleration).
    """
    s_star = idm_desired_gap(20.0, 20.0, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2)
    assert s_star == pytest.approx(185.2993, abs=TABLE_TOL)
    assert s_star == pytest.approx(2.0 + 20.0 * 1.0 + 20.0 * 20.0 / (2.0 * math.sqrt(1.5)), rel=1e-9)
    acc = idm_accel(20.0, highway.desired_mps, 50.0, 20.0, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2)
    assert acc == pytest.approx(-12.8639, abs=TABLE_TOL)
    assert acc == pytest.approx(1.0 - (20.0 / highway.desired_mps) ** 4 - (s_star / 50.0) ** 2, rel=1e-9)


def test_leader_pulling_away_uses_book_form(highway):
    """v = 20, dv = -5: plain THH-2000 s* would be -18.8248 m; the book form (max(0, .) guard) gives s0 = 2.0 m.

    Source: Treiber & Kesting 2013 ch. 11, the guarded form as read in a secondary text citing the book [S];
    values [D], docs/references.md#treiber-kesting-2013-book (2 sqrt(ab) = 2.449490). This pins which variant
    the package implements.
    """
    s_star = idm_desired_gap(20.0, -5.0, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2)
    assert s_star == 2.0
    plain = highway.s0_m + 20.0 * highway.t_s + 20.0 * -5.0 / (2.0 * math.sqrt(highway.a_mps2 * highway.b_mps2))
    assert plain == pytest.approx(-18.8248, abs=TABLE_TOL)  # the variant we do *not* implement
    assert 2.0 * math.sqrt(highway.a_mps2 * highway.b_mps2) == pytest.approx(2.449490, abs=5e-7)


def test_idm_broadcasts_elementwise(highway):
    """Arrays in, the same numbers as the scalar calls out (common practice, no source): the engine relies on it."""
    v = np.array([0.0, 10.0, 20.0, 30.0])
    gap = np.array([np.inf, 15.0, 50.0, 40.0])
    dv = np.array([0.0, -2.0, 20.0, 3.0])
    got = idm_accel(v, highway.desired_mps, gap, dv, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2)
    want = [
        idm_accel(v[i], highway.desired_mps, gap[i], dv[i], highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2)
        for i in range(4)
    ]
    np.testing.assert_allclose(got, want, rtol=0, atol=0)


def test_engine_applies_the_same_law(scenario_variant, place, highway):
    """The engine's traffic acceleration equals ``idm_accel`` for the follower's traits (and its 9 m/s^2 limit).

    A leader and a follower in one lane, the ego parked in another lane far behind, no random traffic, no
    braking events, a step on which no driver reconsiders its lane. Checks the highway set
    (docs/references.md#treiber-kesting-2013-book, [M] values) on hand-picked situations and 64 seeded random
    ones with random traits. The engine additionally caps deceleration at MAX_PHYSICAL_DECEL_MPS2
    (about 9 m/s^2, Kesting et al. 2007 [S]); the expectation applies that cap explicitly.
    """
    params = SimParams.from_scenario(scenario_variant(num_lanes=2))
    gen = np.random.default_rng(20240611)
    n_random = 64
    # (follower speed, leader speed, gap): following at equilibrium-ish, closing in, pulling away, near stop.
    fixed = np.array(
        [[20.0, 20.0, 23.5811], [20.0, 15.0, 30.0], [25.0, 30.0, 40.0], [20.0, 0.0, 50.0], [5.0, 0.0, 4.0]]
    )
    v_f = np.concatenate([fixed[:, 0], gen.uniform(0.0, 35.0, n_random)])
    v_l = np.concatenate([fixed[:, 1], gen.uniform(0.0, 35.0, n_random)])
    gap = np.concatenate([fixed[:, 2], gen.uniform(2.0, 120.0, n_random)])
    traits = np.tile([highway.desired_mps, highway.t_s, highway.s0_m, highway.a_mps2, highway.b_mps2], (len(v_f), 1))
    traits[len(fixed) :] = np.column_stack(
        [
            gen.uniform(20.0, 40.0, n_random),
            gen.uniform(0.6, 2.5, n_random),
            gen.uniform(1.0, 4.0, n_random),
            gen.uniform(0.5, 2.5, n_random),
            gen.uniform(1.0, 3.5, n_random),
        ]
    )
    s = len(v_f)
    lead_len_m, foll_len_m, x_lead_m = 4.5, 5.0, 1000.0
    trait_cols = dict(zip((T_V0, T_T, T_S0, T_A, T_B), traits.T, strict=True))
    vehicles = [
        dict(slot=1, lane=1, x_m=x_lead_m, speed_mps=v_l, length_m=lead_len_m, traits=trait_cols),
        dict(
            slot=2,
            lane=1,
            x_m=x_lead_m - 0.5 * (lead_len_m + foll_len_m) - gap,
            speed_mps=v_f,
            length_m=foll_len_m,
            traits=trait_cols,
        ),
    ]
    state = place(params, vehicles, seeds=range(s), step=1, ego_x_m=100.0, ego_lane=0, ego_speed_mps=0.0)
    _, info = engine.step(state, np.zeros((s, 2)), params)

    want_f = idm_accel(v_f, traits[:, 0], gap, v_f - v_l, traits[:, 1], traits[:, 2], traits[:, 3], traits[:, 4])
    want_f = np.maximum(want_f, -MAX_PHYSICAL_DECEL_MPS2)
    np.testing.assert_allclose(info.accel_mps2[:, 2], want_f, rtol=1e-12, atol=1e-12)
    assert info.accel_mps2[0, 2] == pytest.approx(0.0, abs=1e-4)  # at s_e(20), tabled to 4 decimals
    assert info.accel_mps2[3, 2] == -MAX_PHYSICAL_DECEL_MPS2  # the stopped-car example (-12.86) is capped
    # The leader has a free road: a [1 - (v/v0)^4].
    want_l = traits[:, 3] * (1.0 - (v_l / traits[:, 0]) ** 4)
    np.testing.assert_allclose(info.accel_mps2[:, 1], want_l, rtol=1e-12, atol=1e-12)
