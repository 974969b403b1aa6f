"""Slow, obviously-right references for the correlator tests (plain NumPy), and small fixtures."""

from __future__ import annotations

import math

import numpy as np

from tinyloc.classes import NUM_MAP_CLASSES
from tinyloc.correlate.scoring import ScoringModel
from tinyloc.correlate.synth import SyntheticBev


def rotate_template(feat, yaw, origin_row, origin_col, P):
    """The rotated grid on the (2P+1)^2 map lattice around the robot cell, by the definition.

    Canvas (u, v) is the map offset (du, dv) = (u - P, v - P) (rows south, cols east). The
    body point there is rot(-yaw) (east, north) with east = dv, north = -du; the grid is
    sampled bilinearly at that point (cell centres at +0.5; zero outside the grid).
    """
    F, h, w = feat.shape
    n = 2 * P + 1
    out = np.zeros((F, n, n))
    c, s = math.cos(yaw), math.sin(yaw)
    for u in range(n):
        for v in range(n):
            east, north = v - P, -(u - P)
            xf = c * east + s * north
            yl = -s * east + c * north
            rr = origin_row - yl - 0.5
            cc = origin_col + xf - 0.5
            r0, c0 = math.floor(rr), math.floor(cc)
            fr, fc = rr - r0, cc - c0
            for dr, dc, wgt in ((0, 0, (1 - fr) * (1 - fc)), (0, 1, (1 - fr) * fc), (1, 0, fr * (1 - fc)),
                                (1, 1, fr * fc)):
                r, q = r0 + dr, c0 + dc
                if 0 <= r < h and 0 <= q < w:
                    out[:, u, v] += wgt * feat[:, r, q]
    return out


def direct_score(canvas, G, i, j):
    """sum over f, u, v of canvas[f, u, v] * G[f, i + u - P, j + v - P], map zero outside the window."""
    F, n, _ = canvas.shape
    P = n // 2
    H, W = G.shape[1:]
    acc = 0.0
    for u in range(n):
        gi = i + u - P
        if not 0 <= gi < H:
            continue
        v0, v1 = max(0, P - j), min(n, W - j + P)
        if v1 > v0:
            acc += float(np.sum(canvas[:, u, v0:v1] * G[:, gi, j + v0 - P:j + v1 - P]))
    return acc


def direct_volume(canvas, G):
    """All window cells at once for one heading (sliding windows over the zero-padded map)."""
    from numpy.lib.stride_tricks import sliding_window_view
    F, n, _ = canvas.shape
    P = n // 2
    H, W = G.shape[1:]
    Gp = np.zeros((F, H + 2 * P, W + 2 * P))
    Gp[:, P:P + H, P:P + W] = G
    sw = sliding_window_view(Gp, (n, n), axis=(1, 2))
    return np.einsum("fijuv,fuv->ij", sw, canvas)


def plain_model(classes=(0, 1, 3), temperature=1.0) -> ScoringModel:
    """A scoring model whose features are raw classes against the same raw map classes."""
    C = NUM_MAP_CLASSES
    bw = np.zeros((len(classes), C + 2), np.float32)
    mw = np.zeros((len(classes), C), np.float32)
    for f, c in enumerate(classes):
        bw[f, c] = 1.0
        mw[f, c] = 1.0
    return ScoringModel(tuple(f"c{c}" for c in classes), bw, mw, (0.0,) * len(classes), temperature,
                        {"weights": "test"})


def random_bev(rng, shape=(64, 64), origin=(32.0, 0.0), res_m=0.5) -> SyntheticBev:
    h, w = shape
    ev = rng.uniform(size=(NUM_MAP_CLASSES, h, w)).astype(np.float32)
    return SyntheticBev(ev, rng.uniform(size=(h, w)).astype(np.float32), rng.uniform(size=(h, w)).astype(np.float32),
                        res_m, origin[0], origin[1])


def blob_map(rng, size, n_blobs=60):
    """Random smooth blobs in every channel: a map without symmetries (for convention checks)."""
    import cv2
    out = np.zeros((NUM_MAP_CLASSES, size, size), np.float32)
    for c in range(NUM_MAP_CLASSES):
        for _ in range(n_blobs):
            x, y = rng.uniform(0, size, size=2)
            cv2.circle(out[c], (int(x), int(y)), int(rng.uniform(1, 6)), 1.0, -1)
        out[c] = cv2.GaussianBlur(out[c], (0, 0), 1.0)
    return np.clip(out, 0.0, 1.0)
