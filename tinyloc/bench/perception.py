"""``tinyloc bench perception``: one 640 x 480 frame through segmentation and projection, against a baseline.

tinyloc's path (``perception_ms``): ``Perception.process`` on a BGR frame with a gravity vector, i.e.
area resize to 160 x 120, colour conversion, features, scores, sky flood fill, horizon, per-frame
cell lookup (the gravity tilts the base), ground gather and object-foot scatter into a 64 x 64 grid.
Also timed apart: the segmentation alone (``segment_ms``) and the projection alone (``project_ms``),
and the whole path with the crown model off (``rule_crown_ms``: the bright-mix crown rule instead of
the linear texture score, which costs the crown features' box means).

Baseline, same run (``baseline_ms``): the classic inverse-perspective warp, a plain
``cv2.warpPerspective`` of the full-resolution frame onto the ground plane at 5 cm per pixel
over the same 32 m x 32 m (640 x 640 output, bilinear) - no segmentation at all.
``speedup`` = baseline_ms / perception_ms. ``*_cpu_ms``: the same as process CPU time, which a
busy machine disturbs less than wall time (OpenCV's warp may use a second thread; its CPU time then
exceeds its wall time).

The frame: a seeded procedural street picture (sky, facades with windows, road with noise), so the
figure is reproducible; the work per frame does not depend on the picture's content beyond the flood fill.
"""

from __future__ import annotations

import math

import numpy as np

from . import median_ms

NAME = "perception"
HELP = "segmentation + overhead projection of a 640x480 frame vs a full-frame cv2.warpPerspective"
DESCRIPTION = __doc__


def add_arguments(p):
    p.add_argument("--repeat", type=int, default=50, help="timed repetitions (median; default 50)")
    p.add_argument("--width", type=int, default=160, help="segmentation width in pixels (default 160)")
    p.add_argument("--preset", default="street", help="segmentation preset (default street)")


def _median_cpu_ms(fn, repeat, warmup=3):
    """Median process CPU time of ``fn()`` (ms): less disturbed than wall time when other jobs share the cores."""
    import statistics
    import time

    for _ in range(warmup):
        fn()
    ts = []
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        ts.append((time.process_time() - t0) * 1e3)
    return statistics.median(ts)


def _camera():
    from ..camera.model import CameraModel, Mount

    return CameraModel(640, 480, 480.0, 480.0, 319.5, 239.5, (-0.05, 0.01, 0.0, 0.0, 0.0), Mount(0.8, 8.0))


def _frame(cam):
    """A procedural street picture: sky, facades with windows, road with noise (seeded)."""
    rng = np.random.default_rng(5)
    h, w = cam.height, cam.width
    img = np.zeros((h, w, 3), np.float32)
    rows = np.arange(h)[:, None]
    img[:] = (225, 190, 150)
    img[: h // 2] -= (rows[: h // 2] * 0.15)[..., None]
    for x0 in range(0, w, 90):
        top = int(rng.integers(60, 170))
        img[top:h // 2 + 20, x0:x0 + 84] = rng.integers(60, 170, 3)
        for yy in range(top + 10, h // 2, 22):
            for xx in range(x0 + 8, x0 + 76, 18):
                img[yy:yy + 10, xx:xx + 9] = (40, 45, 55)
    img[h // 2 + 20:] = (92, 94, 96)
    img += rng.normal(0, 4, img.shape)
    return np.clip(img, 0, 255).astype(np.uint8), "procedural"


def run(args) -> dict:
    import cv2

    from ..perception.pipeline import Perception, PerceptionParams
    import dataclasses

    from ..perception.segment import preset

    cam = _camera()
    sp = dataclasses.replace(preset(args.preset), width=int(args.width))
    perc = Perception(cam, PerceptionParams(segment=sp))
    perc_rule = Perception(cam, PerceptionParams(segment=dataclasses.replace(sp, crown_model="")))
    grid = perc.new_grid()
    frame, source = _frame(cam)
    g = (0.25, -0.1, 9.80)
    st = perc.process(frame, g, grid)
    t_all = median_ms(lambda: perc.process(frame, g, grid), repeat=args.repeat, warmup=3)
    t_rule = median_ms(lambda: perc_rule.process(frame, g, grid), repeat=args.repeat, warmup=3)
    perc.process(frame, g, grid)
    t_seg = median_ms(lambda: perc.segmenter.run(frame, perc.horizon), repeat=args.repeat, warmup=3)
    level = perc._level
    t_proj = median_ms(lambda: perc.projector.project(perc.probs, perc.labels, level, perc.horizon, grid),
                       repeat=args.repeat, warmup=3)
    # Baseline: ground-plane homography (no distortion) image -> 640 x 640 ground raster at 5 cm.
    res = 0.05
    ground = np.array([[4.0, -3.0, 0.0], [4.0, 3.0, 0.0], [20.0, -8.0, 0.0], [20.0, 8.0, 0.0]])
    r_bc, t_bc = cam.mount.base_from_camera()
    uv = cam.project_optical((ground - t_bc) @ r_bc)
    dst = np.stack([ground[:, 0] / res, (16.0 - ground[:, 1]) / res], 1)
    hm = cv2.getPerspectiveTransform(uv.astype(np.float32), dst.astype(np.float32))
    out = np.empty((640, 640, 3), np.uint8)
    t_base = median_ms(lambda: cv2.warpPerspective(frame, hm, (640, 640), dst=out, flags=cv2.INTER_LINEAR),
                       repeat=args.repeat, warmup=3)
    cpu_all = _median_cpu_ms(lambda: perc.process(frame, g, grid), args.repeat)
    cpu_base = _median_cpu_ms(lambda: cv2.warpPerspective(frame, hm, (640, 640), dst=out, flags=cv2.INTER_LINEAR),
                              args.repeat)
    return {"frame": f"{cam.width}x{cam.height} ({source})", "segment_raster": "x".join(map(str, perc.segmenter.size)),
            "grid": f"{grid.shape[0]}x{grid.shape[1]} @ {grid.res_m} m", "status": st,
            "preset": args.preset, "crown_model": sp.crown_model or "off",
            "perception_ms": t_all, "rule_crown_ms": t_rule, "segment_ms": t_seg, "project_ms": t_proj, "baseline_ms": t_base,
            "speedup": t_base / t_all if t_all > 0 else math.nan, "perception_cpu_ms": cpu_all,
            "baseline_cpu_ms": cpu_base, "goal_ms": 8.0}
