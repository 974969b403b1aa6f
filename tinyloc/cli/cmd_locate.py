"""``tinyloc locate``: the pose of one image, with its uncertainty, near a rough position."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

NAME = "locate"
HELP = "find the pose of one camera image on the map near a rough position"
DESCRIPTION = """\
Segment one image, project it to a bird's-eye grid, and match it against the map over every
heading and every position within RADIUS_M of --near (default 50 m). Prints the best pose, its
1-sigma uncertainty from the posterior over all poses (a second, nearly as good place makes it
large, on purpose), the quality flag and the top modes, and writes the likelihood map as a PNG
(brighter = more likely, best pose circled, map drawn faintly underneath).

One image is often ambiguous (a straight street looks the same every few metres): the live
loop (tinyloc run) fuses many frames with odometry; this command shows what one frame says.

examples:
  tinyloc locate frame.png --map site.tlm --camera camera.toml --near 13.0061,122.9992
  tinyloc locate frame.png --map site.tlm --camera camera.toml --near 13.0061,122.9992,30 --gravity 0.1,0.0,9.8 --json
"""


def register(p):
    p.add_argument("image", metavar="IMAGE", help="camera image (PNG/JPEG, the calibration's size)")
    p.add_argument("--map", required=True, metavar="SITE.tlm", help="packed site map")
    p.add_argument("--camera", required=True, metavar="camera.toml", help="camera calibration")
    p.add_argument("--near", required=True, metavar="LAT,LON[,RADIUS_M]",
                   help="rough position (decimal degrees) and search radius (m, default 50)")
    p.add_argument("--gravity", metavar="FX,FY,FZ", help="accelerometer reading in the base frame (m/s^2, "
                                                          "level = 0,0,9.81); default: the fixed mount only")
    p.add_argument("-o", "--out", metavar="PNG", help="likelihood map file (default IMAGE.likelihood.png)")
    p.add_argument("--config", metavar="loop.toml", help="loop configuration (tempering, headings)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", help="override one value")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=main)


def _gravity(text):
    from ..errors import InputError

    if text is None:
        return None
    try:
        g = [float(v) for v in text.split(",")]
    except ValueError:
        g = []
    if len(g) != 3 or not all(math.isfinite(v) for v in g):
        raise InputError(f"--gravity {text!r}: expected FX,FY,FZ in m/s^2, e.g. 0,0,9.81")
    return g


def locate(image, pm, camera, lat, lon, radius_m, cfg, gravity=None):
    """Single-image pose: returns (PoseEstimate, posterior max over heading (H, W), window row0, col0)."""
    import numpy as np

    from ..correlate import Correlator, CorrelatorParams
    from ..perception.pipeline import Perception
    from ..runtime.loop import PoseEstimate
    from ..track.gridfilter import GridFilter, LikelihoodVolume, MapGeometry, TrackParams
    from dataclasses import replace

    m = pm.meta
    geom = MapGeometry(float(m.x_min), float(m.y_max), float(m.res_m))
    x0, y0 = pm.frame.to_enu_xy(lat, lon)
    perc = Perception(camera, warm_up=False)
    grid = perc.new_grid()
    status = perc.process(image, gravity, grid)
    nan3 = np.full((3, 3), np.nan)
    if status != "ok":
        return PoseEstimate(0.0, math.nan, math.nan, math.nan, math.nan, math.nan, nan3, "no-fix", [], 0.0,
                            status), None, 0, 0
    n = int(2 * math.ceil(radius_m / geom.res_m)) + 8
    n += n % 2
    A = cfg.match.headings
    corr = Correlator(CorrelatorParams(n_headings=A, window_shape=(n, n), res_m=geom.res_m,
                                       bev_shape=tuple(grid.visible.shape), origin_row=float(grid.origin_row),
                                       origin_col=float(grid.origin_col)))
    r, c = geom.cell_of(x0, y0)
    row0, col0 = int(math.floor(r)) - n // 2, int(math.floor(c)) - n // 2
    win = np.zeros((m.n_channels if hasattr(m, "n_channels") else 9, n, n), np.float32)
    pm.read_window(row0, col0, win)
    corr.set_map(win)
    vol = np.zeros((A, n, n), np.float32)
    res = corr.search(grid, volume=vol)
    if not res.ok:
        return PoseEstimate(0.0, math.nan, math.nan, math.nan, math.nan, math.nan, nan3, "no-fix", [], 0.0,
                            res.status), None, row0, col0
    # outside the search disc: as unlikely as the worst pose seen
    ii, jj = np.mgrid[0:n, 0:n]
    out = ((row0 + ii + 0.5 - r) ** 2 + (col0 + jj + 0.5 - c) ** 2) * geom.res_m ** 2 > radius_m ** 2
    vol[:, out] = vol.min()
    tp = replace(cfg.track, window_cells=n, headings=A, floor=0.0)
    f = GridFilter(geom, tp)
    f.row0, f.col0 = row0, col0
    f.update(LikelihoodVolume(vol, row0, col0, 0.0, 2 * math.pi / A))
    est = f.estimate()
    post = np.zeros((n, n), np.float32)
    from ..track import _kernels as K

    K.marginal_xy(f.bel, f.active, f._m2, f._best, f._bestv)
    post[:] = f._m2
    ok = est.sigma_xy_m <= tp.track_sigma_m and math.degrees(est.sigma_yaw_rad) <= tp.track_sigma_deg
    quality = "tracking" if ok else "searching"
    la, lo = pm.frame.to_latlon(est.x, est.y)
    pose = PoseEstimate(0.0, est.x, est.y, est.yaw, la, lo, est.cov, quality, est.modes, 0.0,
                        "ok" if ok else "ambiguous: one image does not pin the pose down")
    return pose, post, row0, col0


def write_likelihood_png(path, post, win, pose, geom, row0, col0):
    """Posterior (max over heading) as a colour image over a faint drawing of the map."""
    import cv2
    import numpy as np

    from ..classes import palette_bgr

    n = post.shape[0]
    base = np.zeros((n, n, 3), np.float32)
    pal = palette_bgr()[:win.shape[0]].astype(np.float32)
    for ch in range(win.shape[0]):
        base += win[ch][:, :, None] * pal[ch][None, None, :]
    base = np.clip(base * 0.35, 0, 255)
    p = post / max(float(post.max()), 1e-30)
    heat = cv2.applyColorMap((255 * p).astype(np.uint8), cv2.COLORMAP_INFERNO).astype(np.float32)
    a = np.clip(2.0 * p, 0.0, 1.0)[:, :, None]
    img = (base * (1 - a) + heat * a).astype(np.uint8)
    scale = max(1, 512 // n)
    img = cv2.resize(img, (n * scale, n * scale), interpolation=cv2.INTER_NEAREST)
    if math.isfinite(pose.x):
        rr, cc = geom.cell_of(pose.x, pose.y)
        centre = (int((cc - col0) * scale), int((rr - row0) * scale))
        cv2.circle(img, centre, 6 * scale // 2 + 4, (255, 255, 255), 1, cv2.LINE_AA)
        tip = (int(centre[0] + 14 * math.cos(pose.yaw)), int(centre[1] - 14 * math.sin(pose.yaw)))
        cv2.line(img, centre, tip, (255, 255, 255), 1, cv2.LINE_AA)
    if not cv2.imwrite(str(path), img):
        from ..errors import InputError

        raise InputError(f"{path}: cannot write the likelihood map")


def main(args) -> int:
    import cv2
    import numpy as np

    from ..camera.model import load_camera
    from ..errors import InputError
    from ..frames import yaw_to_heading_deg
    from ..geo import parse_latlon
    from ..maps.packfile import PackedMap
    from ..runtime.config import load_config
    from ..track.gridfilter import MapGeometry

    cfg = load_config(args.config, args.set)
    near = parse_latlon(args.near, what="--near")
    radius = near[2] if len(near) == 3 else 50.0
    if not 5.0 <= radius <= 500.0:
        raise InputError(f"--near: radius {radius} m must be within 5 .. 500 m")
    cam = load_camera(args.camera)
    img = cv2.imread(str(args.image), cv2.IMREAD_COLOR)
    if img is None:
        if not Path(args.image).is_file():
            raise InputError(f"{args.image}: no such file")
        raise InputError(f"{args.image}: not a readable image (PNG or JPEG)")
    pm = PackedMap.open(args.map)
    pose, post, row0, col0 = locate(img, pm, cam, near[0], near[1], radius, cfg, _gravity(args.gravity))
    m = pm.meta
    geom = MapGeometry(float(m.x_min), float(m.y_max), float(m.res_m))
    out = args.out or (Path(args.image).name + ".likelihood.png")
    if post is not None:
        win = np.zeros((9, post.shape[0], post.shape[1]), np.float32)
        pm.read_window(row0, col0, win)
        write_likelihood_png(out, post, win, pose, geom, row0, col0)
    if args.json:
        d = pose.as_dict()
        d.pop("t", None)
        d.pop("frame_ms", None)
        d["likelihood_png"] = str(out) if post is not None else None
        if math.isfinite(pose.x):
            d["heading_deg"] = yaw_to_heading_deg(pose.yaw)
            d["sigma_xy_m"] = float(math.sqrt(max(np.linalg.eigvalsh(pose.cov[:2, :2]).max(), 0.0)))
            d["sigma_heading_deg"] = float(math.degrees(math.sqrt(max(pose.cov[2, 2], 0.0))))
        print(json.dumps(d))
        return 0
    if not math.isfinite(pose.x):
        print(f"no pose: {pose.status}")
        print(f"quality     {pose.quality}")
        return 1
    ev, evec = np.linalg.eigh(pose.cov[:2, :2])
    print(f"pose        x {pose.x:.2f} m  y {pose.y:.2f} m  (lat {pose.lat:.7f}, lon {pose.lon:.7f})")
    print(f"heading     {yaw_to_heading_deg(pose.yaw):.1f} deg from north (yaw {math.degrees(pose.yaw):.1f} deg "
          f"from east)")
    print(f"1-sigma     {math.sqrt(max(ev[1], 0)):.2f} m x {math.sqrt(max(ev[0], 0)):.2f} m, "
          f"{math.degrees(math.sqrt(max(pose.cov[2, 2], 0))):.1f} deg")
    print(f"quality     {pose.quality}" + (f" ({pose.status})" if pose.status != "ok" else ""))
    for k, (x, y, yaw, w) in enumerate(pose.modes[:3]):
        print(f"mode {k + 1}      x {x:.1f} m  y {y:.1f} m  heading {yaw_to_heading_deg(yaw):.0f} deg  "
              f"weight {w:.2f}")
    if post is not None:
        print(f"likelihood  {out}")
    return 0
