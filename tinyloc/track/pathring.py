"""The newest stretch of a ring of position pairs recorded along the path (shared by two fits).

:class:`tinyloc.track.course.CourseFit` (the satellite course) and
:class:`tinyloc.track.odoscale.OdometryScale` (the wheel scale) both keep a fixed ring of
(dead-reckoned position, other position) rows with the path length at each row, and fit the
newest rows that cover a stretch of path. These two helpers are that common part; they work in
buffers made once by the caller and allocate no arrays.
"""

from __future__ import annotations

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
