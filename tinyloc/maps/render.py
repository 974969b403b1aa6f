"""Colour previews of a packed map, with a legend, a scale bar and a north mark (tinyloc's own palette)."""

from __future__ import annotations

import math
from pathlib import Path

import cv2
import numpy as np

from ..classes import BY_NAME, UNKNOWN_COLOR_BGR
from ..errors import InputError

# Painting order, bottom to top: ground first, then what stands on it.
DRAW_ORDER = ("grass", "parking", "sidewalk", "road", "water", "building", "fence", "tree", "pole")
GROUND_BGR = (222, 228, 230)  # known, nothing mapped
MAX_CELLS = 8192              # per side of the rendered window
LEGEND_W = 190
STRIP = 256


def composite(cov: np.ndarray, known: np.ndarray, class_names) -> np.ndarray:
    """Blend (C, H, W) coverage into an (H, W, 3) uint8 BGR image; unknown cells get the unknown colour."""
    img = np.empty(cov.shape[1:] + (3,), dtype=np.float32)
    img[...] = GROUND_BGR
    order = [n for n in DRAW_ORDER if n in class_names] + [n for n in class_names if n not in DRAW_ORDER]
    for name in order:
        a = cov[list(class_names).index(name)][..., None]
        col = np.array(BY_NAME[name].color_bgr if name in BY_NAME else (255, 0, 255), dtype=np.float32)
        img += a * (col - img)
    img[known == 0] = UNKNOWN_COLOR_BGR
    return np.clip(np.rint(img), 0, 255).astype(np.uint8)


def render_preview(pm, *, center_xy=None, size_m=None, max_px: int = 1600) -> np.ndarray:
    """Render a packed map (or a square window of it) as a BGR image with a legend.

    Parameters
    ----------
    pm : PackedMap
    center_xy : (x, y), optional
        Window centre, ENU metres. Default: the whole map.
    size_m : float, optional
        Window side (m); needs ``center_xy``. Default 100 m when a centre is given.
    max_px : int
        Longest side of the map part of the image (pixels); small windows are enlarged.
    """
    m = pm.meta
    if center_xy is None:
        if size_m is not None:
            raise InputError("--size needs --center")
        row0, col0, h, w = 0, 0, m.rows, m.cols
    else:
        size_m = 100.0 if size_m is None else float(size_m)
        if not (math.isfinite(size_m) and size_m > 0):
            raise InputError(f"--size must be a positive number of metres, got {size_m!r}")
        n = max(1, int(round(size_m / m.res_m)))
        r, c = pm.cell_of(*center_xy)
        row0, col0, h, w = int(math.floor(r - n / 2)), int(math.floor(c - n / 2)), n, n
    if h > MAX_CELLS or w > MAX_CELLS:
        raise InputError(f"window of {h} x {w} cells is too large to render (limit {MAX_CELLS}); "
                         "use --center and --size")
    rgb = np.empty((h, w, 3), dtype=np.uint8)
    buf = np.empty((m.n_channels, min(STRIP, h), w), dtype=np.float32)
    known = np.empty((min(STRIP, h), w), dtype=np.uint8)
    for s in range(0, h, STRIP):
        k = min(STRIP, h - s)
        pm.read_window(row0 + s, col0, buf[:, :k], known_out=known[:k])
        rgb[s:s + k] = composite(buf[:, :k], known[:k], m.class_names)
    scale = max_px / max(h, w)
    if scale >= 1.0:
        f = max(1, int(scale))
        img = cv2.resize(rgb, (w * f, h * f), interpolation=cv2.INTER_NEAREST)
        px_per_m = f / m.res_m
    else:
        img = cv2.resize(rgb, (max(1, int(w * scale)), max(1, int(h * scale))), interpolation=cv2.INTER_AREA)
        px_per_m = img.shape[1] / (w * m.res_m)
    return _decorate(img, px_per_m, m.class_names, title=f"{pm.path.name}  {m.res_m:g} m/cell")


def _nice_length(target_m: float) -> float:
    e = 10.0 ** math.floor(math.log10(max(target_m, 1e-3)))
    for k in (5.0, 2.0, 1.0):
        if k * e <= target_m:
            return k * e
    return e


def _decorate(img: np.ndarray, px_per_m: float, class_names, *, title: str) -> np.ndarray:
    h, w = img.shape[:2]
    H = max(h, 40 + 22 * (len(class_names) + 1) + 90)
    canvas = np.full((H, w + LEGEND_W, 3), 250, dtype=np.uint8)
    canvas[:h, :w] = img
    font = cv2.FONT_HERSHEY_SIMPLEX
    x0 = w + 12
    cv2.putText(canvas, "legend", (x0, 24), font, 0.55, (30, 30, 30), 1, cv2.LINE_AA)
    y = 44
    entries = [(n, BY_NAME[n].color_bgr if n in BY_NAME else (255, 0, 255)) for n in class_names]
    entries.append(("unknown", UNKNOWN_COLOR_BGR))
    for name, col in entries:
        cv2.rectangle(canvas, (x0, y - 12), (x0 + 18, y + 4), tuple(int(v) for v in col), -1)
        cv2.rectangle(canvas, (x0, y - 12), (x0 + 18, y + 4), (60, 60, 60), 1)
        cv2.putText(canvas, name, (x0 + 26, y), font, 0.45, (30, 30, 30), 1, cv2.LINE_AA)
        y += 22
    # Scale bar: a round length near a quarter of the image width.
    L = _nice_length(min(0.25 * w, LEGEND_W - 30) / px_per_m)
    bar = max(1, int(round(L * px_per_m)))
    y += 14
    cv2.rectangle(canvas, (x0, y), (x0 + bar, y + 6), (30, 30, 30), -1)
    cv2.putText(canvas, f"{L:.3g} m", (x0, y + 24), font, 0.45, (30, 30, 30), 1, cv2.LINE_AA)
    # North mark: map rows run south, so north is up.
    y += 44
    cv2.arrowedLine(canvas, (x0 + 9, y + 26), (x0 + 9, y), (30, 30, 30), 2, cv2.LINE_AA, tipLength=0.35)
    cv2.putText(canvas, "N", (x0 + 24, y + 14), font, 0.5, (30, 30, 30), 1, cv2.LINE_AA)
    cv2.putText(canvas, title[:28], (x0, H - 10), font, 0.35, (90, 90, 90), 1, cv2.LINE_AA)
    return canvas


def write_preview(pm, out_path, **kw) -> tuple:
    """Render (see :func:`render_preview`) and write a PNG; returns the image shape."""
    img = render_preview(pm, **kw)
    p = Path(out_path)
    ok = False
    try:
        ok = cv2.imwrite(str(p), img)
    except cv2.error:
        ok = False
    if not ok:
        raise InputError(f"{p}: cannot write the image (check the directory and the extension, e.g. .png)")
    return img.shape
