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
    dyn = speed_mps * time_headway_s + speed_mps * dv_mps / (2.0 * np.sqrt(max_accel_mps2 * comfort_decel_mps2))
    return min_gap_m + np.maximum(0.0, dyn)


def idm_accel(speed_mps, desired_speed_mps, gap_m, dv_mps, time_headway_s, min_gap_m, max_accel_mps2,
              comfort_decel_mps2):
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
    s_star = idm_desired_gap(speed_mps, dv_mps, time_headway_s, min_gap_m, max_accel_mps2, comfort_decel_mps2)
    ratio = speed_mps / desired_speed_mps
    ratio2 = ratio * ratio
    free = 1.0 - ratio2 * ratio2  # (v/v0)^delta with delta = 4
    # With gap = inf the ratio is 0: the free-road law.
    inter = s_star / np.maximum(gap_m, MIN_GAP_FLOOR_M)
    return max_accel_mps2 * (free - inter * inter)


def idm_equilibrium_gap(speed_mps, desired_speed_mps, time_headway_s, min_gap_m):
    """Steady-following gap s_e(v) = (s0 + v T) / sqrt(1 - (v/v0)^4) (Treiber & Kesting 2013)."""
    return (min_gap_m + speed_mps * time_headway_s) / np.sqrt(1.0 - (speed_mps / desired_speed_mps) ** IDM_DELTA)


def mobil_incentive(acc_self_now, acc_self_after, acc_new_follower_now, acc_new_follower_after,
                    acc_old_follower_now, acc_old_follower_after, politeness):
    """MOBIL incentive (symmetric rule): own gain plus politeness times the followers' gains."""
    return (acc_self_after - acc_self_now) + politeness * (
        (acc_new_follower_after - acc_new_follower_now) + (acc_old_follower_after - acc_old_follower_now)
    )


def mobil_safe(acc_new_follower_after, safe_decel_mps2):
    """MOBIL safety criterion: the new follower need not brake harder than b_safe."""
    return acc_new_follower_after >= -safe_decel_mps2
