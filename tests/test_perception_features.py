"""Segmentation features: vegetation indices by hand, kernels against plain NumPy / OpenCV references.

References: ExG = 2g - r - b on chromatic coordinates (Woebbecke et al. 1995); ExR = 1.4r - g and
ExG - ExR (Meyer and Neto 2008); HSV saturation/value as OpenCV's COLOR_BGR2HSV defines them; the
box mean against OpenCV's cv2.blur with BORDER_REPLICATE; the flood fill against
cv2.connectedComponents (4-connectivity).
"""

import cv2
import numpy as np
import pytest

from tinyloc.perception import _kernels as K
from tinyloc.perception.features import (box_mean, chromatic_coords, excess_green, excess_red, exg_minus_exr,
                                         gradient_energy, hsv_saturation_value)

# (B, G, R) pixels and their indices worked by hand:
#   R=60, G=120, B=20: sum 200, r=0.3, g=0.6, b=0.1 -> ExG = 1.2-0.3-0.1 = 0.8; ExR = 0.42-0.6 = -0.18; ExG-ExR = 0.98
#   R=200, G=100, B=100: sum 400, r=0.5, g=b=0.25 -> ExG = -0.25; ExR = 0.7-0.25 = 0.45; ExG-ExR = -0.70
#   grey 90: r=g=b=1/3 -> ExG = 0; ExR = 0.4/3 = 0.13333; ExG-ExR = -0.13333
#   black: all coordinates 0 by our convention -> 0, 0, 0
HAND = [((20, 120, 60), 0.8, -0.18, 0.98),
        ((100, 100, 200), -0.25, 0.45, -0.70),
        ((90, 90, 90), 0.0, 0.4 / 3, -0.4 / 3),
        ((0, 0, 0), 0.0, 0.0, 0.0)]


@pytest.mark.parametrize("bgr,exg,exr,exgr", HAND)
def test_vegetation_indices_hand_worked(bgr, exg, exr, exgr):
    px = np.array([[bgr]], np.uint8)
    assert excess_green(px)[0, 0] == pytest.approx(exg, abs=1e-12)
    assert excess_red(px)[0, 0] == pytest.approx(exr, abs=1e-12)
    assert exg_minus_exr(px)[0, 0] == pytest.approx(exgr, abs=1e-12)


def test_chromatic_coords_sum_to_one():
    rng = np.random.default_rng(1)
    img = rng.integers(1, 256, (20, 30, 3)).astype(np.uint8)
    r, g, b = chromatic_coords(img)
    assert np.max(np.abs(r + g + b - 1.0)) < 1e-12


def test_hsv_matches_opencv():
    rng = np.random.default_rng(2)
    img = rng.integers(0, 256, (40, 50, 3)).astype(np.uint8)
    s, v = hsv_saturation_value(img)
    hsv = cv2.cvtColor(img, cv2.COLOR_BGR2HSV)
    assert np.max(np.abs(v * 255 - hsv[..., 2])) < 1e-9
    assert np.max(np.abs(s * 255 - hsv[..., 1])) < 1.0  # OpenCV rounds S to 8 bits (fixed-point division)


def test_kernel_features_match_numpy(rng):
    img = rng.integers(0, 256, (30, 40, 3)).astype(np.uint8)
    lab = cv2.cvtColor(img, cv2.COLOR_BGR2Lab)
    hrow = np.linspace(10.0, 14.0, 40)
    feat = np.zeros((K.NF, 30, 40), np.float32)
    K.seg_features(img, lab, hrow, feat)
    s, v = hsv_saturation_value(img)
    assert np.max(np.abs(feat[K.F_V] - v)) < 1e-6
    assert np.max(np.abs(feat[K.F_S] - s)) < 1e-6
    assert np.max(np.abs(feat[K.F_EXGR] - exg_minus_exr(img))) < 1e-6
    assert np.max(np.abs(feat[K.F_BSTAR] - (lab[..., 2].astype(float) - 128))) == 0
    gray = img.astype(np.float64).sum(axis=2) / 3.0
    tx, ty = gradient_energy(gray, 1)
    assert np.max(np.abs(feat[K.F_GX] - tx)) < 1e-6 and np.max(np.abs(feat[K.F_GY] - ty)) < 1e-6
    rows = np.arange(30)[:, None]
    assert np.max(np.abs(feat[K.F_U] - (hrow[None, :] - rows) / 30.0)) < 1e-6


@pytest.mark.parametrize("r", [1, 2, 4])
def test_box_mean_kernel_vs_numpy_and_opencv(rng, r):
    a = rng.random((23, 31)).astype(np.float32)
    out = np.zeros_like(a)
    K.box_mean(a, r, np.zeros_like(a), out)
    ref = box_mean(a, 2 * r + 1)
    cvref = cv2.blur(a, (2 * r + 1, 2 * r + 1), borderType=cv2.BORDER_REPLICATE)
    assert np.max(np.abs(out - ref)) < 1e-5
    assert np.max(np.abs(out - cvref)) < 1e-5


def test_flood_from_top_vs_connected_components(rng):
    for _ in range(5):
        mask = (rng.random((40, 50)) < 0.55).astype(np.uint8)
        out = np.zeros_like(mask)
        K.flood_from_top(mask, out, np.zeros(mask.size, np.int32))
        n, lab = cv2.connectedComponents(mask, connectivity=4)
        keep = np.unique(lab[0][mask[0] > 0])
        ref = np.isin(lab, keep[keep > 0])
        assert np.array_equal(out.astype(bool), ref)


def test_sigmoid_table_close_to_exact():
    xs = np.linspace(-20.0, 20.0, 4001)
    err = max(abs(K._sig(x) - 1.0 / (1.0 + np.exp(-x))) for x in xs)
    assert err < 1e-5


def test_patch_median_is_lower_median(rng):
    lab = rng.integers(0, 256, (20, 20, 3)).astype(np.uint8)
    ref = np.zeros(3)
    K.patch_median_lab(lab, 5, 15, 2, 12, np.zeros((3, 256), np.int64), ref)
    patch = lab[5:15, 2:12].reshape(-1, 3)
    for c in range(3):
        v = np.sort(patch[:, c])
        assert ref[c] == v[(len(v) + 1) // 2 - 1]
