"""``tinyloc import bag``: convert a recorded robot log (ROS bag) into a run folder."""

from __future__ import annotations

NAME = "import"
HELP = "convert recorded robot logs (ROS bags) into run folders"
DESCRIPTION = """\
Convert a recorded drive into a run folder that replay and the tests read.

  tinyloc import bag BAG --list                 what the bag holds and what would be used
  tinyloc import bag BAG -o RUN                 convert, picking topics by message type
  tinyloc import bag BAG -o RUN --camera-topic /front/image_raw --every 2 --start 30 --end 90

BAG is a ROS 1 .bag file, a ROS 2 bag folder, or a single .db3 / .mcap file (read with the
optional pure-Python 'rosbags' package: pip install 'tinyloc[bag]'). See docs/bags.md."""

BAG_DESCRIPTION = """\
Convert a ROS 1 or ROS 2 bag into a run folder (docs/run-folder.md).

Topics are picked by message type when not given: sensor_msgs Image (else CompressedImage)
-> frames/, CameraInfo -> camera.toml intrinsics, Imu linear_acceleration -> imu.csv,
nav_msgs Odometry -> odometry.csv (x, y, yaw), NavSatFix with covariance -> gnss.csv.
Ground truth is taken only from a topic you name (--truth-topic, with --origin). When
several topics fit a stream, name one; 'none' leaves a stream out (--imu-topic none).

Times are header stamps, not record times. Messages without a stamp, with a repeated
stamp or going back in time are dropped; gaps, clock jumps and the rate of every topic
are reported (and stored in run.json). The camera mount comes from /tf_static
(base_footprint or base_link -> the image's frame) or else from --camera camera.toml.

A recording cut short (recorder killed: an MCAP file without its footer, a ROS 1 .bag.active
without its index) is read up to the cut, and the output says so. An import that stops early
(damaged bag, Ctrl-C) leaves run.json with "complete": false; --resume continues it (same bag,
same options: both are checked), appending what is missing without duplicating anything.

examples:
  tinyloc import bag drive.mcap --list
  tinyloc import bag drive_2031/ -o runs/drive-2031
  tinyloc import bag old.bag -o runs/old --camera camera.toml --every 3
  tinyloc import bag drive.mcap -o runs/d --truth-topic /ins/pose --origin 12.3456,-45.6789,20
  tinyloc import bag drive.mcap -o runs/d --truth-topic /ins/pose --origin 12.3456,-45.6789,20 --resume"""


def register(parser):
    from .main import group

    sub = group(parser, "source")
    p = sub.add_parser("bag", help="ROS 1 / ROS 2 (sqlite3, MCAP) bag -> run folder", description=BAG_DESCRIPTION,
                       formatter_class=__import__("argparse").RawDescriptionHelpFormatter)
    p.add_argument("bag", metavar="BAG", help="ROS 1 .bag file, ROS 2 bag folder, or a .db3 / .mcap file")
    p.add_argument("-o", "--out", metavar="RUN", help="run folder to write (new or empty)")
    p.add_argument("--list", action="store_true", help="show topics, types, counts and the topics that would be used")
    p.add_argument("--resume", action="store_true",
                   help="continue a stopped import in RUN (same bag and same options as before; both are checked)")
    g = p.add_argument_group("topics (default: picked by message type; 'none' leaves a stream out)")
    g.add_argument("--camera-topic", metavar="T", help="sensor_msgs Image or CompressedImage")
    g.add_argument("--camera-info-topic", metavar="T", help="sensor_msgs CameraInfo (default: beside the images)")
    g.add_argument("--imu-topic", metavar="T", help="sensor_msgs Imu (linear_acceleration is written)")
    g.add_argument("--odom-topic", metavar="T", help="nav_msgs Odometry (wheel odometry)")
    g.add_argument("--gnss-topic", metavar="T", help="sensor_msgs NavSatFix")
    g.add_argument("--truth-topic", metavar="T", help="high-grade pose (PoseStamped, PoseWithCovarianceStamped "
                                                       "or Odometry) in an ENU frame; needs --origin")
    s = p.add_argument_group("selection")
    s.add_argument("--every", type=int, default=1, metavar="N", help="keep every N-th camera frame (default 1)")
    s.add_argument("--start", type=float, metavar="S", help="start S seconds after the bag's first message")
    s.add_argument("--end", type=float, metavar="S", help="end S seconds after the bag's first message")
    c = p.add_argument_group("calibration, frames and time")
    c.add_argument("--camera", metavar="camera.toml",
                   help="calibration file: the mount when /tf_static has none, the intrinsics when there is no "
                        "usable CameraInfo")
    c.add_argument("--base-frame", metavar="FRAME",
                   help="robot base frame in /tf_static (default: base_footprint, else base_link)")
    c.add_argument("--origin", metavar="LAT,LON[,H]",
                   help="ENU origin for run.json and the truth poses (default: the first GNSS fix); write "
                        "--origin=-12.3456,-45.6789 when the latitude is negative")
    c.add_argument("--gnss-acc", type=float, metavar="M",
                   help="1-sigma accuracy (m) for fixes with unknown covariance (default: drop them)")
    c.add_argument("--record-time", action="store_true",
                   help="use the bag's record time instead of header stamps (for logs without stamps)")
    c.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_run_bag)


def _run_bag(args) -> int:
    from ..bagio.import_bag import ImportOptions, describe_bag, import_bag
    from ..errors import InputError
    from ..geo import parse_latlon

    opts = ImportOptions(camera_topic=args.camera_topic, camera_info_topic=args.camera_info_topic,
                         imu_topic=args.imu_topic, odom_topic=args.odom_topic, gnss_topic=args.gnss_topic,
                         truth_topic=args.truth_topic, every=args.every, start_s=args.start, end_s=args.end,
                         camera_file=args.camera, base_frame=args.base_frame,
                         origin=parse_latlon(args.origin, what="--origin") if args.origin else None,
                         record_time=args.record_time, gnss_acc_m=args.gnss_acc, progress=not args.quiet)
    if args.list:
        print(describe_bag(args.bag, opts))
        return 0
    if not args.out:
        raise InputError("import bag: give the run folder to write with -o RUN (or --list to look first)")
    res = import_bag(args.bag, args.out, opts, resume=args.resume)
    print("\n".join(res.lines))
    return 0 if res.counts["frames"] else 1
