"""Frames, angles and 2D rigid transforms: the one place where angle conventions live.

World frame: local ENU (x east, y north, z up), metres. Robot base: x forward,
y left, z up (FLU). Camera: x right, y down, z forward (OpenCV pinhole).

Yaw is in radians, counter-clockwise from east (+x), wrapped to (-pi, pi].
Heading (degrees clockwise from true north, [0, 360)) exists only at the edges
that speak it (NMEA, human-facing text) and is converted here only.
"""

from __future__ import annotations

import math

import numpy as np

TWO_PI = 2.0 * math.pi


def wrap_angle(a_rad):
    """Wrap angle(s) to (-pi, pi].

    Parameters
    ----------
    a_rad : float or ndarray
        Angle(s) in radians.

    Returns
    -------
    float or ndarray
        The same angle(s) in (-pi, pi]; scalars stay Python floats.
    """
    if np.ndim(a_rad) == 0:
        w = math.fmod(float(a_rad) + math.pi, TWO_PI)
        if w <= 0.0:
            w += TWO_PI
        return w - math.pi
    a = np.asarray(a_rad, dtype=np.float64)
    w = np.fmod(a + np.pi, TWO_PI)
    w = np.where(w <= 0.0, w + TWO_PI, w)
    return w - np.pi


def angle_diff(a_rad, b_rad):
    """Smallest signed difference a - b, in (-pi, pi] (radians)."""
    return wrap_angle(np.asarray(a_rad) - np.asarray(b_rad)) if np.ndim(a_rad) or np.ndim(b_rad) \
        else wrap_angle(float(a_rad) - float(b_rad))


def yaw_to_heading_deg(yaw_rad):
    """ENU yaw (rad, CCW from east) -> compass heading (deg, CW from north, [0, 360))."""
    h = np.mod(90.0 - np.degrees(yaw_rad), 360.0)
    return float(h) if np.ndim(h) == 0 else h


def heading_deg_to_yaw(heading_deg):
    """Compass heading (deg, CW from north) -> ENU yaw (rad, CCW from east, (-pi, pi])."""
    return wrap_angle(np.radians(90.0 - np.asarray(heading_deg, dtype=np.float64)))


def rot2(yaw_rad: float) -> np.ndarray:
    """2x2 rotation matrix of a counter-clockwise rotation by ``yaw_rad``."""
    c, s = math.cos(yaw_rad), math.sin(yaw_rad)
    return np.array([[c, -s], [s, c]])


def compose2(a_from_b, b_from_c):
    """Compose planar poses (x, y, yaw): returns a_from_c = a_from_b * b_from_c."""
    ax, ay, ayaw = a_from_b
    bx, by, byaw = b_from_c
    c, s = math.cos(ayaw), math.sin(ayaw)
    return (ax + c * bx - s * by, ay + s * bx + c * by, wrap_angle(ayaw + byaw))


def invert2(a_from_b):
    """Inverse of a planar pose (x, y, yaw): returns b_from_a."""
    x, y, yaw = a_from_b
    c, s = math.cos(yaw), math.sin(yaw)
    return (-c * x - s * y, s * x - c * y, wrap_angle(-yaw))


def relative2(world_from_a, world_from_b):
    """Pose of b in a's frame: a_from_b = inv(world_from_a) * world_from_b."""
    return compose2(invert2(world_from_a), world_from_b)


def rot_x(a_rad: float) -> np.ndarray:
    """3x3 right-handed rotation about +x by ``a_rad``."""
    c, s = math.cos(a_rad), math.sin(a_rad)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])


def rot_y(a_rad: float) -> np.ndarray:
    """3x3 right-handed rotation about +y by ``a_rad``."""
    c, s = math.cos(a_rad), math.sin(a_rad)
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


def rot_z(a_rad: float) -> np.ndarray:
    """3x3 right-handed rotation about +z by ``a_rad``."""
    c, s = math.cos(a_rad), math.sin(a_rad)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def rpy_to_matrix(roll_rad: float, pitch_rad: float, yaw_rad: float) -> np.ndarray:
    """Rotation parent_from_child for intrinsic Z-Y-X (yaw, then pitch, then roll) angles.

    In the FLU base frame a positive pitch turns the forward axis down (right-hand
    rule about +y, which points left) and a positive roll turns the left axis up,
    so the right side goes down.
    """
    return rot_z(yaw_rad) @ rot_y(pitch_rad) @ rot_x(roll_rad)


# Fixed rotation from the camera optical frame (x right, y down, z forward) to a
# camera-aligned FLU frame (x forward, y left, z up): flu = R @ optical.
FLU_FROM_OPTICAL = np.array([[0.0, 0.0, 1.0], [-1.0, 0.0, 0.0], [0.0, -1.0, 0.0]])


def gravity_to_roll_pitch(f_body) -> tuple[float, float]:
    """Roll and pitch (rad) of the base from an accelerometer specific-force vector.

    Parameters
    ----------
    f_body : array_like, shape (3,)
        Specific force in the FLU base frame (m/s^2). At rest and level it reads
        (0, 0, +9.81): the accelerometer measures the reaction to gravity.

    Returns
    -------
    roll_rad, pitch_rad : float
        Angles such that ``rpy_to_matrix(roll, pitch, 0)`` maps base vectors to a
        gravity-levelled frame. NaN if the vector is not finite or is zero.
    """
    fx, fy, fz = (float(v) for v in f_body)
    n = math.sqrt(fx * fx + fy * fy + fz * fz)
    if not math.isfinite(n) or n < 1e-6:
        return math.nan, math.nan
    # Levelled frame reads (0,0,|f|); base reads R^T (0,0,|f|) with R = Ry(p) Rx(r):
    # f_base = |f| * (-sin p, cos p sin r, cos p cos r).
    pitch = math.asin(max(-1.0, min(1.0, -fx / n)))
    roll = math.atan2(fy, fz)
    return roll, pitch
