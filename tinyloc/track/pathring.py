"""The newest stretch of a ring of position pairs recorded along the path (shared by two fits).

:class:`tinyloc.track.course.CourseFit` (the satellite course) and
:class:`tinyloc.track.odoscale.OdometryScale` (the wheel scale) both keep a fixed ring of
(dead-reckoned position, other position) rows with the path length at each row, and fit the
newest rows that cover a stretch of path. These two helpers are that common part; they work in
buffers made once by the caller and allocate no arrays.
"""

from __future__ import annotations

import math

import numpy as np


def newest_rows(path: np.ndarray, head: int, n: int, cap: int, span_m: float) -> tuple[int, float]:
    """How many of the newest rows cover ``span_m`` of path, and the path they cover (m).

    Parameters
    ----------
    path : ndarray (cap,)
        Path length at each row (m), increasing with time.
    head : int
        Index the next row will be written to (the newest row is ``head - 1``).
    n : int
        Rows on record (at most ``cap``).
    cap : int
        Ring size.
    span_m : float
        Path wanted (m).

    Returns
    -------
    (m, covered_m) : (int, float)
        ``m`` rows, all ``n`` when they cover less than ``span_m``, and the path between the oldest
        of them and the newest.
    """
    newest = (head - 1) % cap
    end = path[newest]
    m = 0
    k = newest
    while m < n:
        m += 1
        if end - path[k] >= span_m:
            break
        k = (k - 1) % cap
    return m, float(end - path[(newest - m + 1) % cap])


def gather_centred(src_a: np.ndarray, src_b: np.ndarray, work_a: np.ndarray, work_b: np.ndarray,
                   head: int, m: int, cap: int) -> tuple[np.ndarray, np.ndarray]:
    """The ``m`` newest rows of two (cap, 2) rings, copied into work buffers and centred on their means.

    The order of the rows does not matter to the fits, so the ring's two pieces are copied as they lie.
    Returns views ``work_a[:m]``, ``work_b[:m]``.
    """
    a, b = work_a[:m], work_b[:m]
    start = (head - m) % cap
    k1 = min(m, cap - start)
    a[:k1] = src_a[start:start + k1]
    b[:k1] = src_b[start:start + k1]
    if k1 < m:
        a[k1:] = src_a[:m - k1]
        b[k1:] = src_b[:m - k1]
    for w in (a, b):
        for c in range(2):
            col = w[:, c]
            col -= col.sum() / m
    return a, b


class PairRing:
    """A fixed ring of (dead-reckoned odometry position, other position, path length) rows.

    The base of the satellite-course check and the wheel-scale fit: it dead-reckons the odometry
    increments it is given (mid-point heading), records rows against another position (a satellite
    fix, a tracked pose) and hands the newest stretch to the subclass's fit. Buffers are made once.

    Parameters
    ----------
    capacity : int
        Rows kept.
    """

    def __init__(self, capacity: int):
        self.cap = int(capacity)
        self._o = np.zeros((self.cap, 2), np.float64)
        self._b = np.zeros((self.cap, 2), np.float64)
        self._path = np.zeros(self.cap, np.float64)
        self._wo = np.zeros((self.cap, 2), np.float64)
        self._wb = np.zeros((self.cap, 2), np.float64)
        PairRing.reset(self)

    def reset(self) -> None:
        """Forget the track and restart dead reckoning at the origin."""
        self.n = 0
        self.head = 0
        self.ox = self.oy = self.oyaw = 0.0
        self.dist = 0.0

    def odometry(self, d_fwd_m: float, d_left_m: float, d_yaw_rad: float) -> None:
        """Dead-reckon one body-frame increment (m, m, rad; mid-point heading)."""
        h = self.oyaw + 0.5 * d_yaw_rad
        c, s = math.cos(h), math.sin(h)
        self.ox += c * d_fwd_m - s * d_left_m
        self.oy += s * d_fwd_m + c * d_left_m
        self.oyaw += d_yaw_rad
        self.dist += math.hypot(d_fwd_m, d_left_m)

    def _record(self, x_m: float, y_m: float) -> None:
        """One row: the dead-reckoned position now against (x_m, y_m), at the path driven so far."""
        k = self.head
        self._o[k, 0], self._o[k, 1] = self.ox, self.oy
        self._b[k, 0], self._b[k, 1] = x_m, y_m
        self._path[k] = self.dist
        self.head = (k + 1) % self.cap
        self.n = min(self.n + 1, self.cap)

    def _newest(self, span_m: float, min_cover_m: float):
        """(o, b, covered_m) of the newest rows covering ``span_m``, centred; None if they cover less than ``min_cover_m``."""
        m, covered = newest_rows(self._path, self.head, self.n, self.cap, span_m)
        if covered < min_cover_m:
            return None
        o, b = gather_centred(self._o, self._b, self._wo, self._wb, self.head, m, self.cap)
        return o, b, covered
