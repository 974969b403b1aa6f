"""Heading from the satellite track against the odometry track (a check the map cannot fool).

On a street grid one frame can match the map as well 90 degrees off, and a wrong heading that
is locked in moves the belief the wrong way while the satellite fixes, held only weakly while
tracking, drift away from it slowly. Yet the fixes and the odometry together say which way the
robot drives: over the last ``span_m`` metres, the rotation that best maps the dead-reckoned
positions (odometry frame) onto the fixes (world frame) is the heading offset between the two
frames (2D orthogonal Procrustes / Kabsch: ``theta = atan2(sum(o x g), sum(o . g))`` on centred
points, common practice). A receiver's slowly wandering bias is common to all points and cancels;
what is left is its faster noise, measured by the residual after the fit.

Fixed memory: a ring of ``capacity`` (odometry pose, fix) pairs, no allocation per call.
"""

from __future__ import annotations

import math

import numpy as np

from .pathring import gather_centred, newest_rows


class CourseCheck:
    """World heading of the robot from recent fixes and odometry, or None when it is not determined.

    Parameters
    ----------
    span_m : float
        Odometry path length the fit uses (m); shorter tracks say nothing.
    sigma_floor_deg : float
        Smallest 1-sigma reported (deg): odometry heading drift, a bias that changes along the track.
    capacity : int
        Pairs kept.
    """

    def __init__(self, span_m: float = 25.0, sigma_floor_deg: float = 8.0, capacity: int = 256):
        self.span_m = float(span_m)
        self.sigma_floor = math.radians(sigma_floor_deg)
        self.cap = int(capacity)
        self._o = np.zeros((self.cap, 2), np.float64)
        self._g = np.zeros((self.cap, 2), np.float64)
        self._path = np.zeros(self.cap, np.float64)
        self._wo = np.zeros((self.cap, 2), np.float64)
        self._wg = np.zeros((self.cap, 2), np.float64)
        self.reset()

    def reset(self) -> None:
        """Forget the track (after an odometry jump or gap: the two frames no longer line up)."""
        self.n = 0
        self.head = 0
        self.ox = self.oy = self.oyaw = 0.0
        self.dist = 0.0

    def odometry(self, d_fwd_m: float, d_left_m: float, d_yaw_rad: float) -> None:
        """Dead-reckon one body-frame increment (mid-point heading)."""
        h = self.oyaw + 0.5 * d_yaw_rad
        c, s = math.cos(h), math.sin(h)
        self.ox += c * d_fwd_m - s * d_left_m
        self.oy += s * d_fwd_m + c * d_left_m
        self.oyaw += d_yaw_rad
        self.dist += math.hypot(d_fwd_m, d_left_m)

    def fix(self, x_m: float, y_m: float) -> None:
        """Record a new satellite fix (world ENU) against the current dead-reckoned position."""
        k = self.head
        self._o[k, 0], self._o[k, 1] = self.ox, self.oy
        self._g[k, 0], self._g[k, 1] = x_m, y_m
        self._path[k] = self.dist
        self.head = (k + 1) % self.cap
        self.n = min(self.n + 1, self.cap)

    def heading(self) -> tuple[float, float] | None:
        """(world yaw now, 1-sigma) in rad, or None when the last ``span_m`` are not on record."""
        if self.n < 8:
            return None
        m, covered = newest_rows(self._path, self.head, self.n, self.cap, self.span_m)
        if covered < self.span_m:
            return None
        o, g = gather_centred(self._o, self._g, self._wo, self._wg, self.head, m, self.cap)
        ox, oy, gx, gy = o[:, 0], o[:, 1], g[:, 0], g[:, 1]
        oo = float(np.dot(ox, ox) + np.dot(oy, oy))
        spread = math.sqrt(oo / m)
        if spread < 0.2 * self.span_m:
            return None  # driving back and forth: the rotation is not determined
        cross = float(np.dot(ox, gy) - np.dot(oy, gx))
        dot = float(np.dot(ox, gx) + np.dot(oy, gy))
        th = math.atan2(cross, dot)
        # residual of the best rotation: sum |R o - g|^2 = |o|^2 + |g|^2 - 2 (cos th dot + sin th cross)
        gg = float(np.dot(gx, gx) + np.dot(gy, gy))
        r2 = oo + gg - 2.0 * math.hypot(dot, cross)
        resid = math.sqrt(max(r2, 0.0) / m)
        sigma = max(self.sigma_floor, math.atan2(1.5 * resid + 0.5, spread))
        yaw = math.atan2(math.sin(self.oyaw + th), math.cos(self.oyaw + th))
        return yaw, sigma
