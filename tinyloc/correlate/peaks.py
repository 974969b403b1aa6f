"""Pose extraction: modes by non-maximum suppression, and sub-cell / sub-heading parabolas.

A :class:`Mode` is in window terms: ``row``, ``col`` are continuous window cell
indices of the robot origin's cell (the robot sits at the centre of cell
(round(row), round(col)) when the fractional part is 0; add 0.5 for continuous
cell coordinates), ``heading`` a continuous heading index (yaw = heading * 2 pi / A).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import _kernels as K


@dataclass(frozen=True)
class Mode:
    """One likelihood mode.

    Attributes
    ----------
    row, col : float
        Refined window cell (sub-cell).
    heading : float
        Refined heading index (sub-step), in [0, A).
    loglik : float
        Log-likelihood at the refined pose (parabolic peak value; tempered, up to a constant).
    cell : (int, int, int)
        The integer (heading, row, col) of the mode: a local maximum of the exact scores.
    cell_loglik : float
        Exact log-likelihood at ``cell``. Modes are ranked by it, so the exact and the
        coarse-to-fine searches rank alike.
    """

    row: float
    col: float
    heading: float
    loglik: float
    cell: tuple[int, int, int]
    cell_loglik: float = float("nan")


class PeakWork:
    """Preallocated buffers for non-maximum suppression."""

    def __init__(self, shape, kmax: int = 64):
        self.work = np.zeros(shape, np.float32)
        self.i = np.zeros(kmax, np.int64)
        self.j = np.zeros(kmax, np.int64)
        self.a = np.zeros(kmax, np.int64)
        self.v = np.zeros(kmax, np.float64)

    @property
    def nbytes(self) -> int:
        return self.work.nbytes + 4 * self.i.nbytes


def find_modes(best, best_a, pw: PeakWork, scale: int, k: int, radius_cells: int, radius_headings: int,
               n_headings_level: int) -> list[Mode]:
    """Top-k modes of a heading-max profile (non-maximum suppression in x, y and heading).

    Returned modes carry integer cells of the profile's level (``scale`` 1 or 2).
    """
    k = min(k, pw.i.shape[0])
    n = K.nms_profile(best, best_a, n_headings_level, k, radius_cells, radius_headings, pw.work, pw.i, pw.j, pw.a,
                      pw.v)
    return [Mode(float(pw.i[m]), float(pw.j[m]), float(pw.a[m]), float(pw.v[m]),
                 (int(pw.a[m]), int(pw.i[m]), int(pw.j[m])), float(pw.v[m])) for m in range(n)]


def parabola(sm, s0, sp):
    """Vertex offset (in steps, clipped to +-0.5) and value of the parabola through three samples."""
    den = sm - 2.0 * s0 + sp
    if not np.isfinite(den) or den >= 0.0:
        return 0.0, s0
    off = 0.5 * (sm - sp) / den
    off = max(-0.5, min(0.5, off))
    return off, s0 - 0.25 * (sm - sp) * off


def modes_of_volume(vol, row0, col0, a0, A, pw: PeakWork, k, radius_cells, radius_headings) -> list[Mode]:
    """Top-k modes of a small volume (tracking), refined by parabolas through its own neighbours."""
    T, Ho, Wo = vol.shape
    k = min(k, pw.i.shape[0])
    n = K.nms_volume(vol, k, radius_cells, radius_headings, pw.work, pw.a, pw.i, pw.j, pw.v)
    out = []
    for m in range(n):
        t, i, j = int(pw.a[m]), int(pw.i[m]), int(pw.j[m])
        s0 = float(vol[t, i, j])

        def nb(tt, ii, jj):
            if 0 <= tt < T and 0 <= ii < Ho and 0 <= jj < Wo:
                return float(vol[tt, ii, jj])
            return -np.inf

        dr, vr = parabola(nb(t, i - 1, j), s0, nb(t, i + 1, j))
        dc, vc = parabola(nb(t, i, j - 1), s0, nb(t, i, j + 1))
        dh, vh = parabola(nb(t - 1, i, j), s0, nb(t + 1, i, j))
        peak = s0 + (vr - s0) + (vc - s0) + (vh - s0)
        out.append(Mode(row0 + i + dr, col0 + j + dc, float((a0 + t + dh) % A), peak,
                        (int((a0 + t) % A), row0 + i, col0 + j), s0))
    return out
