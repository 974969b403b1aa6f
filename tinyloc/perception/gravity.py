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


class GravityEstimator:
    """Gravity in the base frame from accelerometer rows, with the body's own acceleration taken out.

    An accelerometer measures specific force, gravity's reaction *plus* the body's acceleration:
    ``f = R^T (a + g_up)`` with ``R`` = level_from_base (yaw left out) and ``a`` the acceleration in the
    levelled heading frame. A ground robot's ``a`` is known from its wheels (common practice):
    forward, the change of speed; sideways, the centripetal ``v * omega`` (``v^2 / r`` on a circle of
    radius r, a fact of mechanics). Over a window of samples the mean forward acceleration is exactly
    ``(v_end - v_start) / T``, so no derivative of a noisy speed is taken sample by sample.

    The estimate is the mean of the accelerometer samples of the last ``window_s`` seconds (a longer
    window averages out vibration but lags real attitude changes such as bumps), minus
    ``R^T (a_fwd, a_left, 0)`` with ``R`` from the uncorrected mean (one fixed-point step: the error
    left is second order, tilt x acceleration). Without usable odometry over the window the plain
    mean is returned, and :attr:`status` says so.

    Memory is fixed: two ring buffers of ``capacity`` samples (IMU rows, and odometry rows as
    cumulative signed path length and unwrapped yaw).

    Parameters
    ----------
    window_s : float
        Averaging window (s). ``<= 0``: only the samples added since the last :meth:`estimate`
        (the mean since the previous frame).
    compensate : bool
        Take out the wheel-odometry acceleration.
    speed_span_s : float
        Speed at a time t is the mean over (t - speed_span_s, t] of the odometry path (s); the
        acceleration is therefore that of the window shifted back by half this span.
    max_accel_mps2 : float
        A wheel acceleration larger than this is not believed (wheel spin, an odometry fault): the
        plain mean is used.
    max_step_m : float
        An odometry row farther than this from the previous one is a jump: the odometry history is
        forgotten.
    capacity : int
        Ring size for each sensor (rows). At 100 Hz and ``window_s`` 0.4 an IMU needs 40; the window
        silently shrinks to what the ring holds at very high rates.
    bias : 3 floats
        Accelerometer bias (FLU base frame, m/s^2) subtracted from every row, e.g. from
        :func:`accel_bias_two_position`. A bias b tilts the estimate by about b / g and nothing on
        board tells it from a slope: it must be calibrated.
    """

    def __init__(self, window_s: float = 0.4, compensate: bool = True, *, speed_span_s: float = 0.1,
                 max_accel_mps2: float = 3.0, max_step_m: float = 2.0, capacity: int = 1024,
                 bias=(0.0, 0.0, 0.0)):
        self.bias = tuple(float(v) for v in bias)
        self.window_s = float(window_s)
        self.compensate = bool(compensate)
        self.speed_span_s = float(speed_span_s)
        self.max_accel = float(max_accel_mps2)
        self.max_step = float(max_step_m)
        n = int(capacity)
        self._cap = n
        self._it, self._ix, self._iy, self._iz = [0.0] * n, [0.0] * n, [0.0] * n, [0.0] * n
        self._ihead = -1  # index of the newest IMU row
        self._icount = 0
        self._inew = 0  # rows added since the last estimate
        self._ot, self._os, self._opsi = [0.0] * n, [0.0] * n, [0.0] * n
        self._ohead = -1
        self._ocount = 0
        self._olast = None  # last odometry pose (x, y, yaw)
        self.accel = [0.0, 0.0]  # wheel acceleration taken out by the last estimate (fwd, left), m/s^2
        self.status = "no-imu"

    def reset(self) -> None:
        """Forget both histories."""
        self._icount = self._inew = self._ocount = 0
        self._ihead = self._ohead = -1
        self._olast = None

    def forget_odometry(self) -> None:
        """Forget the odometry history (after a jump or a gap: speeds across it are meaningless)."""
        self._ocount = 0
        self._ohead = -1
        self._olast = None

    # ---- input ----------------------------------------------------------------------------------
    def add_imu(self, t: float, fx: float, fy: float, fz: float) -> None:
        """One accelerometer row (s, m/s^2, FLU base frame); rows not newer than the last are ignored."""
        if self._icount and t <= self._it[self._ihead]:
            return
        k = (self._ihead + 1) % self._cap
        b = self.bias
        self._it[k], self._ix[k], self._iy[k], self._iz[k] = t, fx - b[0], fy - b[1], fz - b[2]
        self._ihead = k
        self._icount = min(self._icount + 1, self._cap)
        self._inew += 1

    def add_odometry(self, t: float, x: float, y: float, yaw: float) -> None:
        """One wheel-odometry pose (s; m, m, rad in the odometry frame)."""
        last = self._olast
        if last is None or self._ocount == 0:
            s = psi = 0.0
        else:
            if t <= self._ot[self._ohead]:
                return
            dx, dy = x - last[0], y - last[1]
            if dx * dx + dy * dy > self.max_step * self.max_step:
                self.forget_odometry()
                self.add_odometry(t, x, y, yaw)
                return
            # signed: driving backwards decelerates "forward" speed through zero
            s = self._os[self._ohead] + math.cos(last[2]) * dx + math.sin(last[2]) * dy
            d = yaw - last[2]
            psi = self._opsi[self._ohead] + math.atan2(math.sin(d), math.cos(d))
        k = (self._ohead + 1) % self._cap
        self._ot[k], self._os[k], self._opsi[k] = t, s, psi
        self._ohead = k
        self._ocount = min(self._ocount + 1, self._cap)
        self._olast = (x, y, yaw)

    # ---- output ---------------------------------------------------------------------------------
    def _odo_at(self, t: float):
        """(path length, unwrapped yaw) at time t, linear between odometry rows; None outside them."""
        n = self._ocount
        if n < 2:
            return None
        cap, k = self._cap, self._ohead
        tt = self._ot
        if t > tt[k] + 1e-9:
            return None
        for _ in range(n - 1):
            j = (k - 1) % cap
            if tt[j] <= t:
                u = (t - tt[j]) / (tt[k] - tt[j])
                return (self._os[j] + u * (self._os[k] - self._os[j]),
                        self._opsi[j] + u * (self._opsi[k] - self._opsi[j]))
            k = j
        return None

    def _speed_at(self, t: float):
        a = self._odo_at(t)
        b = self._odo_at(t - self.speed_span_s)
        if a is None or b is None:
            return None
        return (a[0] - b[0]) / self.speed_span_s

    def estimate(self, out: np.ndarray) -> bool:
        """Write the gravity estimate (base frame, m/s^2) into ``out`` (3,); False if there is no IMU row.

        :attr:`status` is "compensated", or "uncompensated: <why>" when the plain mean was used.
        """
        if self._icount == 0 or (self.window_s <= 0.0 and self._inew == 0):
            self.status = "no-imu"
            return False
        cap, k = self._cap, self._ihead
        tb = self._it[k]
        limit = min(self._inew, self._icount) if self.window_s <= 0.0 else self._icount
        sx = sy = sz = 0.0
        n = 0
        ta = tb
        while n < limit:
            t = self._it[k]
            if self.window_s > 0.0 and t <= tb - self.window_s:
                break
            sx += self._ix[k]
            sy += self._iy[k]
            sz += self._iz[k]
            ta = t
            n += 1
            k = (k - 1) % cap
        self._inew = 0
        fx, fy, fz = sx / n, sy / n, sz / n
        self.accel[0] = self.accel[1] = 0.0
        out[0], out[1], out[2] = fx, fy, fz
        if not self.compensate:
            self.status = "uncompensated: off"
            return True
        if n < 2:
            self.status = "uncompensated: one sample"
            return True
        half = 0.5 * (tb - ta) / (n - 1)  # the samples stand for (ta - dt/2, tb + dt/2)
        t0, t1 = ta - half, tb + half
        # the newest odometry row may be a little older than the newest IMU row: end the window there
        if self._ocount and t1 > self._ot[self._ohead]:
            t1 = self._ot[self._ohead]
        span = t1 - t0
        if span <= 0.5 * (tb - ta):
            self.status = "uncompensated: no odometry over the window"
            return True
        v0, v1 = self._speed_at(t0), self._speed_at(t1)
        p0, p1 = self._odo_at(t0), self._odo_at(t1)
        if v0 is None or v1 is None or p0 is None or p1 is None:
            self.status = "uncompensated: no odometry over the window"
            return True
        a_fwd = (v1 - v0) / span
        a_left = ((p1[0] - p0[0]) / span) * ((p1[1] - p0[1]) / span)  # v * omega
        if a_fwd * a_fwd + a_left * a_left > self.max_accel * self.max_accel:
            self.status = f"uncompensated: wheel acceleration {math.hypot(a_fwd, a_left):.1f} m/s^2 not believed"
            return True
        # R^T (a_fwd, a_left, 0) with R = Ry(pitch) Rx(roll) from the uncorrected mean
        roll, pitch = gravity_to_roll_pitch((fx - a_fwd, fy - a_left, fz))
        if not (math.isfinite(roll) and math.isfinite(pitch)):
            self.status = "uncompensated: no tilt"
            return True
        cp, sp, cr, sr = math.cos(pitch), math.sin(pitch), math.cos(roll), math.sin(roll)
        out[0] = fx - cp * a_fwd
        out[1] = fy - (cr * a_left + sr * sp * a_fwd)
        out[2] = fz - (-sr * a_left + cr * sp * a_fwd)
        self.accel[0], self.accel[1] = a_fwd, a_left
        self.status = "compensated"
        return True


def accel_bias_two_position(f_a, f_b, g_mps2: float = G0) -> np.ndarray:
    """Accelerometer bias from two readings at rest on the same spot, the robot turned by 180 degrees.

    Turning the robot about the ground's normal by half a turn flips the horizontal components of
    gravity in the base frame (x and y change sign, z stays) while a bias stays put, so the mean of
    the two readings' x and y is the bias whatever the slope (the two-position method; common
    practice). The z bias is the mean z minus gravity's z, ``g cos(tilt)``, with the tilt from the
    half-difference; it needs the local gravity (``g_mps2``, standard gravity by default; it varies
    by about 0.5 % over the Earth) and matters little for levelling.

    Parameters
    ----------
    f_a, f_b : array_like (3,)
        Mean specific force at rest (FLU base frame, m/s^2), at a heading and at that heading + 180
        deg. Average a few seconds of samples each: vibration and noise average out, the bias does not.
    g_mps2 : float
        Local gravity (m/s^2).

    Returns
    -------
    ndarray (3,)
        The bias (m/s^2), to subtract from every reading.
    """
    a = np.asarray(f_a, dtype=np.float64).reshape(3)
    b = np.asarray(f_b, dtype=np.float64).reshape(3)
    bias = 0.5 * (a + b)
    h = 0.5 * (a - b)  # gravity's horizontal part at the first heading
    c2 = 1.0 - (h[0] * h[0] + h[1] * h[1]) / (g_mps2 * g_mps2)
    bias[2] = 0.5 * (a[2] + b[2]) - g_mps2 * math.sqrt(max(c2, 0.0))
    return bias
