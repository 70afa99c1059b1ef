"""Driver behaviour as pure array functions: the IDM car-following law and the MOBIL lane-change rule.

IDM (Treiber, Hennecke, Helbing, Phys. Rev. E 62, 1805, 2000; book form with the ``max(0, .)`` guard from
Treiber & Kesting, *Traffic Flow Dynamics*, 2013, ch. 11)::

    dv/dt = a [1 - (v/v0)^4 - (s*(v, dv)/s)^2],   s* = s0 + max(0, v T + v dv / (2 sqrt(a b)))

with dv = v - v_leader (positive when closing in) and s the bumper-to-bumper gap.

MOBIL (Kesting, Treiber, Helbing, "General lane-changing model MOBIL for car-following models", TRR 1999, 2007),
symmetric form: change if the new follower's acceleration after the change ``a~_n >= -b_safe`` (safety) and
``(a~_c - a_c) + p [(a~_n - a_n) + (a~_o - a_o)] > threshold`` (incentive).
"""

from __future__ import annotations

import numpy as np

IDM_DELTA = 4.0  # acceleration exponent; "usually 4" (Treiber et al. 2000)
MIN_GAP_FLOOR_M = 0.1  # the interaction term is evaluated at no less than this gap, to stay finite


def idm_desired_gap(speed_mps, dv_mps, time_headway_s, min_gap_m, max_accel_mps2, comfort_decel_mps2):
    """Desired gap s* of the IDM, book form with the max(0, .) guard (Treiber & Kesting 2013)."""
    c = 0.5 / np.sqrt(max_accel_mps2 * comfort_decel_mps2)
    return min_gap_m + np.maximum(0.0, speed_mps * (time_headway_s + dv_mps * c))


def idm_accel_fast(speed_mps, desired_speed_mps, gap_m, dv_mps, time_headway_s, min_gap_m, max_accel_mps2, c):
    """IDM acceleration with ``c = 1 / (2 sqrt(a b))`` worked out by the caller (the engine does it once a step).

    This is the one implementation of the law in the package; :func:`idm_accel` calls it.
    """
    s_star = min_gap_m + np.maximum(0.0, speed_mps * (time_headway_s + dv_mps * c))
    r = speed_mps / desired_speed_mps
    r = r * r
    inter = s_star / np.maximum(gap_m, MIN_GAP_FLOOR_M)  # gap = inf gives 0: the free-road law
    return max_accel_mps2 * (1.0 - r * r - inter * inter)  # (v/v0)^delta with delta = 4


def idm_accel(
    speed_mps, desired_speed_mps, gap_m, dv_mps, time_headway_s, min_gap_m, max_accel_mps2, comfort_decel_mps2
):
    """IDM acceleration (m/s^2), elementwise. ``gap_m = inf`` means a free road.

    Args:
        speed_mps: follower speed v.
        desired_speed_mps: v0.
        gap_m: bumper-to-bumper gap s to the leader (inf if none).
        dv_mps: approach rate v - v_leader.
        time_headway_s, min_gap_m, max_accel_mps2, comfort_decel_mps2: T, s0, a, b.

    Returns:
        dv/dt, same shape as the broadcast inputs; no lower bound (clip separately).
    """
    c = 0.5 / np.sqrt(max_accel_mps2 * comfort_decel_mps2)
    return idm_accel_fast(speed_mps, desired_speed_mps, gap_m, dv_mps, time_headway_s, min_gap_m, max_accel_mps2, c)


def idm_equilibrium_gap(speed_mps, desired_speed_mps, time_headway_s, min_gap_m):
    """Steady-following gap s_e(v) = (s0 + v T) / sqrt(1 - (v/v0)^4) (Treiber & Kesting 2013)."""
    return (min_gap_m + speed_mps * time_headway_s) / np.sqrt(1.0 - (speed_mps / desired_speed_mps) ** IDM_DELTA)


def mobil_incentive(
    acc_self_now,
    acc_self_after,
    acc_new_follower_now,
    acc_new_follower_after,
    acc_old_follower_now,
    acc_old_follower_after,
    politeness,
):
    """MOBIL incentive (symmetric rule): own gain plus politeness times the followers' gains."""
    return (acc_self_after - acc_self_now) + politeness * (
        (acc_new_follower_after - acc_new_follower_now) + (acc_old_follower_after - acc_old_follower_now)
    )


def mobil_safe(acc_new_follower_after, safe_decel_mps2):
    """MOBIL safety criterion: the new follower need not brake harder than b_safe."""
    return acc_new_follower_after >= -safe_decel_mps2
