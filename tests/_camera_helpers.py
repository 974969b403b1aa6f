"""Synthetic checkerboard photos rendered with OpenCV's own projection (``cv2.projectPoints``).

Each square is projected as a densely sampled outline (so lens distortion bends its
edges correctly), filled at 4x resolution with sub-pixel vertices and averaged down
(area interpolation), which gives anti-aliased edges whose corners sit where
OpenCV's camera model says they must.
"""

import cv2
import numpy as np

SS = 4  # supersampling factor


def render_board(k, dist, rvec, tvec, size, *, cols, rows, square_m, blur_px=0.0, noise=0.0, rng=None,
                 margin_squares=1, background=110):
    """Render a (cols+1)x(rows+1)-square board (cols x rows inner corners) into a grey uint8 image.

    Board frame: inner corner (i, j) at (j * square_m, i * square_m, 0), as BoardSpec.object_points().
    ``size`` is (width, height). A white margin of ``margin_squares`` squares frames the board.
    """
    w, h = size
    k4 = np.array(k, float).copy()
    k4[0, 0] *= SS
    k4[1, 1] *= SS
    k4[0, 2] = (k4[0, 2] + 0.5) * SS - 0.5
    k4[1, 2] = (k4[1, 2] + 0.5) * SS - 0.5
    canvas = np.full((h * SS, w * SS), background, np.uint8)
    n_edge = 24

    def poly(x0, y0, x1, y1):
        t = np.linspace(0.0, 1.0, n_edge, endpoint=False)
        pts = np.concatenate([
            np.stack([x0 + (x1 - x0) * t, np.full_like(t, y0)], 1),
            np.stack([np.full_like(t, x1), y0 + (y1 - y0) * t], 1),
            np.stack([x1 - (x1 - x0) * t, np.full_like(t, y1)], 1),
            np.stack([np.full_like(t, x0), y1 - (y1 - y0) * t], 1)])
        p3 = np.concatenate([pts, np.zeros((len(pts), 1))], 1)
        uv, _ = cv2.projectPoints(p3, rvec, tvec, k4, dist)
        return np.round(uv.reshape(-1, 2) * 256).astype(np.int32)

    s = square_m
    m = margin_squares
    cv2.fillPoly(canvas, [poly(-s * (1 + m), -s * (1 + m), s * (cols + m), s * (rows + m))], 235,
                 lineType=cv2.LINE_8, shift=8)
    for i in range(-1, rows):
        for j in range(-1, cols):
            if (i + j) % 2 == 0:
                cv2.fillPoly(canvas, [poly(j * s, i * s, (j + 1) * s, (i + 1) * s)], 25, lineType=cv2.LINE_8, shift=8)
    img = cv2.resize(canvas, (w, h), interpolation=cv2.INTER_AREA)
    if blur_px > 0:
        img = cv2.GaussianBlur(img, (0, 0), blur_px)  # defocus
    if noise > 0:
        img = np.clip(img + rng.normal(0, noise, img.shape), 0, 255).astype(np.uint8)
    return img


def look_at(cam_pos, target, up=(0.0, 0.0, -1.0)):
    """(rvec, tvec) of a camera at ``cam_pos`` looking at ``target`` (board frame; board normal +z)."""
    c = np.asarray(cam_pos, float)
    z = np.asarray(target, float) - c
    z /= np.linalg.norm(z)
    x = np.cross(z, np.asarray(up, float))
    x /= np.linalg.norm(x)
    y = np.cross(z, x)
    r = np.stack([x, y, z])  # rows: camera axes in board coordinates -> cam_from_board
    rvec, _ = cv2.Rodrigues(r)
    return rvec, -r @ c
