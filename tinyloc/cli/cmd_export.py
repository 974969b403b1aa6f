"""``tinyloc export bag``: write pose estimates into a bag for viewing beside the robot's logs."""

from __future__ import annotations

NAME = "export"
HELP = "write results into robot log formats (ROS bags)"
DESCRIPTION = """\
Share tinyloc's output with the tools the team already uses.

  tinyloc export bag RESULT -o OUT.mcap --run RUN    poses as a ROS 2 MCAP file
  tinyloc export bag RESULT -o OUT.bag               ... or as a ROS 1 bag

See docs/bags.md for the result CSV and the topics written."""

BAG_DESCRIPTION = """\
Write per-frame pose estimates as geometry_msgs/PoseWithCovarianceStamped (/tinyloc/pose),
the quality flag as std_msgs/String (/tinyloc/quality) and, when lat/lon are known, a
sensor_msgs/NavSatFix (/tinyloc/fix) for map views.

RESULT is a result CSV (t,x,y,yaw,lat,lon,cov_xx,cov_xy,cov_xyaw,cov_yy,cov_yyaw,cov_yawyaw,quality)
or a folder holding poses.csv. Give --run RUN (the imported run folder) so the stamps land on
the original bag's clock.

examples:
  tinyloc export bag report/poses.csv -o drive-2031-tinyloc.mcap --run runs/drive-2031
  tinyloc export bag report/ -o out.bag --frame-id map"""


def register(parser):
    import argparse

    from .main import group

    sub = group(parser, "target")
    p = sub.add_parser("bag", help="pose estimates -> ROS 2 MCAP file or ROS 1 bag", description=BAG_DESCRIPTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("result", metavar="RUN_RESULT", help="result CSV, or a result folder holding poses.csv")
    p.add_argument("-o", "--out", required=True, metavar="OUT", help="new .mcap (ROS 2) or .bag (ROS 1) file")
    p.add_argument("--run", metavar="RUN", help="run folder the result came from (its time base aligns the stamps)")
    p.add_argument("--time-base-ns", type=int, metavar="NS", help="time base in ns, instead of --run")
    p.add_argument("--frame-id", default="map", help="frame of the poses (ENU at the map origin; default map)")
    p.add_argument("--prefix", default="/tinyloc", help="topic namespace (default /tinyloc)")
    p.set_defaults(func=_run_bag)


def _run_bag(args) -> int:
    from ..bagio.export_bag import export_bag

    res = export_bag(args.result, args.out, run=args.run, time_base_ns=args.time_base_ns,
                     frame_id=args.frame_id, prefix=args.prefix)
    msgs = ", ".join(f"{n} on {t}" for t, n in res["messages"].items())
    print(f"wrote {res['out']}: {msgs}")
    return 0
