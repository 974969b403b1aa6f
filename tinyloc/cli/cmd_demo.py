"""``tinyloc demo``: the bundled demo site and drive through the live loop, with a summary at the end."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

NAME = "demo"
HELP = "run the bundled demo site and drive through the live loop (no arguments needed)"
DESCRIPTION = """\
Run the demo drive that ships with tinyloc (an invented site: its packed map and a recorded
run folder with camera frames, IMU, wheel odometry, a consumer-grade satellite receiver and
ground truth) through exactly the loop that `tinyloc run` uses on a robot.

While it runs, stderr shows frame rate, quality and the error against ground truth; poses
stream to UDP (message-pack, 127.0.0.1:5600) unless --to says otherwise (--to - for JSON
lines on stdout). At the end it prints a short summary: recall within 1 m and 3 deg after the
first 30 m, median error, what the satellite receiver alone achieves on the same drive, and
the frame time. --json prints the summary as one JSON object instead.

examples:
  tinyloc demo
  tinyloc demo --to - | head
  tinyloc demo --json
  tinyloc demo --run my_run/ --map my_site.tlm      same summary for another run with truth
"""

DATA = Path(__file__).resolve().parents[1] / "data" / "demo"


def register(p):
    p.add_argument("--run", metavar="RUN", help="run folder (default: the bundled demo drive)")
    p.add_argument("--map", metavar="SITE.tlm", help="packed map (default: the bundled demo site)")
    p.add_argument("--to", action="append", default=[], metavar="URL",
                   help="pose sink (repeatable; default udp://127.0.0.1:5600; '-' for JSON lines on stdout)")
    p.add_argument("--config", metavar="loop.toml",
                   help="loop configuration file (default for the bundled drive: the demo robot's loop.toml, which "
                        "holds its accelerometer bias from tinyloc calibrate imu)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", help="override one value")
    p.add_argument("--realtime", action="store_true", help="play the drive at its recorded pace")
    p.add_argument("--max-frames", type=int, metavar="N", help="stop after N frames")
    p.add_argument("--skip-m", type=float, default=30.0, help="metres of lock-on not counted in recall (30)")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object on stdout")
    p.add_argument("--quiet", action="store_true", help="no live progress on stderr")
    p.set_defaults(func=main)


def find_demo() -> tuple[Path, Path]:
    """The bundled (map, run folder)."""
    from ..errors import InputError

    if not DATA.is_dir():
        raise InputError(f"{DATA}: the bundled demo data is not installed")
    maps = sorted(DATA.rglob("*.tlm"))
    runs = sorted(p.parent for p in DATA.rglob("run.json"))
    if not maps or not runs:
        raise InputError(f"{DATA}: the demo needs a packed map (*.tlm) and a run folder (run.json)")
    return maps[0], runs[0]


def main(args) -> int:
    from ..runtime.config import load_config
    from ..runtime.runner import Runner
    from ..runtime.sinks import open_sink
    from ..runtime.sources import RunFolderSource
    from ..runtime.summary import gnss_at_frames, summarize
    from ..runtime.loop import Localizer
    from .cmd_run import Progress

    config = args.config
    if config is None and not args.run and (DATA / "loop.toml").is_file():
        config = DATA / "loop.toml"  # the demo robot's own settings: its calibrated accelerometer bias
    cfg = load_config(config, args.set)
    if args.run and args.map:
        map_path, run_path = Path(args.map), Path(args.run)
    else:
        dm, dr = find_demo()
        map_path, run_path = Path(args.map or dm), Path(args.run or dr)
    src = RunFolderSource(run_path, realtime=args.realtime, late_ms=cfg.loop.late_ms, max_frames=args.max_frames,
                          labels=cfg.loop.external_labels)
    if not args.quiet:
        print(f"tinyloc demo: map {map_path}, run {run_path} ({len(src)} frames); starting the loop",
              file=sys.stderr)
        if config is not None:
            print(f"tinyloc demo: configuration {config}", file=sys.stderr)
    loc = Localizer.from_files(map_path, src.camera, cfg)
    if loc.kernels_compiled and not args.quiet:
        print(f"tinyloc demo: {loc.kernels_compiled} numba kernel(s) compiled at start-up (first run after an "
              f"install or update): this run's frame times and memory are not the usual ones", file=sys.stderr)
    truth = src.truth_xy(loc.frame_enu)
    gnss = gnss_at_frames(src.rf, loc.frame_enu)
    urls = args.to or ["udp://127.0.0.1:5600"]
    sinks = [open_sink(u, header={"map": str(map_path), "run": str(run_path)}) for u in urls]
    if not args.quiet:
        print(f"tinyloc demo: streaming poses to {', '.join(urls)}", file=sys.stderr)
    poses, fidx = [], []
    prog = None if args.quiet else Progress(total=len(src), truth=truth)

    def on_pose(p, f):
        poses.append(p)
        fidx.append(f.index)
        if prog is not None:
            prog(p, f)

    runner = Runner(loc, src, sinks, on_pose=on_pose, status_every_s=cfg.loop.status_every_s)
    run = runner.run()
    if prog is not None:
        prog.done()
    import numpy as np

    idx = np.asarray(fidx, dtype=np.int64)  # late frames may have been dropped: align by frame index
    s = summarize(poses, truth[idx] if truth is not None else np.full((len(poses), 3), np.nan),
                  gnss[idx], skip_m=args.skip_m)
    s["dropped_late"] = run["dropped_late"]
    s["stopped_by"] = run["stopped_by"]
    s["map"], s["run"] = str(map_path), str(run_path)
    s["config"] = None if config is None else str(config)
    loc.close()
    if args.json:
        print(json.dumps({k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in s.items()},
                         sort_keys=True))
        return 0
    ratio = s["gnss_median_error_m"] / s["median_error_m"] if s["median_error_m"] > 0 else math.nan
    lines = [
        f"frames                {s['frames']} ({s['frames_counted']} counted after the first {args.skip_m:.0f} m; "
        f"{s['distance_m']:.0f} m driven)",
        f"recall 1 m / 3 deg    {100 * s['recall_1m_3deg']:.1f} %",
        f"median error          {s['median_error_m']:.2f} m, {s['median_heading_error_deg']:.2f} deg",
        f"satellite fix alone   {s['gnss_median_error_m']:.2f} m median ({ratio:.1f}x worse)",
        f"inside 95 % ellipse   {100 * s['inside_95_ellipse']:.1f} %",
        f"first lock            {s['time_to_first_tracking_s']:.1f} s",
        f"frame time            {s['frame_ms_median']:.1f} ms median, {s['frame_ms_p99']:.1f} ms p99",
    ]
    print("\n".join(lines))
    return 0
