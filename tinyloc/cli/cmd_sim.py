"""``tinyloc sim``: synthetic sites (map + hidden 3D world) and simulated rover runs (run folders)."""

from __future__ import annotations

import json
import sys
import time
from dataclasses import replace
from pathlib import Path

NAME = "sim"
HELP = "make a synthetic site and drive a simulated rover through it"
DESCRIPTION = """\
Synthetic test sites and drives, generated on the CPU, deterministic for a seed.

  tinyloc sim site --seed 7 -o site7/                  map (GeoJSON + packed map) and hidden 3D world
  tinyloc sim run site7/ --seed 1 --frames 300 -o run1/  a run folder: frames, IMU, odometry, GNSS, truth

A site is an invented town grid: streets with carriageways and sidewalks, houses and
tall buildings, a park with a pond, a parking lot, trees, lamps, fences. Its map is
imperfect the way open vector map data is (missing trees, shifted buildings, objects
that are not there) and holds no parked cars or people. A run is what a sidewalk rover
would record driving through it; the run-folder format is docs/run-folder.md."""

_SITE_HELP = """\
Writes DIR/site.geojson (the map, open-map tagging, footprints only), DIR/world.json
(the hidden 3D world the camera sees), DIR/site.tlm (the packed map, if the map
compiler is available) and DIR/site.json (a summary). Same seed, same bytes."""

_RUN_HELP = """\
Drives a rover along the site's sidewalks (turns, stops, slopes), renders its camera
with per-pixel class labels, and models its IMU (specific force, FLU), wheel odometry
(scale error, slip, heading drift) and consumer GNSS (wandering bias, multipath near
tall buildings, sometimes optimistic accuracy). Progress goes to stderr."""


def register(parser):
    from .main import group

    sub = group(parser, "sim_command")
    p = sub.add_parser("site", help="generate a site: GeoJSON map, hidden 3D world, packed map",
                       description=_SITE_HELP)
    p.add_argument("--seed", type=int, required=True, metavar="N", help="site seed (any integer >= 0)")
    p.add_argument("-o", "--out", metavar="DIR", required=True, help="site folder to write (created)")
    p.add_argument("--size", choices=("demo", "small", "town"), default="small",
                   help="demo: 2x2 blocks, small: 3x3 (default), town: 4x4")
    p.add_argument("--map-errors", type=float, default=1.0, metavar="X",
                   help="scale every map error (0 = a perfect map, 1 = default, 2 = twice as bad)")
    p.add_argument("--res", type=float, default=0.5, metavar="M", help="packed map cell size (default 0.5 m)")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    p.set_defaults(func=_site)

    p = sub.add_parser("run", help="simulate a drive through a site into a run folder", description=_RUN_HELP)
    p.add_argument("site", metavar="DIR", help="site folder (from 'tinyloc sim site') or its world.json")
    p.add_argument("--seed", type=int, required=True, metavar="N", help="run seed (route, sensors, weather)")
    p.add_argument("--frames", type=int, default=100, metavar="K", help="number of camera frames (default 100)")
    p.add_argument("--rate", type=float, default=5.0, metavar="HZ", help="camera frame rate (default 5 Hz)")
    p.add_argument("--camera", metavar="camera.toml", help="camera calibration to simulate (default: 640x480, "
                                                           "0.8 m up, 8 deg down, mild distortion)")
    p.add_argument("-o", "--out", metavar="RUN", required=True, help="run folder to write (must be new or empty)")
    p.add_argument("--jpeg", action="store_true", help="write frames as JPEG (quality 90) instead of PNG")
    p.add_argument("--no-labels", action="store_true", help="do not write the per-pixel class labels")
    p.add_argument("--odom-scale", type=float, metavar="F",
                   help="wheel-odometry distance scale error as a fraction (default 0.02 = 2 %%)")
    p.add_argument("--motion-blur", action="store_true", help="blur frames along their motion")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress on stderr")
    p.set_defaults(func=_run)


def write_site(seed: int, out, *, size: str = "small", map_errors: float = 1.0, res_m: float = 0.5,
               progress=None) -> dict:
    """Generate a site and write its folder (see ``tinyloc sim site --help``); returns the summary."""
    from ..errors import InputError
    from ..sim.site import DEMO_PARAMS, SiteParams, generate_site

    if seed < 0:
        raise InputError("--seed must be >= 0")
    if not 0.0 <= map_errors <= 5.0:
        raise InputError("--map-errors must be in 0..5")
    params = {"demo": DEMO_PARAMS, "small": SiteParams(),
              "town": SiteParams(blocks_x=4, blocks_y=4)}[size].with_errors(map_errors)
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: exists and is not a directory")
    out.mkdir(parents=True, exist_ok=True)
    site = generate_site(seed, params)
    (out / "site.geojson").write_text(json.dumps(site.geojson, separators=(",", ":")) + "\n", encoding="utf-8")
    site.world.save(out / "world.json")
    summary = {"name": site.name, "seed": seed, "size": size, "map_errors": map_errors,
               "origin": {"lat": site.world.origin[0], "lon": site.world.origin[1], "h": site.world.origin[2]},
               "bounds_m": list(site.world.bounds), "features": len(site.geojson["features"]),
               "world": {"boxes": len(site.world.boxes), "cylinders": len(site.world.cyls),
                         "spheroids": len(site.world.spheres), "walkers": len(site.world.walkers)}}
    try:
        from ..maps.compile import pack_geojson
    except ImportError:
        summary["packed_map"] = None
    else:
        rep = pack_geojson(site.geojson, out / "site.tlm", res_m=res_m,
                           progress=(lambda d, t, w: progress(d, t)) if progress else None)
        summary["packed_map"] = {"file": "site.tlm", "bytes": rep.file_bytes, "rows": rep.rows, "cols": rep.cols,
                                 "res_m": rep.res_m}
    (out / "site.json").write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
    return summary


def _site(args) -> int:
    t0 = time.perf_counter()
    s = write_site(args.seed, args.out, size=args.size, map_errors=args.map_errors, res_m=args.res)
    if args.json:
        print(json.dumps(s, sort_keys=True))
    else:
        print(f"site '{s['name']}' (seed {s['seed']}, {args.size}): {s['features']} map features, "
              f"{s['world']['boxes']} boxes, {s['world']['cylinders']} cylinders in the world; "
              f"written to {args.out} in {time.perf_counter() - t0:.1f} s")
    return 0


def _run(args) -> int:
    from ..camera.model import load_camera
    from ..errors import InputError
    from ..sim.runs import RunParams, make_run, site_world_path, stderr_progress
    from ..sim.world import World

    world = World.load(site_world_path(args.site))
    cam = load_camera(args.camera) if args.camera else None
    if args.frames < 1 or args.frames > 100000:
        raise InputError("--frames must be in 1..100000")
    params = RunParams(frames=args.frames, frame_rate_hz=args.rate, image_ext=".jpg" if args.jpeg else ".png",
                       write_labels=not args.no_labels)
    if args.odom_scale is not None:
        if not -0.5 < args.odom_scale < 0.5:
            raise InputError("--odom-scale must be a fraction between -0.5 and 0.5")
        params = replace(params, odometry=replace(params.odometry, scale_error=args.odom_scale))
    if args.motion_blur:
        params = replace(params, render=replace(params.render, motion_blur=True))
    prog = None if args.quiet else stderr_progress("sim run: frames")
    t0 = time.perf_counter()
    s = make_run(world, args.out, seed=args.seed, params=params, camera=cam, progress=prog)
    if args.json:
        print(json.dumps(s, sort_keys=True))
    else:
        print(f"run written to {args.out}: {s['frames']} frames, {s['distance_m']:.0f} m in {s['duration_s']:.0f} s, "
              f"render {s['render_ms_median']:.0f} ms/frame (median), total {time.perf_counter() - t0:.1f} s")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(0)
