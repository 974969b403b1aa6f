"""Numba kernels of the crown model's colour and sky-context features (crown_features.py is the API).

Kernels take prepared contiguous arrays and write into caller-owned buffers; they never validate,
allocate or log.
"""

from __future__ import annotations

from numba import njit

from .._numba import JIT


@njit(**JIT)
def colour_context(lab, sky, count, astar, bstar, skyabove, nonsky):
    """Lab a* and b*, the sky share above each pixel in its column, and the not-sky indicator.

    lab (h, w, 3) uint8 (OpenCV's 8-bit Lab: a* + 128, b* + 128); sky (h, w) uint8 (non-zero = sky);
    count (w,) int64 scratch. Writes astar, bstar (Lab units, float32), skyabove = share of sky pixels
    among rows 0 .. i of the column (the pixel included), nonsky = 1 where not sky, else 0.
    """
    h, w = sky.shape
    for j in range(w):
        count[j] = 0
    for i in range(h):
        inv = 1.0 / (i + 1)
        for j in range(w):
            s = sky[i, j] != 0
            if s:
                count[j] += 1
            astar[i, j] = float(lab[i, j, 1]) - 128.0
            bstar[i, j] = float(lab[i, j, 2]) - 128.0
            skyabove[i, j] = count[j] * inv
            nonsky[i, j] = 0.0 if s else 1.0
