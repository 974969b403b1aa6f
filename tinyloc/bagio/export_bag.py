"""Write tinyloc's pose estimates into a bag so they can be viewed beside the robot's own logs.

Input: a per-frame result CSV (docs/bags.md), header row
``t,x,y,yaw,lat,lon,cov_xx,cov_xy,cov_xyaw,cov_yy,cov_yyaw,cov_yawyaw,quality``
(t run seconds, x/y ENU m, yaw rad CCW from east, lat/lon deg, covariance over
(x, y, yaw) in m^2, m*rad, rad^2; quality one of no-fix, searching, tracking, degraded).

Output topics (``prefix`` defaults to ``/tinyloc``):

- ``{prefix}/pose``    geometry_msgs/PoseWithCovarianceStamped in ``frame_id`` (default ``map``):
  position (x, y, 0), orientation = rotation by yaw about +z, 6x6 covariance over
  (x, y, z, roll, pitch, yaw) with our 3x3 block in (x, y, yaw) and ``UNSET_VARIANCE`` on
  z, roll and pitch (tinyloc does not estimate them);
- ``{prefix}/quality`` std_msgs/String holding the quality flag of the same frame;
- ``{prefix}/fix``     sensor_msgs/NavSatFix (lat, lon; ENU covariance from the x/y block;
  status NO_FIX when quality is "no-fix") for map views, when lat/lon are given.

Stamps are ``time_base_ns + t * 1e9`` so they line up with the bag the run came from
(``time_base_ns`` is in the imported run's run.json). Rows whose pose is not finite still
get their quality message; their pose and fix are left out.
"""

from __future__ import annotations

import csv
import json
import math
import shutil
from pathlib import Path

from ..errors import InputError
from ._rosbags import rosbags, typestore

RESULT_COLUMNS = ("t", "x", "y", "yaw", "lat", "lon", "cov_xx", "cov_xy", "cov_xyaw", "cov_yy", "cov_yyaw",
                  "cov_yawyaw", "quality")
QUALITIES = ("no-fix", "searching", "tracking", "degraded")
UNSET_VARIANCE = 1e6  # m^2 / rad^2 on the axes tinyloc does not estimate
MAX_ROWS = 20_000_000

POSE_COV = "geometry_msgs/msg/PoseWithCovarianceStamped"
STRING = "std_msgs/msg/String"
NAVSATFIX = "sensor_msgs/msg/NavSatFix"


def find_result_csv(path) -> Path:
    """The result CSV: ``path`` itself, or the per-frame CSV inside a result folder.

    In a folder, ``poses.csv``, ``estimates.csv`` and ``frames.csv`` (what ``tinyloc replay``
    writes) are tried in that order; the first whose header has the result columns wins.
    """
    p = Path(path)
    if p.is_dir():
        for name in ("poses.csv", "estimates.csv", "frames.csv"):
            f = p / name
            if f.is_file():
                head = ""
                with open(f, encoding="utf-8", errors="replace") as fh:
                    for _ in range(100):  # the header is the first line that is not a comment
                        line = fh.readline(65536)
                        if not line or (line.strip() and not line.lstrip().startswith("#")):
                            head = line
                            break
                if all(c in [h.strip() for h in head.split(",")] for c in ("t", "x", "y", "yaw", "quality")):
                    return f
        if (p / "run.json").is_file():
            raise InputError(f"{p}: is a run folder (recorded inputs), not a result; export a replay's output")
        raise InputError(f"{p}: result folder holds no per-frame result CSV (poses.csv, estimates.csv, frames.csv)")
    if not p.is_file():
        raise InputError(f"{p}: no such result file")
    return p


def read_results(path):
    """Yield (line number, t, x, y, yaw, lat, lon, cov 3x3 as 6 values, quality) from a result CSV.

    Raises
    ------
    InputError
        Missing columns, or a row that does not parse (one line naming the file and line).
    """
    p = Path(path)
    with open(p, newline="", encoding="utf-8") as f:
        rows = csv.reader(line for line in f if line.strip() and not line.lstrip().startswith("#"))
        try:
            header = [h.strip() for h in next(rows)]
        except StopIteration:
            raise InputError(f"{p}: empty file (expected a header row: {','.join(RESULT_COLUMNS)})") from None
        missing = [c for c in RESULT_COLUMNS if c not in header]
        if missing:
            raise InputError(f"{p}: header lacks column(s) {','.join(missing)} (need {','.join(RESULT_COLUMNS)})")
        idx = [header.index(c) for c in RESULT_COLUMNS]
        last_t = -math.inf
        for n, row in enumerate(rows, start=2):
            if n > MAX_ROWS:
                raise InputError(f"{p}: more than {MAX_ROWS} rows")
            where = f"{p} row {n - 1}"
            if len(row) < len(header):
                raise InputError(f"{where}: has {len(row)} fields, header has {len(header)}")
            try:
                vals = [float(row[j]) for j in idx[:-1]]
            except ValueError:
                raise InputError(f"{where}: a value is not a number") from None
            q = row[idx[-1]].strip()
            if q not in QUALITIES:
                raise InputError(f"{where}: quality '{q}' is not one of {', '.join(QUALITIES)}")
            if not math.isfinite(vals[0]) or vals[0] <= last_t:
                raise InputError(f"{where}: time {vals[0]!r} s does not increase")
            last_t = vals[0]
            yield (n - 1, *vals, q)


def _time_base(run) -> int:
    if run is None:
        return 0
    p = Path(run) / "run.json"
    try:
        meta = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as e:
        raise InputError(f"{p}: cannot read the run's time base ({e})") from None
    base = meta.get("time_base_ns", 0)
    if not isinstance(base, int) or isinstance(base, bool):
        raise InputError(f"{p}: time_base_ns must be an integer, got {base!r}")
    return base


def export_bag(result, out, *, run=None, time_base_ns: int | None = None, frame_id: str = "map",
               prefix: str = "/tinyloc") -> dict:
    """Write the estimates of ``result`` into the bag ``out`` (``.mcap``: ROS 2 MCAP file; ``.bag``: ROS 1).

    Parameters
    ----------
    result : str or Path
        Result CSV, or a folder holding poses.csv / estimates.csv.
    out : str or Path
        New file; its suffix picks the format. Written beside, then renamed into place.
    run : str or Path, optional
        The run folder the result came from: its ``time_base_ns`` shifts the stamps back
        onto the original log's clock.
    time_base_ns : int, optional
        The same, given directly (wins over ``run``).
    frame_id : str
        Frame of the poses (ENU at the map origin).
    prefix : str
        Topic namespace.

    Returns
    -------
    dict
        Message counts per topic and the time span written.
    """
    rb = rosbags()
    src = find_result_csv(result)
    out = Path(out)
    if out.suffix not in (".mcap", ".bag"):
        raise InputError(f"{out}: output must end in .mcap (ROS 2 MCAP file) or .bag (ROS 1 bag)")
    if out.exists():
        raise InputError(f"{out}: exists already (choose a new name)")
    ros1 = out.suffix == ".bag"
    base = int(time_base_ns) if time_base_ns is not None else _time_base(run)
    ts = typestore(ros1=ros1)
    tmp_dir = out.with_name(f".{out.name}.partial")
    if tmp_dir.exists():
        shutil.rmtree(tmp_dir)
    if ros1:
        tmp_dir.mkdir(parents=True)
        target = tmp_dir / out.name
        writer = rb.rosbag1.Writer(target)
    else:
        target = tmp_dir / tmp_dir.name / f"{tmp_dir.name}.mcap"
        writer = rb.rosbag2.Writer(tmp_dir / tmp_dir.name, version=9,
                                   storage_plugin=rb.rosbag2.StoragePlugin.MCAP)
        tmp_dir.mkdir(parents=True)
    ser = ts.serialize_ros1 if ros1 else ts.serialize_cdr
    T = ts.types
    Header, Time = T["std_msgs/msg/Header"], T["builtin_interfaces/msg/Time"]
    Pose, Point, Quat = T["geometry_msgs/msg/Pose"], T["geometry_msgs/msg/Point"], T["geometry_msgs/msg/Quaternion"]
    PWC, PWCS = T["geometry_msgs/msg/PoseWithCovariance"], T[POSE_COV]
    String, Fix, Status = T[STRING], T[NAVSATFIX], T["sensor_msgs/msg/NavSatStatus"]
    import numpy as np

    counts = {f"{prefix}/pose": 0, f"{prefix}/quality": 0, f"{prefix}/fix": 0}
    span = [None, None]
    try:
        writer.open()
        c_pose = writer.add_connection(f"{prefix}/pose", POSE_COV, typestore=ts)
        c_q = writer.add_connection(f"{prefix}/quality", STRING, typestore=ts)
        c_fix = writer.add_connection(f"{prefix}/fix", NAVSATFIX, typestore=ts)
        for seq, (_, t, x, y, yaw, lat, lon, cxx, cxy, cxa, cyy, cya, caa, q) in enumerate(read_results(src)):
            stamp = base + int(round(t * 1e9))
            if stamp < 0:
                raise InputError(f"{src}: time {t!r} s is before the time base; pass --run or --time-base-ns")
            hkw = {"stamp": Time(sec=stamp // 1_000_000_000, nanosec=stamp % 1_000_000_000), "frame_id": frame_id}
            if ros1:
                hkw["seq"] = seq
            header = Header(**hkw)
            span[0] = stamp if span[0] is None else span[0]
            span[1] = stamp
            writer.write(c_q, stamp, ser(String(data=q), STRING))
            counts[f"{prefix}/quality"] += 1
            if not all(math.isfinite(v) for v in (x, y, yaw, cxx, cxy, cxa, cyy, cya, caa)):
                continue
            cov = np.zeros(36, dtype=np.float64)
            for (r, c), v in {(0, 0): cxx, (0, 1): cxy, (1, 0): cxy, (1, 1): cyy, (0, 5): cxa, (5, 0): cxa,
                              (1, 5): cya, (5, 1): cya, (5, 5): caa}.items():
                cov[r * 6 + c] = v
            cov[2 * 6 + 2] = cov[3 * 6 + 3] = cov[4 * 6 + 4] = UNSET_VARIANCE
            pose = Pose(position=Point(x=x, y=y, z=0.0),
                        orientation=Quat(x=0.0, y=0.0, z=math.sin(yaw / 2), w=math.cos(yaw / 2)))
            writer.write(c_pose, stamp, ser(PWCS(header=header, pose=PWC(pose=pose, covariance=cov)), POSE_COV))
            counts[f"{prefix}/pose"] += 1
            if math.isfinite(lat) and math.isfinite(lon):
                pc = np.array([cxx, cxy, 0.0, cxy, cyy, 0.0, 0.0, 0.0, UNSET_VARIANCE], dtype=np.float64)
                status = Status(status=-1 if q == "no-fix" else 0, service=0)
                fix = Fix(header=header, status=status, latitude=lat, longitude=lon, altitude=0.0,
                          position_covariance=pc, position_covariance_type=3)
                writer.write(c_fix, stamp, ser(fix, NAVSATFIX))
                counts[f"{prefix}/fix"] += 1
        writer.close()
    except BaseException:
        try:
            writer.close()
        except Exception:  # the partial output is deleted anyway; the first error is the one to report
            pass
        shutil.rmtree(tmp_dir, ignore_errors=True)
        raise
    target.replace(out)
    shutil.rmtree(tmp_dir, ignore_errors=True)
    return {"out": str(out), "messages": counts, "time_base_ns": base,
            "first_stamp_ns": span[0], "last_stamp_ns": span[1]}
