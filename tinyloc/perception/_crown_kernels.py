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


@njit(**JIT)
def column_row_means(crown, colmean, rowmean):
    """Mean of ``crown`` over rows 0 .. i of each column (the pixel included) and over each whole row.

    crown, colmean, rowmean (h, w) float32.
    """
    h, w = crown.shape
    for i in range(h):
        acc = 0.0
        for j in range(w):
            acc += crown[i, j]
        rm = acc / w
        inv = 1.0 / (i + 1)
        for j in range(w):
            prev = colmean[i - 1, j] * i if i > 0 else 0.0
            colmean[i, j] = (prev + crown[i, j]) * inv
            rowmean[i, j] = rm
