"""``tinyloc bench render``: synthetic camera frames per second at 640x480, against two baselines in the same run.

The scene is a generated site (``tinyloc sim site`` seed 1, 3 x 3 blocks); the
poses are a simulated drive along its sidewalks. Figures (medians over the poses):

- ``render_ms`` / ``fps``: the full renderer (objects, textures, shadows, sky,
  noise, lens blur), with numba's default thread count, and ``render_1t_ms``
  with one thread;
- ``numpy_ground_ms``: a plain-NumPy ray cast of the ground plane alone
  (per-pixel rays, plane intersection, class raster lookup, palette colour): the
  obvious vectorised way to draw just the floor;
- ``remap_ms``: ``cv2.remap`` of a ground texture through a precomputed
  pixel -> ground map for the pose (bilinear, one call): a floor of what any
  per-pixel ground rendering costs, with no geometry at all.

``speedup_vs_numpy_ground`` = numpy_ground_ms / render_ms: how many times faster the
full scene renders than NumPy draws the bare ground. On a machine shared with
other work, wall-clock figures swing; ``cpu_1t_ms`` (process CPU time of a
one-thread render) is the steadier figure, and ``1000 / cpu_1t_ms`` is the frame
rate one idle core would give.
"""

from __future__ import annotations

import statistics
import time

import numpy as np

NAME = "render"
HELP = "synthetic camera: frames/s at 640x480 vs a NumPy ground-plane ray cast and cv2.remap"


def add_arguments(p):
    p.add_argument("--frames", type=int, default=15, help="poses to render (default 15)")
    p.add_argument("--seed", type=int, default=1, help="site seed (default 1)")
    p.add_argument("--width", type=int, default=640, help="image width (default 640; height is 3/4 of it)")


def _numpy_ground(rays, r, org, g, palette, gclass):
    d = rays.reshape(-1, 3) @ r.T
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(d[:, 2] < -1e-9, -org[2] / d[:, 2], np.inf)
    x = org[0] + t * d[:, 0]
    y = org[1] + t * d[:, 1]
    c = np.floor((x - g.x_min) / g.res_m)
    rr = np.floor((g.y_max - y) / g.res_m)
    ok = np.isfinite(t) & (c >= 0) & (c < g.data.shape[1]) & (rr >= 0) & (rr < g.data.shape[0])
    mat = np.zeros(len(t), dtype=np.uint8)
    mat[ok] = g.data[rr[ok].astype(np.int64), c[ok].astype(np.int64)]
    out = palette[gclass[mat]]
    out[~np.isfinite(t)] = (235, 206, 135)
    return out.reshape(rays.shape[0], rays.shape[1], 3)


def run(args) -> dict:
    import cv2
    import numba

    from ..classes import palette_bgr
    from ..sim.render import Renderer, RenderParams
    from ..sim.rover import drive
    from ..sim.runs import DEFAULT_CAMERA
    from ..sim.site import generate_site
    from ..sim.world import GROUND_CLASS

    w = int(args.width)
    cam = DEFAULT_CAMERA.scaled(w, w * 3 // 4)
    site = generate_site(int(args.seed))
    world = site.world
    t0 = time.perf_counter()
    rend = Renderer(world, cam, RenderParams(), sun_az_deg=140.0, sun_el_deg=40.0, seed=1)
    setup_ms = (time.perf_counter() - t0) * 1e3
    tr = drive(world, np.random.default_rng(2), 2.0 + args.frames * 0.8)
    ts = 1.5 + np.arange(args.frames) * 0.8
    st = tr.at(ts)
    poses = [(st["x"][k], st["y"][k], st["roll"][k], st["pitch"][k], st["yaw"][k]) for k in range(args.frames)]
    t0 = time.perf_counter()
    rend.render(poses[0])  # compile (or load the cache) and warm up
    warm_ms = (time.perf_counter() - t0) * 1e3

    def timed(fn, clock=time.perf_counter):
        out = []
        for k, p in enumerate(poses):
            a = clock()
            fn(k, p)
            out.append((clock() - a) * 1e3)
        return statistics.median(out)

    render_ms = timed(lambda k, p: rend.render(p, t_s=float(ts[k]), frame_index=k))
    pal = palette_bgr()
    g = rend._g
    nt = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        render_1t_ms = timed(lambda k, p: rend.render(p, t_s=float(ts[k]), frame_index=k))
        cpu_1t_ms = timed(lambda k, p: rend.render(p, t_s=float(ts[k]), frame_index=k), time.process_time)
        np_cpu_ms = timed(lambda k, p: _numpy_ground(rend.rays, *rend.camera_pose(p), g, pal, GROUND_CLASS),
                          time.process_time)
    finally:
        numba.set_num_threads(nt)
    np_ms = timed(lambda k, p: _numpy_ground(rend.rays, *rend.camera_pose(p), g, pal, GROUND_CLASS))
    # cv2.remap: a ground texture (the class raster coloured) through the pixel -> ground-cell map
    tex = pal[GROUND_CLASS[g.data]]
    maps = []
    for p in poses:
        r, org = rend.camera_pose(p)
        d = rend.rays.reshape(-1, 3) @ r.T
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(d[:, 2] < -1e-9, -org[2] / d[:, 2], 1e6)
        mx = ((org[0] + t * d[:, 0] - g.x_min) / g.res_m - 0.5).astype(np.float32).reshape(cam.height, cam.width)
        my = ((g.y_max - org[1] - t * d[:, 1]) / g.res_m - 0.5).astype(np.float32).reshape(cam.height, cam.width)
        maps.append(cv2.convertMaps(mx, my, cv2.CV_16SC2))
    dst = np.empty((cam.height, cam.width, 3), np.uint8)
    remap_ms = timed(lambda k, p: cv2.remap(tex, maps[k][0], maps[k][1], cv2.INTER_LINEAR, dst=dst))
    return {"image": f"{cam.width}x{cam.height}", "frames": len(poses), "threads": nt,
            "setup_ms": setup_ms, "first_frame_ms": warm_ms,
            "render_ms": render_ms, "fps": 1e3 / render_ms, "render_1t_ms": render_1t_ms, "fps_1t": 1e3 / render_1t_ms,
            "cpu_1t_ms": cpu_1t_ms, "numpy_ground_ms": np_ms, "numpy_ground_cpu_ms": np_cpu_ms,
            "remap_ms": remap_ms, "speedup_vs_numpy_ground": np_ms / render_ms,
            "cpu_speedup_1t_vs_numpy_ground": np_cpu_ms / cpu_1t_ms,
            "objects_in_range": rend.last_stats.get("objects_in_range", 0)}
