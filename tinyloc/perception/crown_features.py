"""Colour and sky-context features for the crown model (the "colour" models), beyond the texture set.

The texture features (``crown_model.FEATURES``) tell fine isotropic crowns from long-edged facades but
know colour only as HSV value, saturation and ExG - ExR. Measured on the even ids of the labelled
street-image set (docs/perception-real.md), four more planes gained the most:

- ``astar``, ``bstar``: CIE Lab a* and b* (OpenCV's 8-bit Lab minus 128, roughly Lab units): dark
  olive and brown-green crowns against brick, render and grey stone, which ExG - ExR alone
  separates poorly once the crown is in shade or bare;
- ``skyabove``: the share of sky pixels from the top row down to the pixel in its column (a crown has
  sky above it and between its branches; a facade fills the column up to its roof line);
- ``nonsky31``: the share of non-sky pixels in the 31 x 31 window (a crown is a blob against the sky,
  a street canyon is mostly non-sky).

and the products of the height above the horizon ``u`` with twelve planes (``u_astar``, ``u_bstar``,
``u_skyabove`` and ``u_`` times ``v``, ``s``, ``exgr``, ``coh9``, ``fr``, ``logen9``, ``var9``,
``axis9``, ``nonsky9`` of the texture set). A linear score weighs each feature the same at every
height; with the products a weight may change linearly with height, so "dark and smooth" can mean
something else near the horizon (vehicles, shop fronts) than high up (a crown in shade). They added
0.018 vegetation IoU on the even ids in the trial without simulated drives, 0.007 as shipped.

A model file whose feature list is ``FEATURES + EXTRA_FEATURES`` (``crown_model.COLOUR_FEATURES``)
asks the segmenter for these planes; it then holds them after the texture planes of ``tfeat``.

The "context" models score twice (auto-context): a colour model gives the smoothed crown map, and a
second score reads the colour planes plus five planes of that map's layout (``CONTEXT_FEATURES``):
its 7 x 7, 15 x 15 and 31 x 31 window means, its mean over the column above the pixel and over the
pixel's row. A crown is a blob of high scores with sky around it; a facade a band across the street.
"""

from __future__ import annotations

import cv2
import numpy as np

from ..errors import InputError
from . import _kernels as K
from ._crown_kernels import colour_context, column_row_means

#: Planes of the texture set (``crown_model.FEATURES``) multiplied by the height ``u``, by kernel index.
_U_TEXTURE = (("v", K.T_V), ("s", K.T_S), ("exgr", K.T_EXGR), ("coh9", K.T_COH9), ("fr", K.T_FR),
              ("logen9", K.T_LOGEN9), ("var9", K.T_VAR9), ("axis9", K.T_AXIS9), ("nonsky9", K.T_NONSKY9))
_OWN = ("astar", "bstar", "skyabove", "nonsky31")
#: Extra feature planes, in order, after ``crown_model.FEATURES``.
EXTRA_FEATURES = _OWN + ("u_astar", "u_bstar", "u_skyabove") + tuple("u_" + n for n, _ in _U_TEXTURE)
#: Window (px of the segmentation raster) of ``nonsky31``.
NONSKY_WINDOW = 31
#: Planes of the first crown map read by the second score of a "context" model, in order.
CONTEXT_FEATURES = ("crown7", "crown15", "crown31", "crown_col", "crown_row")
_CONTEXT_WINDOWS = (7, 15, 31)


class CrownExtras:
    """Workspace filling the extra planes for one raster size (buffers allocated once).

    Parameters
    ----------
    h, w : int
        Segmentation raster size (rows, columns).
    """

    def __init__(self, h: int, w: int):
        self.shape = (int(h), int(w))
        self._count = np.zeros(int(w), np.int64)
        self._nonsky = np.zeros((int(h), int(w)), np.float32)

    def fill(self, lab: np.ndarray, sky: np.ndarray, tfeat: np.ndarray) -> np.ndarray:
        """Write the ``EXTRA_FEATURES`` planes into ``tfeat[NT:]`` (the texture planes ``tfeat[:NT]``
        must be filled already: the height products read them).

        Parameters
        ----------
        lab : ndarray (h, w, 3) uint8
            The raster in OpenCV's 8-bit Lab.
        sky : ndarray (h, w) uint8
            Sky mask of the rules (non-zero = sky), as used for ``nonsky9``.
        tfeat : ndarray (NT + len(EXTRA_FEATURES), h, w) float32
            The crown features; planes from ``NT`` on are overwritten. Returned.
        """
        nt, ne = K.NT, len(EXTRA_FEATURES)
        if tfeat.ndim != 3 or tfeat.shape[0] < nt + ne or tfeat.shape[1:] != self.shape or \
                tfeat.dtype != np.float32:
            raise InputError(f"crown extras: tfeat must be float32 (>= {nt + ne}, {self.shape[0]}, "
                             f"{self.shape[1]}), got {tfeat.dtype} {tfeat.shape}")
        colour_context(lab, sky, self._count, tfeat[nt], tfeat[nt + 1], tfeat[nt + 2], self._nonsky)
        r = NONSKY_WINDOW
        cv2.blur(self._nonsky, (r, r), dst=tfeat[nt + 3], borderType=cv2.BORDER_REPLICATE)
        u = tfeat[K.T_U]
        k = nt + len(_OWN)
        for src in (nt, nt + 1, nt + 2):  # a*, b*, sky above
            np.multiply(u, tfeat[src], out=tfeat[k])
            k += 1
        for _, src in _U_TEXTURE:
            np.multiply(u, tfeat[src], out=tfeat[k])
            k += 1
        return tfeat


class CrownContext:
    """Workspace filling the ``CONTEXT_FEATURES`` planes from a crown map (no buffers of its own).

    Parameters
    ----------
    h, w : int
        Segmentation raster size (rows, columns).
    """

    def __init__(self, h: int, w: int):
        self.shape = (int(h), int(w))

    def fill(self, crown: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Write the context planes of ``crown`` (h, w) float32 into ``out`` (5, h, w) float32; returned."""
        if out.shape != (len(CONTEXT_FEATURES),) + self.shape or out.dtype != np.float32:
            raise InputError(f"crown context: out must be float32 {(len(CONTEXT_FEATURES),) + self.shape}, "
                             f"got {out.dtype} {out.shape}")
        for k, r in enumerate(_CONTEXT_WINDOWS):
            cv2.blur(crown, (r, r), dst=out[k], borderType=cv2.BORDER_REPLICATE)
        column_row_means(crown, out[3], out[4])
        return out


__all__ = ["EXTRA_FEATURES", "CONTEXT_FEATURES", "NONSKY_WINDOW", "CrownExtras", "CrownContext"]
