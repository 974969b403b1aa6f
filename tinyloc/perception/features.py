"""Hand-crafted per-pixel features for the classical segmenter (plain NumPy; the kernels mirror these).

Every feature is a published or common-practice colour or texture measure, with its
formula here so it can be checked by hand:

- chromatic coordinates: r = R / (R + G + B), g = G / (R + G + B), b = B / (R + G + B)
  (0 where R + G + B = 0);
- ExG = 2 g - r - b, the excess-green index (Woebbecke et al. 1995);
- ExR = 1.4 r - g, the excess-red index, and ExG - ExR, the excess-green-minus-excess-red
  index whose zero is the vegetation threshold (Meyer and Neto 2008);
- HSV saturation S = (max - min) / max and value V = max / 255 (Smith's hexcone model, as OpenCV's
  ``COLOR_BGR2HSV`` computes them, here as 0..1 floats);
- CIE L*a*b* from OpenCV's 8-bit conversion (a* and b* offset by 128): b* < 0 is bluish (sky);
- gradient energy: the local mean, over a square window, of central-difference gradient magnitudes
  |dI/dx| and |dI/dy| of the grey level (0..1 per pixel step); vertical edges give large |dI/dx|.

References
----------
1. D. M. Woebbecke, G. E. Meyer, K. Von Bargen, D. A. Mortensen, "Color indices for weed identification
   under various soil, residue, and lighting conditions", Transactions of the ASAE 38(1):259-269, 1995.
2. G. E. Meyer, J. C. Neto, "Verification of color vegetation indices for automated crop imaging
   applications", Computers and Electronics in Agriculture 63(2):282-293, 2008.
"""

from __future__ import annotations

import numpy as np


def chromatic_coords(bgr) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Chromatic coordinates (r, g, b) of BGR pixels, each R/(R+G+B) etc.; 0 for black pixels."""
    f = np.asarray(bgr, dtype=np.float64)
    b_, g_, r_ = f[..., 0], f[..., 1], f[..., 2]
    tot = r_ + g_ + b_
    safe = np.where(tot > 0, tot, 1.0)
    k = np.where(tot > 0, 1.0, 0.0)
    return r_ / safe * k, g_ / safe * k, b_ / safe * k


def excess_green(bgr) -> np.ndarray:
    """ExG = 2g - r - b on chromatic coordinates (Woebbecke et al. 1995); range [-1, 2]."""
    r, g, b = chromatic_coords(bgr)
    return 2.0 * g - r - b


def excess_red(bgr) -> np.ndarray:
    """ExR = 1.4r - g on chromatic coordinates (Meyer and Neto 2008); range [-1, 1.4]."""
    r, g, _ = chromatic_coords(bgr)
    return 1.4 * r - g


def exg_minus_exr(bgr) -> np.ndarray:
    """ExG - ExR (Meyer and Neto 2008); > 0 marks vegetation."""
    return excess_green(bgr) - excess_red(bgr)


def hsv_saturation_value(bgr) -> tuple[np.ndarray, np.ndarray]:
    """HSV saturation (max - min) / max and value max / 255 (0..1 each; S = 0 for black)."""
    f = np.asarray(bgr, dtype=np.float64)
    mx = f.max(axis=-1)
    mn = f.min(axis=-1)
    s = np.where(mx > 0, (mx - mn) / np.where(mx > 0, mx, 1.0), 0.0)
    return s, mx / 255.0


def gradient_energy(gray, window: int) -> tuple[np.ndarray, np.ndarray]:
    """Local mean of |dI/dx| and |dI/dy| (central differences, grey levels 0..1) over ``window`` x ``window``.

    Borders: the difference is 0 on the first and last column (row); the window is clamped at the
    image edge (edge pixels repeated), as OpenCV's ``BORDER_REPLICATE`` does.
    """
    g = np.asarray(gray, dtype=np.float64) / 255.0
    gx = np.zeros_like(g)
    gy = np.zeros_like(g)
    gx[:, 1:-1] = np.abs(g[:, 2:] - g[:, :-2]) * 0.5
    gy[1:-1, :] = np.abs(g[2:, :] - g[:-2, :]) * 0.5
    return box_mean(gx, window), box_mean(gy, window)


def box_mean(a, window: int) -> np.ndarray:
    """Mean over a ``window`` x ``window`` square (odd), edge pixels repeated beyond the border."""
    r = window // 2
    p = np.pad(np.asarray(a, dtype=np.float64), r, mode="edge")
    c = np.cumsum(np.cumsum(np.pad(p, ((1, 0), (1, 0))), axis=0), axis=1)
    h, w = np.shape(a)
    k = 2 * r + 1
    s = c[k:k + h, k:k + w] - c[0:h, k:k + w] - c[k:k + h, 0:w] + c[0:h, 0:w]
    return s / (k * k)
