"""Colour and sky-context features for the crown model (the "colour" models), beyond the texture set.

The texture features (``crown_model.FEATURES``) tell fine isotropic crowns from long-edged facades but
know colour only as HSV value, saturation and ExG - ExR. Measured on the even ids of the labelled
street-image set (docs/perception-real.md), four more planes carry most of what was left:

- ``astar``, ``bstar``: CIE Lab a* and b* (OpenCV's 8-bit Lab minus 128, roughly Lab units): dark
  olive and brown-green crowns against brick, render and grey stone, which ExG - ExR alone
  separates poorly once the crown is in shade or bare;
- ``skyabove``: the share of sky pixels from the top row down to the pixel in its column (a crown has
  sky above it and between its branches; a facade fills the column up to its roof line);
- ``nonsky31``: the share of non-sky pixels in the 31 x 31 window (a crown is a blob against the sky,
  a street canyon is mostly non-sky).

A model file whose feature list is ``FEATURES + EXTRA_FEATURES`` (``crown_model.COLOUR_FEATURES``)
asks the segmenter for these planes; it then holds them after the texture planes of ``tfeat``.
"""

from __future__ import annotations

import cv2
import numpy as np

from ..errors import InputError
from ._crown_kernels import colour_context

#: Extra feature planes, in order, after ``crown_model.FEATURES``.
EXTRA_FEATURES = ("astar", "bstar", "skyabove", "nonsky31")
#: Window (px of the segmentation raster) of ``nonsky31``.
NONSKY_WINDOW = 31


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

    def fill(self, lab: np.ndarray, sky: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Write the ``EXTRA_FEATURES`` planes into ``out``.

        Parameters
        ----------
        lab : ndarray (h, w, 3) uint8
            The raster in OpenCV's 8-bit Lab.
        sky : ndarray (h, w) uint8
            Sky mask of the rules (non-zero = sky), as used for ``nonsky9``.
        out : ndarray (len(EXTRA_FEATURES), h, w) float32
            Overwritten; returned.
        """
        if out.shape != (len(EXTRA_FEATURES),) + self.shape or out.dtype != np.float32:
            raise InputError(f"crown extras: out must be float32 {(len(EXTRA_FEATURES),) + self.shape}, "
                             f"got {out.dtype} {out.shape}")
        colour_context(lab, sky, self._count, out[0], out[1], out[2], self._nonsky)
        r = NONSKY_WINDOW
        cv2.blur(self._nonsky, (r, r), dst=out[3], borderType=cv2.BORDER_REPLICATE)
        return out


__all__ = ["EXTRA_FEATURES", "NONSKY_WINDOW", "CrownExtras"]
