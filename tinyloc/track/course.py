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

from .pathring import PairRing


class CourseCheck(PairRing):
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
        super().__init__(capacity)
        self._g = self._b  # satellite fixes (world ENU)

    def reset(self) -> None:
        """Forget the track (after an odometry jump or gap: the two frames no longer line up)."""
        super().reset()

    def fix(self, x_m: float, y_m: float) -> None:
        """Record a new satellite fix (world ENU) against the current dead-reckoned position."""
        self._record(x_m, y_m)

    def heading(self) -> tuple[float, float] | None:
        """(world yaw now, 1-sigma) in rad, or None when the last ``span_m`` are not on record."""
        if self.n < 8:
            return None
        got = self._newest(self.span_m, self.span_m)
        if got is None:
            return None
        o, g, _ = got
        m = len(o)
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
