"""Wheel-odometry distance scale, learned online from the tracked poses.

A wheel whose real radius differs from the configured one by 2 % (tyre wear, pressure, load) makes
every odometry step 2 % too long or too short. The grid filter's prediction then overshoots (or
undershoots) by that share of each step, and because each frame's likelihood is tempered (only a
small share of a frame is new evidence), the belief settles a constant distance along the path
away from the truth: the lag of a filter whose motion model is biased. On the generated drives
(odometry +2 % long) that lag was 0.1-0.5 m ahead of the truth even with the map's own evidence.

The tracked poses, held by the map, know the real distance driven, and the odometry knows its own:
over the last ``span_m`` metres of odometry path while the filter was tracking, the scale s and
rotation R that best map the raw dead-reckoned positions o onto the estimated positions e
(similarity Procrustes in 2D, Umeyama 1991, common practice) on centred points are::

    dot = sum(o . e),  cross = sum(o x e),  s = hypot(dot, cross) / sum(|o|^2)

The fit uses the *raw* odometry, not the corrected one, so it measures the robot's scale directly
and has no feedback from the value in use: where the map holds nothing along the street, the
estimate moves by the corrected odometry, the fit returns the value in use, and nothing changes.
The value in use follows the fit slowly (``rate`` per frame) and stays within ``1 +- max_dev``.

The same fit says how far the map evidence moved the estimate along its path against the corrected
odometry over the fitted track, ``drag_m = (s - value in use) * covered path``: where the evidence's
along-track bias changes (a stretch the perception places nearer than it is), the estimate is pulled
along and the drag shows it, while the posterior does not (it cannot see a bias common to its
frames). The tracker can add it to the reported covariance along the heading (``track.adapt_cov``).

Fixed memory: a ring of ``capacity`` (odometry position, estimate, path length) rows and work
buffers made once; no allocation per call.
"""

from __future__ import annotations

import math

import numpy as np

from .pathring import PairRing


class OdometryScale(PairRing):
    """The factor applied to odometry distances, learned from the tracked poses.

    Parameters
    ----------
    span_m : float
        Odometry path the fit covers at most (m); it starts once half of it is on record, at a rate
        scaled by (covered / span_m)^2.
    rate : float
        Share of the way from the value in use to a new fit, per frame (0 learns nothing).
    max_dev : float
        Largest relative deviation from 1 that is ever used (0.05: 0.95..1.05).
    initial : float
        Value in use at start (a calibrated scale, or 1).
    settle_m : float
        Path after a reset (lock-on) that is not recorded: the belief may still be closing the
        distance to the truth then, and that catch-up is not the wheels' doing.
    capacity : int
        Rows kept. A row is recorded only after ``span_m / 100`` of new path, so the span fits in the
        ring at any frame rate.
    """

    def __init__(self, span_m: float = 30.0, rate: float = 0.02, max_dev: float = 0.05, initial: float = 1.0,
                 capacity: int = 256, settle_m: float = 5.0):
        self.span_m = float(span_m)
        self.rate = float(rate)
        self.max_dev = float(max_dev)
        self.initial = float(initial)
        self.settle_m = float(settle_m)
        self.scale = self.initial
        super().__init__(capacity)
        self._e = self._b  # tracked estimates (world ENU)
        self.fits = 0
        self.last_fit = math.nan
        self.covered_m = 0.0
        self.drag_m = math.nan
        self.reset()

    def reset(self) -> None:
        """Forget the track (not tracking, odometry jump or gap); the value in use is kept."""
        super().reset()
        self.drag_m = math.nan  # no current fit

    def pose(self, x_m: float, y_m: float) -> None:
        """Record the filter's estimate (world ENU, m) of a frame flagged tracking, then refit."""
        if self.dist < self.settle_m:
            return
        if self.n and self.dist - self._path[(self.head - 1) % self.cap] < 0.01 * self.span_m:
            return
        self._record(x_m, y_m)
        s = self.fit()
        if s is not None:
            # how far the map moved the estimate along its path against the odometry (corrected by the
            # value in use) over the fitted track: the change of the evidence's along-track bias there
            self.drag_m = (s - self.scale) * self.covered_m
        if s is not None and self.rate > 0.0:
            self.fits += 1
            self.last_fit = s
            lo, hi = 1.0 - self.max_dev, 1.0 + self.max_dev
            # a shorter track gives a noisier fit (its error falls as 1 / length): it moves the value less
            w = self.rate * min(1.0, self.covered_m / self.span_m) ** 2
            self.scale += w * (min(max(s, lo), hi) - self.scale)

    def fit(self) -> float | None:
        """Scale of the newest rows covering ``span_m`` of path, or None (too short, or back and forth)."""
        if self.n < 8:
            return None
        got = self._newest(self.span_m, 0.5 * self.span_m)
        if got is None:
            return None
        o, e, covered = got
        m = len(o)
        ox, oy, ex, ey = o[:, 0], o[:, 1], e[:, 0], e[:, 1]
        oo = float(np.dot(ox, ox) + np.dot(oy, oy))
        if oo <= 0.0 or math.sqrt(oo / m) < 0.2 * covered:
            return None  # driving back and forth (or standing): the scale is not determined
        dot = float(np.dot(ox, ex) + np.dot(oy, ey))
        cross = float(np.dot(ox, ey) - np.dot(oy, ex))
        self.covered_m = covered
        return math.hypot(dot, cross) / oo
