"""Point-to-point kinematics of a stepper axis: the trapezoidal speed profile of firmware planners.

G-code firmwares move each straight line from rest to rest, accelerating at a constant
rate up to the feed rate and braking at the same rate (a trapezoid in speed over time; a
triangle when the move is too short to reach the feed rate). The simulated controller
moves its axes this way, and the time-lapse plan estimates its moves with the same law.
"""

from __future__ import annotations

import math


def trapezoid_duration_s(distance_um: float, speed_um_s: float, accel_um_s2: float) -> float:
    """Time of a point-to-point move from rest to rest with limited speed and acceleration.

    Constant-acceleration kinematics: with ramps of length v²/(2a) each, a move longer
    than v²/a takes d/v + v/a; a shorter one never reaches v and takes 2·√(d/a).
    Units: um, um/s, um/s², result in s.
    """
    if distance_um <= 0.0:
        return 0.0
    if distance_um >= speed_um_s**2 / accel_um_s2:
        return distance_um / speed_um_s + speed_um_s / accel_um_s2
    return 2.0 * math.sqrt(distance_um / accel_um_s2)


def trapezoid_travel_um(t_s: float, distance_um: float, speed_um_s: float, accel_um_s2: float) -> float:
    """Distance covered ``t_s`` seconds into the move of :func:`trapezoid_duration_s`."""
    total_s = trapezoid_duration_s(distance_um, speed_um_s, accel_um_s2)
    if t_s <= 0.0:
        return 0.0
    if t_s >= total_s:
        return distance_um
    ramp_s = min(speed_um_s / accel_um_s2, total_s / 2.0)
    if t_s < ramp_s:
        return 0.5 * accel_um_s2 * t_s**2
    if t_s <= total_s - ramp_s:
        return 0.5 * accel_um_s2 * ramp_s**2 + speed_um_s * (t_s - ramp_s)
    return distance_um - 0.5 * accel_um_s2 * (total_s - t_s) ** 2
