"""Per-frame levelling: the rotation from the robot base to a gravity-levelled frame, and the horizon.

The levelled frame L shares the base frame's origin (on the ground below the robot)
and its yaw, with z along the true vertical. The accelerometer reads the specific
force, which at rest is +g along L's z: in the base frame it is
``f = |g| (-sin p, cos p sin r, cos p cos r)`` for base pitch p and roll r
(:func:`tinyloc.frames.gravity_to_roll_pitch`), so ``level_from_base = Ry(p) Rx(r)``.
Without an IMU the base is taken as level and only the fixed mount tilts the camera.

Failure is data: a vector that is not finite, nearly zero, far from 1 g, or tilted more
than a limit gives the identity with a status explaining why.
"""

from __future__ import annotations

import math

import numpy as np

from ..frames import gravity_to_roll_pitch, rot_x, rot_y

G0 = 9.80665  # standard gravity, m/s^2 (CGPM 1901)


def level_from_base(gravity, *, max_tilt_deg: float = 30.0, g_tolerance: float = 0.5,
                    out: np.ndarray | None = None) -> tuple[np.ndarray, str]:
    """Rotation taking base-frame vectors to the levelled frame.

    Parameters
    ----------
    gravity : array_like (3,) or None
        Accelerometer specific force in the base frame (FLU), m/s^2; level and at rest (0, 0, +9.81).
        ``None`` means "no IMU": the base is taken as level.
    max_tilt_deg : float
        Larger tilts of the base are refused (the robot is climbing a wall or the IMU is wrong).
    g_tolerance : float
        Accepted relative deviation of |f| from 1 g (0.5: 4.9 .. 14.7 m/s^2); outside it the
        robot is accelerating hard and the vector is not a gravity measurement.
    out : ndarray (3, 3) float64, optional
        Written in place and returned.

    Returns
    -------
    level_from_base : ndarray (3, 3)
        The rotation (identity when the status is not "ok").
    status : str
        "ok", "no-imu", or "bad-gravity: ..." with the reason.
    """
    r = np.eye(3) if out is None else out
    r[...] = np.eye(3)
    if gravity is None:
        return r, "no-imu"
    try:
        f = np.asarray(gravity, dtype=np.float64).reshape(3)
    except (TypeError, ValueError):
        return r, "bad-gravity: not a 3-vector"
    if not np.all(np.isfinite(f)):
        return r, "bad-gravity: not finite"
    n = float(np.sqrt(f @ f))
    if abs(n / G0 - 1.0) > g_tolerance:
        return r, f"bad-gravity: |f| = {n:.2f} m/s^2 is not near 1 g"
    roll, pitch = gravity_to_roll_pitch(f)
    tilt = math.degrees(math.acos(max(-1.0, min(1.0, math.cos(roll) * math.cos(pitch)))))
    if tilt > max_tilt_deg:
        return r, f"bad-gravity: base tilted {tilt:.0f} deg (limit {max_tilt_deg:g})"
    r[...] = rot_y(pitch) @ rot_x(roll)
    return r, "ok"


def horizon_rows_reference(camera, level_from_base_r) -> np.ndarray:
    """Horizon row (pixels, continuous) in each image column: plain NumPy reference.

    For each column the rays of every pixel centre are levelled and the row where the
    ray's vertical component crosses zero is found by linear interpolation. Columns
    entirely below the horizon give -1 (horizon above the image); entirely above give
    ``height`` (no ground in view).
    """
    h, w = camera.height, camera.width
    vv, uu = np.mgrid[0:h, 0:w]
    _, d = camera.pixel_rays_base(np.stack([uu.ravel(), vv.ravel()], axis=1).astype(np.float64))
    z = (d @ np.asarray(level_from_base_r).T)[:, 2].reshape(h, w)
    out = np.empty(w)
    for j in range(w):
        col = z[:, j]
        if col[0] <= 0.0:
            out[j] = -1.0
            continue
        below = np.nonzero(col <= 0.0)[0]
        if below.size == 0:
            out[j] = float(h)
            continue
        i = below[0]
        out[j] = (i - 1) + col[i - 1] / (col[i - 1] - col[i])
    return out
