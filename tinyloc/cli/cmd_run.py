"""``tinyloc run``: the live loop, from a source into sinks."""

from __future__ import annotations

import sys
import time

NAME = "run"
HELP = "run the localizer live: frames in, poses out (serial, UDP, JSON lines, NMEA, run log)"
DESCRIPTION = """\
Run the localizer loop on a frame source and stream every pose (with its covariance and
quality flag) to one or more sinks. The loop holds its memory fixed, drops frames it is too
late for instead of queueing them (and says so in the pose status), and stops cleanly on
Ctrl-C or SIGTERM: the frame in progress finishes, sinks get a final status, logs are flushed.

sources (--source):
  RUN_FOLDER          a recorded run folder (docs/run-folder.md); --realtime paces it
  IMAGE_FOLDER        images in name order at --fps, no other sensors
  camera:INDEX|URL    a live camera (cv2.VideoCapture); odometry and IMU from --sensors

sinks (--to, repeatable; default "-"):
  -                   JSON lines on stdout
  udp://HOST:PORT     message-pack map per pose (binds 127.0.0.1 unless ?bind= is given)
  /dev/ttyUSB0        framed binary to the firmware bridge (firmware_bridge/PROTOCOL.md)
  nmea+udp://H:P      NMEA 0183 GGA/RMC/HDT/GST (also nmea+serial:DEV, nmea:-)
  log:PATH            append-only crash-safe run log (read it with tinyloc.runtime.runlog)

first start: `tinyloc run --prepare --map SITE.tlm --camera camera.toml` fills numba's kernel cache
and exits; a start that has to compile keeps the compiler's memory until the process ends.

configuration: defaults are documented in docs/runtime.md; --config FILE.toml sets any of
them, --set SECTION.KEY=VALUE overrides one (repeatable), --print-config shows the result.

examples:
  tinyloc run --map site.tlm --source runs/drive1 --to udp://127.0.0.1:5600 --to log:drive1.tlog
  tinyloc run --map site.tlm --camera camera.toml --source camera:0 --sensors /dev/ttyUSB0 --to /dev/ttyUSB0
"""


def register(p):
    p.add_argument("--map", required=False, metavar="SITE.tlm", help="packed site map (tinyloc map pack)")
    p.add_argument("--camera", metavar="camera.toml", help="camera calibration (default: the run folder's)")
    p.add_argument("--source", metavar="SRC", help="run folder, image folder or camera:INDEX|URL")
    p.add_argument("--to", action="append", default=[], metavar="URL", help="pose sink (repeatable; default -)")
    p.add_argument("--sensors", metavar="URL", help="link endpoint delivering odometry/IMU for a live camera "
                                                     "(also receives the poses)")
    p.add_argument("--config", metavar="loop.toml", help="loop configuration file (TOML)")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override one configuration value (repeatable), e.g. --set track.floor=0.001")
    p.add_argument("--realtime", action="store_true", help="pace a recorded source at its own rate")
    p.add_argument("--fps", type=float, default=10.0, help="frame rate of an image folder (default 10)")
    p.add_argument("--max-frames", type=int, metavar="N", help="stop after N frames")
    p.add_argument("--print-config", action="store_true", help="print the effective configuration (TOML) and exit")
    p.add_argument("--prepare", action="store_true",
                   help="compile (or load) every numba kernel for this map and camera into the on-disk cache, then "
                        "exit; run it once after installing or updating, so the robot's first real start loads "
                        "kernels instead of compiling them (and keeps the usual memory footprint)")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")
    p.set_defaults(func=main)


def build(args, cfg):
    """Open map, camera, source and sinks from the parsed arguments (shared with ``tinyloc demo``)."""
    from ..camera.model import load_camera
    from ..errors import InputError
    from ..runtime.loop import Localizer
    from ..runtime.sinks import open_sink
    from ..runtime.sources import open_source

    link = None
    if getattr(args, "sensors", None):
        link = open_sink(args.sensors)
    src = open_source(args.source, realtime=args.realtime or cfg.loop.realtime, late_ms=cfg.loop.late_ms,
                      max_frames=args.max_frames, fps=getattr(args, "fps", 10.0),
                      link=getattr(link, "ep", None), labels=cfg.loop.external_labels)
    if args.camera:
        cam = load_camera(args.camera)
    elif getattr(src, "camera", None) is not None:
        cam = src.camera
    else:
        raise InputError("--camera is needed for this source (only run folders carry their calibration)")
    loc = Localizer.from_files(args.map, cam, cfg)
    sinks = [open_sink(u, header={"map": str(args.map), "source": str(args.source)}) for u in (args.to or ["-"])]
    if link is not None:
        sinks.append(link)
    return loc, src, sinks


class Progress:
    """One line on stderr about once a second: frames, frame rate, quality, status."""

    def __init__(self, stream=sys.stderr, every_s: float = 1.0, total: int | None = None, truth=None):
        self.stream = stream
        self.every_s = every_s
        self.total = total
        self.truth = truth
        self.t0 = time.monotonic()
        self.t_last = 0.0
        self.n = 0

    def __call__(self, pose, frame):
        import math

        self.n += 1
        now = time.monotonic()
        if now - self.t_last < self.every_s and (self.total is None or self.n < self.total):
            return
        self.t_last = now
        fps = self.n / max(now - self.t0, 1e-9)
        tot = f"/{self.total}" if self.total else ""
        err = ""
        if self.truth is not None and 0 <= frame.index < len(self.truth) and math.isfinite(pose.x):
            tx, ty, _ = self.truth[frame.index]
            if math.isfinite(tx):
                err = f"  err {math.hypot(pose.x - tx, pose.y - ty):5.2f} m"
        print(f"\rframe {self.n}{tot}  {fps:5.1f} fps  {pose.frame_ms:6.1f} ms  {pose.quality:<9}{err}  "
              f"{pose.status[:40]:<40}", end="", file=self.stream, flush=True)

    def done(self):
        print("", file=self.stream)


def uncalibrated_warning(cfg) -> str | None:
    """The start-up warning when the accelerometer bias or the wheel factor was never calibrated.

    Uncalibrated is: every ``loop.accel_bias_*`` 0, or ``track.odometry_scale`` exactly 1. On the held-out
    generated drives an uncalibrated accelerometer gave 86-100 % within 1 m / 3 deg instead of 99-100 %,
    and one drive flagged 14 % of its frames "tracking" while more than 1 m off (README, "Where it
    stands"); the covariance floor widens, but the flag cannot see the tilt. Wheels 2 % short left
    uncalibrated took one tuning drive to 20 % within 1 m / 3 deg with 57 % of its counted frames
    flagged "tracking" while wrong (docs/tracking.md, "Wheel factor"): the online learning is too
    slow to undo it.
    """
    missing = []
    if not any(getattr(cfg.loop, f"accel_bias_{ax}") != 0.0 for ax in "xyz"):
        missing.append("the accelerometer bias (loop.accel_bias_* are all 0; record two rests half a turn apart "
                       "and run tinyloc calibrate imu)")
    if float(getattr(cfg.track, "odometry_scale", 1.0)) == 1.0:
        missing.append("the wheel-odometry factor (track.odometry_scale is 1; drive a taped straight line there "
                       "and back and run tinyloc calibrate wheel)")
    if not missing:
        return None
    return (f"not calibrated: {' and '.join(missing)}; expect larger errors and more frames flagged tracking "
            "while wrong (docs/camera.md)")


def main(args) -> int:
    from ..errors import InputError
    from ..runtime.config import dumps_config, load_config
    from ..runtime.runner import Runner

    cfg = load_config(args.config, args.set)
    if args.print_config:
        sys.stdout.write(dumps_config(cfg))
        return 0
    if args.prepare:
        return _prepare(args, cfg)
    if not args.map or not args.source:
        raise InputError("tinyloc run needs --map and --source (see tinyloc run --help)")
    loc, src, sinks = build(args, cfg)
    warn = uncalibrated_warning(cfg)
    if warn:
        print(f"tinyloc run: {warn}", file=sys.stderr)  # even with --quiet: it is about safety
    if loc.kernels_compiled and not args.quiet:
        print(f"tinyloc run: {loc.kernels_compiled} numba kernel(s) compiled at start-up (first start after an "
              f"install or update); this process keeps the compiler's memory, restart once for the usual "
              f"footprint", file=sys.stderr)
    prog = None if args.quiet else Progress(total=len(src) if hasattr(src, "__len__") else None)
    runner = Runner(loc, src, sinks, on_pose=prog, status_every_s=cfg.loop.status_every_s)
    summary = runner.run()
    if prog is not None:
        prog.done()
    h = summary["health"]
    print(f"tinyloc run: {summary['frames']} frames, {summary['dropped_late']} dropped late, "
          f"{h.get('unusable_frames', 0)} unusable, quality {h.get('quality')}, "
          f"stopped by {summary['stopped_by']}", file=sys.stderr)
    loc.close()
    return 0


def _prepare(args, cfg) -> int:
    """Build the loop once (its start-up warm-up reaches every kernel), report, and exit."""
    from ..camera.model import load_camera
    from ..errors import InputError
    from ..runtime.loop import Localizer
    from ..runtime.sources import open_source

    if not args.map:
        raise InputError("tinyloc run --prepare needs --map (and --camera, or a run folder as --source)")
    if args.camera:
        cam = load_camera(args.camera)
    elif args.source:
        src = open_source(args.source, labels=cfg.loop.external_labels)
        cam = getattr(src, "camera", None)
        if hasattr(src, "close"):
            src.close()
        if cam is None:
            raise InputError("--camera is needed for this source (only run folders carry their calibration)")
    else:
        raise InputError("tinyloc run --prepare needs --camera (or a run folder as --source)")
    t0 = time.monotonic()
    loc = Localizer.from_files(args.map, cam, cfg)
    n = loc.kernels_compiled
    loc.close()
    print(f"tinyloc run --prepare: kernels ready in {time.monotonic() - t0:.1f} s "
          f"({n} compiled now, the rest loaded from the cache)", file=sys.stderr)
    return 0
