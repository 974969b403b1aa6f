"""``tinyloc calibrate``: camera intrinsics and mount, accelerometer bias, wheel-odometry factor."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

NAME = "calibrate"
HELP = ("calibrate the camera (intrinsics from a checkerboard), its mount (height, pitch), the accelerometer "
        "bias and the wheel-odometry factor")
DESCRIPTION = """\
Camera calibration in two steps, both writing the same camera.toml (docs/camera.md), then the
accelerometer bias and the wheel-odometry factor for the loop configuration.

1. Intrinsics and lens distortion, from 10-30 photos of a printed checkerboard held at
   varied angles and distances, filling the corners of the picture too:
     tinyloc calibrate intrinsics shots/*.png --board 9x6 --square 0.025 -o camera.toml
   --board counts INNER corners (a board of 10 x 7 squares has 9 x 6). Photos with a
   blurred, partial or missing board are listed with the reason and left out.

2. The mount: with the camera on the robot, lay the board (or mark a rectangle) flat on
   the ground in view and take one photo:
     tinyloc calibrate mount --camera camera.toml ground.png --board 9x6 --square 0.025
     tinyloc calibrate mount --camera camera.toml ground.png --rect 1.2x2.0 \\
         --corners 212,388,431,390,402,250,240,249
   or set it by hand (metres, degrees; pitch positive looks down):
     tinyloc calibrate mount --camera camera.toml --height 0.62 --pitch 12
   Height, pitch and roll come from the photo; yaw and the camera's x/y offset on the
   base keep their values unless given by hand.

3. The accelerometer's bias (it tilts the levelling by bias / g, and far ground moves by
   about range^2 x tilt / camera height): record a few seconds at rest, turn the robot in
   place by half a turn, record again, then
     tinyloc calibrate imu rest_a.csv rest_b.csv -o loop.toml
   and start the loop with --config loop.toml.

4. The wheels' distance factor (tyres are rarely the size configured; 2 % off makes the
   belief trail or lead the robot): mark two points on flat ground, measure their distance
   with a tape, drive straight from one to the other and stop, record the wheel odometry
   (t,x,y,yaw), drive back and record again, then
     tinyloc calibrate wheel line_a.csv line_b.csv --distance 20.0 -o loop.toml"""

_INTR_HELP = """\
Detect the checkerboard's inner corners in every photo (OpenCV), refine them to
sub-pixel accuracy, reject blurred, partial or unfound boards with the reason,
and solve intrinsics and distortion (k1, k2, p1, p2, k3). Prints the RMS
reprojection error and each photo's own; photos far worse than the rest are
dropped and the solve repeated. A good calibration has RMS below 0.5 px."""

_MOUNT_HELP = """\
Estimate the camera's height above the ground, pitch and roll from one photo of a
flat target on the ground (a checkerboard with --board/--square, or a marked
rectangle with --rect and its four pixel corners), or set mount values by hand.
The result is written back into the calibration file (or to -o)."""


_IMU_HELP = """\
Estimate the accelerometer's constant bias by the two-position method (common practice):
at rest, a reading is gravity plus the bias; turning the robot in place by half a turn flips
gravity's horizontal components in the robot's frame but not the bias, so the mean of the two
readings' horizontal parts is the bias whatever the slope of the spot. Each recording must hold
at least 50 samples, taken at rest (small spread), reading about one gravity, and the two must come
from the same spot (turn the robot in place: a change of spot of a few degrees of slope cannot be
seen and half of it would end up in the bias). Prints the bias (m/s^2, forward, left, up) and the spot's tilt, and with -o
writes it into a loop configuration (tinyloc run --config loop.toml).

examples:
  tinyloc calibrate imu rest_a.csv rest_b.csv
  tinyloc calibrate imu runs/rest_0deg runs/rest_180deg -o loop.toml"""


def register(parser):
    from .main import group

    sub = group(parser, "calibrate_command")
    p = sub.add_parser("intrinsics", help="intrinsics and distortion from checkerboard photos",
                       description=_INTR_HELP)
    p.add_argument("images", nargs="+", metavar="IMAGE", help="checkerboard photos (PNG/JPEG), all the same size")
    p.add_argument("--board", required=True, metavar="COLSxROWS", help="inner corners of the board, e.g. 9x6")
    p.add_argument("--square", required=True, type=float, metavar="M", help="side of one square in metres")
    p.add_argument("-o", "--out", required=True, metavar="camera.toml", help="calibration file to write")
    p.add_argument("--max-edge", type=float, default=None, metavar="PX",
                   help="reject photos whose board edges are wider than this (blur; default 4.5 px)")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    p.add_argument("-q", "--quiet", action="store_true", help="no per-photo progress on stderr")
    p.set_defaults(func=_intrinsics)

    p = sub.add_parser("mount", help="camera height/pitch/roll from a ground target, or set by hand",
                       description=_MOUNT_HELP, formatter_class=parser.formatter_class)
    p.add_argument("image", nargs="?", metavar="IMAGE", help="photo of the target lying flat on the ground")
    p.add_argument("--camera", required=True, metavar="camera.toml", help="calibration with the intrinsics")
    p.add_argument("-o", "--out", metavar="camera.toml", help="file to write (default: update --camera in place)")
    p.add_argument("--board", metavar="COLSxROWS", help="checkerboard inner corners (with --square)")
    p.add_argument("--square", type=float, metavar="M", help="checkerboard square side (m)")
    p.add_argument("--rect", metavar="WxL", help="marked rectangle: side across x side away from the camera (m)")
    p.add_argument("--corners", metavar="X,Y,...",
                   help="rectangle corners in pixels: near-left, near-right, far-right, far-left (8 numbers)")
    for name, what in (("height", "camera height above the ground (m)"), ("pitch", "pitch (deg, + looks down)"),
                       ("roll", "roll (deg)"), ("yaw", "yaw on the base (deg, + looks left)"),
                       ("x", "camera x on the base (m, forward)"), ("y", "camera y on the base (m, left)")):
        p.add_argument(f"--{name}", type=float, metavar="V", help=f"set {what} by hand")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.set_defaults(func=_mount)

    p = sub.add_parser("imu", help="accelerometer bias from two recordings at rest, half a turn apart",
                       description=_IMU_HELP, formatter_class=parser.formatter_class)
    p.add_argument("first", metavar="REST_A", help="recording at rest: a CSV with t,fx,fy,fz (imu.csv format) "
                                                   "or a run folder (its imu.csv)")
    p.add_argument("second", metavar="REST_B", help="the same spot, the robot turned in place by 180 degrees")
    p.add_argument("-o", "--out", metavar="loop.toml",
                   help="loop configuration to write the bias into ([loop] accel_bias_x/y/z); created if missing, "
                        "other values kept (comments are not)")
    p.add_argument("--g", type=float, default=None, metavar="MPS2",
                   help="local gravity (m/s^2; default standard gravity 9.80665; it varies by about 0.5 %% "
                        "over the Earth and only the z bias depends on it)")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.set_defaults(func=_imu)

    p = sub.add_parser("wheel", help="wheel-odometry distance factor from straight drives of measured length",
                       description=_WHEEL_HELP, formatter_class=parser.formatter_class,
                       epilog="examples:\n  tinyloc calibrate wheel line_a.csv line_b.csv --distance 20.0\n"
                              "  tinyloc calibrate wheel runs/line_there runs/line_back --distance 25.4 -o loop.toml")
    p.add_argument("lines", nargs="+", metavar="LINE",
                   help="odometry of one drive along the line: a CSV with t,x,y,yaw (odometry.csv format) or a "
                        "run folder (its odometry.csv)")
    p.add_argument("--distance", type=float, required=True, metavar="M",
                   help="the line's length between the two marks (m, from a tape; the same for every recording)")
    p.add_argument("-o", "--out", metavar="loop.toml",
                   help="loop configuration to write the factor into ([track] odometry_scale); created if "
                        "missing, other values kept (comments are not)")
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.set_defaults(func=_wheel)


_WHEEL_HELP = """\
Estimate the factor the loop multiplies wheel-odometry distances by (track.odometry_scale) from
drives along a straight line of measured length (common practice: the straight-line test). The
factor is the tape's distance over the odometry's start-to-end distance, pooled over the
recordings (sum of tapes / sum of odometry), so more passes or a longer line average the slip
down. Each recording must start and end at rest, be straight (heading change within 5 deg, path
within 0.5 % of the start-to-end distance) and give a factor within 0.8 .. 1.25. Prints the
factor and each recording's own, and with -o writes it into a loop configuration."""


def _read_image(path):
    import cv2

    from ..errors import CalibrationError

    p = Path(path)
    if not p.is_file():
        raise CalibrationError(f"{p}: no such file")
    img = cv2.imread(str(p), cv2.IMREAD_COLOR)
    if img is None:
        raise CalibrationError(f"{p}: not a readable image (corrupted or unsupported format)")
    return img


def _intrinsics(args) -> int:
    from ..camera.calibrate import CalibrateParams, calibrate_intrinsics, parse_board
    from ..camera.model import save_camera
    from ..errors import CalibrationError

    board = parse_board(args.board, args.square)
    params = CalibrateParams() if args.max_edge is None else CalibrateParams(max_edge_px=args.max_edge)
    images, names, unreadable = [], [], []
    for path in args.images:
        try:
            images.append(_read_image(path))
            names.append(str(path))
        except CalibrationError as e:
            unreadable.append((str(path), str(e).split(": ", 1)[-1]))
            if not args.quiet:
                print(f"{path}: rejected: {unreadable[-1][1]}", file=sys.stderr)
    progress = None if args.quiet else (lambda line: print(line, file=sys.stderr))
    res = calibrate_intrinsics(images, board, names=names, params=params, progress=progress)
    from datetime import datetime, timezone

    save_camera(args.out, res.camera, rms_px=res.rms_px, images_used=len(res.used),
                images_given=len(args.images), board=f"{board.cols}x{board.rows}", square_m=board.square_m,
                date=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"))
    c = res.camera
    report = {"out": args.out, "width": c.width, "height": c.height, "fx": c.fx, "fy": c.fy, "cx": c.cx,
              "cy": c.cy, "dist": list(c.dist), "rms_px": res.rms_px,
              "used": [{"image": v.name, "rms_px": v.rms_px} for v in res.used],
              "rejected": [{"image": v.name, "reason": v.reason} for v in res.rejected]
              + [{"image": n, "reason": r} for n, r in unreadable]}
    if args.json:
        print(json.dumps(report))
        return 0
    print(f"calibrated {c.width}x{c.height} from {len(res.used)} of {len(args.images)} photos: "
          f"RMS {res.rms_px:.3f} px")
    print(f"  fx {c.fx:.2f}  fy {c.fy:.2f}  cx {c.cx:.2f}  cy {c.cy:.2f}  (px)")
    print("  dist k1 k2 p1 p2 k3: " + " ".join(f"{d:.5f}" for d in c.dist))
    for v in res.used:
        print(f"  {v.name}: {v.rms_px:.3f} px")
    for r in report["rejected"]:
        print(f"  {r['image']}: rejected: {r['reason']}")
    if res.rms_px > 0.5:
        print("  warning: RMS above 0.5 px; check the board is flat and the photos sharp", file=sys.stderr)
    print(f"wrote {args.out}")
    return 0


def _mount(args) -> int:
    from ..camera.calibrate import parse_board
    from ..camera.model import load_camera, save_camera
    from ..camera.mount_fit import fit_mount_from_board, fit_mount_from_rectangle, set_mount
    from ..errors import CalibrationError
    from ..tomlio import read_toml

    cam = load_camera(args.camera)
    fit = None
    if args.image:
        img = _read_image(args.image)
        if args.board:
            if args.square is None:
                raise CalibrationError("--board needs --square (square side in metres)")
            fit = fit_mount_from_board(cam, img, parse_board(args.board, args.square), name=args.image)
        elif args.rect:
            try:
                wm, lm = (float(v) for v in args.rect.lower().split("x"))
            except ValueError:
                raise CalibrationError(f"--rect: expected WxL in metres such as 1.2x2.0, got {args.rect!r}") from None
            try:
                vals = [float(v) for v in (args.corners or "").split(",")]
            except ValueError:
                vals = []
            if len(vals) != 8:
                raise CalibrationError("--rect needs --corners with 8 numbers: x,y of near-left, near-right, "
                                       "far-right, far-left")
            fit = fit_mount_from_rectangle(cam, [vals[0:2], vals[2:4], vals[4:6], vals[6:8]], wm, lm)
        else:
            raise CalibrationError("a ground photo needs --board/--square or --rect/--corners")
        if (img.shape[1], img.shape[0]) != (cam.width, cam.height):
            raise CalibrationError(f"{args.image}: photo is {img.shape[1]}x{img.shape[0]}, the calibration is "
                                   f"for {cam.width}x{cam.height}")
        cam = cam.with_mount(height_m=fit.mount.height_m, pitch_deg=fit.mount.pitch_deg,
                             roll_deg=fit.mount.roll_deg)
    by_hand = dict(height_m=args.height, pitch_deg=args.pitch, roll_deg=args.roll, yaw_deg=args.yaw,
                   x_m=args.x, y_m=args.y)
    if fit is None and all(v is None for v in by_hand.values()):
        raise CalibrationError("nothing to do: give a ground photo, or mount values by hand (--height, --pitch, ...)")
    cam = set_mount(cam, **by_hand)
    out = args.out or args.camera
    old = read_toml(args.camera, cls=CalibrationError).get("calibration", {})
    extra = {k: v for k, v in old.items() if not isinstance(v, dict)}
    if fit is not None:
        extra.update(mount_rms_px=fit.rms_px, mount_points=fit.points, mount_photo=str(args.image))
    save_camera(out, cam, **extra)
    m = cam.mount
    res = {"out": out, "height_m": m.height_m, "pitch_deg": m.pitch_deg, "roll_deg": m.roll_deg,
           "yaw_deg": m.yaw_deg, "x_m": m.x_m, "y_m": m.y_m, "fit_rms_px": fit.rms_px if fit else None}
    if args.json:
        print(json.dumps(res))
        return 0
    src = f"from {args.image} (RMS {fit.rms_px:.2f} px over {fit.points} points)" if fit else "set by hand"
    print(f"mount {src}: height {m.height_m:.3f} m, pitch {m.pitch_deg:.2f} deg, roll {m.roll_deg:.2f} deg, "
          f"yaw {m.yaw_deg:.2f} deg, x {m.x_m:.3f} m, y {m.y_m:.3f} m")
    print(f"wrote {out}")
    return 0


def _imu(args) -> int:
    from ..camera.imu_rest import calibrate_from_files
    from ..errors import CalibrationError
    from ..perception.gravity import G0

    g = G0 if args.g is None else args.g
    if not 9.7 <= g <= 9.9:
        raise CalibrationError(f"--g {g}: expected local gravity in m/s^2, within 9.7 .. 9.9 (about 9.78 at the "
                               "equator to 9.83 at the poles)")
    res = calibrate_from_files(args.first, args.second, g_mps2=g)
    a, b = res.first, res.second
    bx, by, bz = (float(v) for v in res.bias)
    if args.out:
        _update_config(args.out, "loop", accel_bias_x=bx, accel_bias_y=by, accel_bias_z=bz)
    report = {"bias_mps2": [bx, by, bz], "tilt_deg": res.tilt_deg, "g_mps2": g,
              "tilt_from_bias_deg": math.degrees(math.hypot(bx, by) / g), "out": args.out,
              "recordings": [{"path": r.path, "samples": r.n, "seconds": r.seconds, "mean": [float(v) for v in r.mean],
                              "std": [float(v) for v in r.std]} for r in (a, b)]}
    if args.json:
        print(json.dumps(report))
        return 0
    print(f"accelerometer bias (forward, left, up): {bx:+.4f} {by:+.4f} {bz:+.4f} m/s^2 "
          f"(levelling error without it: {report['tilt_from_bias_deg']:.2f} deg)")
    print(f"  spot tilt {res.tilt_deg:.2f} deg; {a.n} and {b.n} samples at rest")
    if math.hypot(bx, by) > 0.5:
        print("  warning: a horizontal bias above 0.5 m/s^2 is large for a MEMS accelerometer; check that both "
              "recordings were taken on the same spot, turned in place", file=sys.stderr)
    if args.out:
        print(f"  wrote [loop] accel_bias_x/y/z to {args.out}")
    return 0


def _update_config(path, section: str, **values) -> None:
    """Set ``values`` in table ``section`` of the loop configuration at ``path`` (created if missing)."""
    from ..errors import CalibrationError
    from ..tomlio import read_toml, write_toml

    out = Path(path)
    doc = read_toml(out, cls=CalibrationError) if out.is_file() else {}
    table = doc.get(section, {})
    if not isinstance(table, dict):
        raise CalibrationError(f"{out}: '{section}' is not a table")
    table.update(values)
    doc[section] = table
    try:
        write_toml(out, doc, header="tinyloc loop configuration (docs/runtime.md)")
    except (OSError, TypeError, ValueError) as e:
        raise CalibrationError(f"{out}: cannot write ({getattr(e, 'strerror', None) or e})") from None


def _wheel(args) -> int:
    from ..camera.wheel_line import calibrate_from_files

    res = calibrate_from_files(args.lines, args.distance)
    if args.out:
        _update_config(args.out, "track", odometry_scale=round(res.factor, 5))
    report = {"odometry_scale": res.factor, "distance_m": res.distance_m, "spread": res.spread, "out": args.out,
              "recordings": [{"path": d.path, "odometry_m": d.chord_m, "path_m": d.path_m, "turn_deg": d.turn_deg,
                              "seconds": d.seconds, "factor": res.distance_m / d.chord_m} for d in res.drives]}
    if args.json:
        print(json.dumps(report))
        return 0
    print(f"wheel-odometry factor: {res.factor:.5f} (odometry {100 * (1 / res.factor - 1):+.2f} % long) from "
          f"{len(res.drives)} drive(s) along {res.distance_m:g} m")
    for d in res.drives:
        print(f"  {d.path}: odometry {d.chord_m:.3f} m, factor {res.distance_m / d.chord_m:.5f}, "
              f"heading change {d.turn_deg:.1f} deg")
    if len(res.drives) > 1 and res.spread > 0.01:
        print(f"  warning: the recordings differ by {100 * res.spread:.1f} % from their pooled factor; slip or a "
              "drive that did not stop on the mark? Repeat the drives", file=sys.stderr)
    if args.out:
        print(f"  wrote [track] odometry_scale to {args.out}")
    return 0
