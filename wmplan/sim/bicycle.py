"""The ego's kinematic bicycle model, centre-of-gravity reference, front-wheel steering.

Equations (Rajamani, *Vehicle Dynamics and Control*, 2nd ed., 2012, section 2.2; Kong et al., IEEE IV 2015)::

    beta = atan(l_r / L * tan(delta));  dx = v cos(psi + beta);  dy = v sin(psi + beta);
    dpsi = v / l_r * sin(beta);  dv = a

Integrated with an explicit step in which the distance travelled uses the exact constant-acceleration formula
(``v dt + a dt^2 / 2``, stopping at v = 0, never reversing); with a = 0 it is the explicit Euler step.
"""

from __future__ import annotations

import numpy as np


def distance_and_speed(speed_mps, accel_mps2, dt_s):
    """Distance travelled and final speed over dt at constant acceleration, stopping at zero speed."""
    new_speed = speed_mps + accel_mps2 * dt_s
    stops = new_speed < 0.0
    if not np.any(stops):  # nobody comes to a stop within dt: the constant-acceleration distance everywhere
        return speed_mps * dt_s + 0.5 * accel_mps2 * dt_s**2, np.maximum(new_speed, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        stop_dist = np.where(
            accel_mps2 < 0.0, -(speed_mps**2) / (2.0 * np.where(accel_mps2 < 0, accel_mps2, -1.0)), 0.0
        )
    dist = np.where(stops, stop_dist, speed_mps * dt_s + 0.5 * accel_mps2 * dt_s**2)
    return dist, np.maximum(new_speed, 0.0)


def slip_angle(steer_rad, wheelbase_m, l_r_m):
    """beta = atan(l_r / L * tan(delta))."""
    return np.arctan(l_r_m / wheelbase_m * np.tan(steer_rad))


def bicycle_step(x_m, y_m, heading_rad, speed_mps, accel_mps2, steer_rad, *, wheelbase_m, l_r_m, dt_s):
    """One step of the kinematic bicycle; returns (x, y, heading, speed, vx, vy, beta)."""
    beta = slip_angle(steer_rad, wheelbase_m, l_r_m)
    dist, new_speed = distance_and_speed(speed_mps, accel_mps2, dt_s)
    x_new = x_m + dist * np.cos(heading_rad + beta)
    y_new = y_m + dist * np.sin(heading_rad + beta)
    heading_new = heading_rad + dist / l_r_m * np.sin(beta)
    heading_new = (heading_new + np.pi) % (2.0 * np.pi) - np.pi
    vx = new_speed * np.cos(heading_new + beta)
    vy = new_speed * np.sin(heading_new + beta)
    return x_new, y_new, heading_new, new_speed, vx, vy, beta


def steady_state_turn(steer_rad, speed_mps, wheelbase_m, l_r_m):
    """Steady turning at constant steering and speed: (R_rear, R_cg, yaw rate, lateral acceleration)."""
    beta = slip_angle(steer_rad, wheelbase_m, l_r_m)
    r_rear = wheelbase_m / np.tan(steer_rad)
    r_cg = l_r_m / np.sin(beta)
    return r_rear, r_cg, speed_mps / r_cg, speed_mps**2 / r_cg
