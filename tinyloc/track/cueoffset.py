"""Where one family of cues (the ground surfaces) puts the robot, relative to the estimate.

The grid posterior cannot see a bias common to many frames (a car park read as road moves the
ground evidence half a metre along the street, frame after frame). One family of cues that
disagrees with the estimate is a sign of such a bias, or of a stretch where that family cannot fix
the pose at all. Each frame, the correlator scores the bird's-eye grid with the ground-surface
features of the scoring model alone (road, sidewalk, grass: a legal model with fewer rows); its
log-likelihood at the box's centre heading is sampled on a small grid of offsets (along, left) about
the filter's estimate, and folded into a decaying sum ``acc = memory * acc + weight (L - max L)``.
The offset of the sum's maximum is the family's say about where the robot is, relative to the
estimate, over the last few seconds. The tracker adds ``gain`` times the offset's squares, as variances
along and across the heading, to the reported position covariance while tracking (``track.cue_cov``,
docs/tracking.md).

Where the ground cannot tell along the street (a long uniform street) the maximum wanders to the
edge of the grid and the term is large: conservative, and said so. A sum with no evidence at all
reports the grid's corner (the largest offset).

Fixed memory: the sum, a work grid and the offsets are made once; no allocation per frame.
"""

from __future__ import annotations

import math

import numpy as np

from . import _kernels as K


class CueOffset:
    """Decaying sum of a cue family's log-likelihood on a grid of offsets about the estimate.

    Parameters
    ----------
    half_m : float
        Half-size of the offset grid (m, along and left).
    step_m : float
        Spacing of the grid (m).
    memory : float
        Factor on the sum per frame (0.9: about 10 frames, 2 s at 5 Hz).
    weight : float
        Factor on each frame's log-likelihood before it is added (1: the calibrated single-frame value).
    """

    def __init__(self, half_m: float = 2.0, step_m: float = 0.25, memory: float = 0.9, weight: float = 1.0):
        n = int(round(half_m / step_m))
        self.offs = np.arange(-n, n + 1, dtype=np.float64) * float(step_m)
        m = len(self.offs)
        self.acc = np.zeros((m, m), np.float64)
        self._tmp = np.zeros((m, m), np.float64)
        self.memory = float(memory)
        self.weight = float(weight)
        self.reset()

    def reset(self) -> None:
        """Forget the sum (after a lost filter: the estimate jumped)."""
        self.acc.fill(0.0)
        self.frames = 0  # frames with evidence since the reset
        self.seen = False

    def decay(self) -> None:
        """A frame without the family's evidence: the sum fades."""
        self.acc *= self.memory

    def add(self, cue: np.ndarray, row0: float, col0: float, scale: float, x_m: float, y_m: float, yaw_rad: float,
            x_min: float, y_max: float, res_m: float) -> bool:
        """Fold one frame's surface in.

        Parameters
        ----------
        cue : ndarray (H, W) float32
            Log-likelihood over positions at one heading: cell (i, j) is the robot origin at continuous
            global cell coordinates ``(row0 + scale (i + 0.5), col0 + scale (j + 0.5))`` (the layout of a
            :class:`~tinyloc.track.gridfilter.LikelihoodVolume` layer).
        x_m, y_m, yaw_rad : float
            The filter's estimate (world ENU); offsets are along and left of this heading.
        x_min, y_max, res_m : float
            Map raster placement.

        Returns
        -------
        bool
            False when the surface was flat (no evidence of the family in the frame): only the decay applies.
        """
        c, s = math.cos(yaw_rad), math.sin(yaw_rad)
        k = 1.0 / (res_m * scale)
        fi0 = ((y_max - y_m) / res_m - row0) / scale - 0.5
        fj0 = ((x_m - x_min) / res_m - col0) / scale - 0.5
        rng = K.cue_accumulate(cue, fi0, fj0, -s * k, -c * k, c * k, -s * k, self.offs, self.memory, self.weight,
                               self.acc, self._tmp)
        if not math.isfinite(float(self.acc.sum())):
            self.reset()  # a broken surface (never from the correlator): start again rather than carry NaN
            return False
        if not rng > 1e-12:
            return False  # flat: the family saw nothing, only the decay applied
        self.frames += 1
        self.seen = True
        return True

    def offset(self) -> tuple[float, float]:
        """(along, left) offset (m) of the sum's maximum; the grid corner when the sum is flat."""
        a = self.acc
        hi = float(a.max())
        if not self.seen or hi - float(a.min()) <= 1e-12:
            h = float(self.offs[-1])
            return h, h
        k = int(np.argmax(a))
        p, q = divmod(k, a.shape[1])
        return float(self.offs[p]), float(self.offs[q])

    def term(self, yaw_rad: float) -> tuple[float, float, float]:
        """The offset as variances along and across the heading, in the world frame: (xx, yy, xy) in m^2.

        ``R diag(u^2, v^2) R^T`` with (u, v) the (along, left) offset and R the heading's rotation. Not the
        outer product ``o o^T``: that ellipse is flat across o, so a little noise in the offset's direction
        leaves an error along the street far outside it (tests/test_track_cueoffset.py, planted drive).
        """
        u, v = self.offset()
        c, s = math.cos(yaw_rad), math.sin(yaw_rad)
        uu, vv = u * u, v * v
        return c * c * uu + s * s * vv, s * s * uu + c * c * vv, c * s * (uu - vv)
