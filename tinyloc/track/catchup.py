"""Catch-up: how far the map evidence has moved the estimate against the odometry, lately.

A belief that has settled on the robot's pose moves with the odometry: each frame's estimate is
the previous one carried by the odometry increment, plus a small correction from the frame. A
belief that locked on a few metres off (a neighbour pose along a street) and is still being
pulled towards the truth by the tempered frames instead shows a steady correction in one
direction, a few centimetres per frame, or a sudden jump when its mode moves to another cell.
Its posterior can be tight all the same: the 1-sigma says how broad the belief is, not whether
it has stopped moving.

Per frame, with the previous estimate (x, y, yaw), the odometry increment actually applied
(forward f, left l, turn dpsi; already multiplied by the wheel scale in use) and the new estimate
(x', y'), the correction is the new estimate minus the dead-reckoned one, moved along the
mid-step heading h = yaw + dpsi / 2 as the filter's prediction does::

    c = (x' - x - cos(h) f + sin(h) l,  y' - y - sin(h) f - cos(h) l)

and the catch-up is a decaying sum of the corrections, ``s = memory * s + c``, reported as its
length ``drift_m`` (m). With ``memory`` 0.9 it spans about the last 10 frames (2 s at 5 Hz):
random corrections largely cancel, a steady pull adds up (0.04 m per frame gives 0.4 m).

Frames without usable odometry (missing, or a jump the tracker ignored) break the chain: the sum
is forgotten, since the estimate's motion there says nothing about the map. So is a restart, and
the tracker adds nothing while it is searching (a global search moves the belief by metres on
purpose): the sum covers the frames since the last lock-on.
Plain floats, no allocation.
"""

from __future__ import annotations

import math


class CatchUp:
    """Decaying sum of the estimate's corrections against dead reckoning (world frame, metres).

    Parameters
    ----------
    memory : float
        Factor on the sum per frame, in [0, 1) (0: only the last correction counts).
    """

    def __init__(self, memory: float = 0.9):
        if not 0.0 <= memory < 1.0:
            raise ValueError(f"catch-up memory {memory}: must be in [0, 1)")
        self.memory = float(memory)
        self.reset()

    def reset(self) -> None:
        """Forget the sum and the previous estimate (a restart, or a break in the odometry)."""
        self.sx = 0.0
        self.sy = 0.0
        self._have_prev = False
        self._have_step = False
        self._px = self._py = self._pyaw = 0.0
        self._f = self._l = self._dpsi = 0.0

    def moved(self, d_fwd_m: float, d_left_m: float, d_yaw_rad: float) -> None:
        """The odometry increment applied to the belief this frame (body frame, scale applied)."""
        self._f, self._l, self._dpsi = d_fwd_m, d_left_m, d_yaw_rad
        self._have_step = True

    def observe(self, x_m: float, y_m: float, yaw_rad: float, *, add: bool = True) -> None:
        """This frame's estimate: add its correction against the dead-reckoned previous estimate.

        With ``add`` False the estimate is only remembered and the sum starts again from zero (the
        tracker does this while searching, where the belief is expected to move).
        """
        if not (math.isfinite(x_m) and math.isfinite(y_m) and math.isfinite(yaw_rad)):
            self.reset()
            return
        if not add:
            self.sx = self.sy = 0.0
        elif self._have_prev and self._have_step:
            h = self._pyaw + 0.5 * self._dpsi
            c, s = math.cos(h), math.sin(h)
            cx = x_m - self._px - (c * self._f - s * self._l)
            cy = y_m - self._py - (s * self._f + c * self._l)
            self.sx = self.memory * self.sx + cx
            self.sy = self.memory * self.sy + cy
        elif self._have_prev:
            # no increment was applied (the filter did not predict): nothing to compare against
            self.sx = self.sy = 0.0
        self._px, self._py, self._pyaw = x_m, y_m, yaw_rad
        self._have_prev = True
        self._have_step = False

    @property
    def drift_m(self) -> float:
        """Length of the decaying sum of corrections (m)."""
        return math.hypot(self.sx, self.sy)
