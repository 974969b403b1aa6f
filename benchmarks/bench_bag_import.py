"""Benchmark: convert a large generated bag into a run folder; resident memory and throughput.

Not a test. Writes a bag of ``--size-gb`` (default 2 GB) with the rosbags library (camera
640x480 bgr8 at 10 Hz, IMU 200 Hz, wheel odometry 50 Hz, GNSS 5 Hz, /tf_static, CameraInfo),
then runs ``tinyloc import bag`` on it in a child process and reports:

- wall time and throughput (bag MB / s),
- the child's peak resident memory (ru_maxrss),
- a baseline measured in the same run on the same bag: rosbags reading every message
  without decoding (the floor any importer built on it pays), and the ratio to it.

Usage::

    python benchmarks/bench_bag_import.py                    # 2 GB MCAP bag
    python benchmarks/bench_bag_import.py --size-gb 0.5 --storage sqlite3 --images jpeg
    python benchmarks/bench_bag_import.py --keep DIR         # keep the bag and the run folder
    python benchmarks/bench_bag_import.py --size-gb 0.2 --workers 1,2   # encoder threads compared
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

NS = 1_000_000_000
W, H = 640, 480


def _write_bag(path: Path, size_bytes: int, storage: str, images: str) -> dict:
    import cv2
    from rosbags.rosbag1 import Writer as Writer1
    from rosbags.rosbag2 import StoragePlugin, Writer as Writer2
    from rosbags.typesys import Stores, get_types_from_msg, get_typestore

    ros1 = storage == "ros1"
    ts = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
    if "tf2_msgs/msg/TFMessage" not in ts.types:
        ts.register(get_types_from_msg("geometry_msgs/TransformStamped[] transforms", "tf2_msgs/msg/TFMessage"))
    T = ts.types
    ser = ts.serialize_ros1 if ros1 else ts.serialize_cdr
    seq = [0]

    def header(stamp, frame):
        kw = {"stamp": T["builtin_interfaces/msg/Time"](sec=stamp // NS, nanosec=stamp % NS), "frame_id": frame}
        if ros1:
            kw["seq"] = seq[0]
            seq[0] += 1
        return T["std_msgs/msg/Header"](**kw)

    def vec(x, y, z):
        return T["geometry_msgs/msg/Vector3"](x=x, y=y, z=z)

    def quat(x, y, z, w):
        return T["geometry_msgs/msg/Quaternion"](x=x, y=y, z=z, w=w)

    if ros1:
        writer = Writer1(path)
    else:
        writer = Writer2(path, version=9,
                         storage_plugin=StoragePlugin.MCAP if storage == "mcap" else StoragePlugin.SQLITE3)
    rng = np.random.default_rng(1)
    # A textured scene that moves a little each frame (so PNG/JPEG work is realistic, not trivial).
    yy, xx = np.mgrid[0:H, 0:W]
    base = np.stack([(xx * 0.4) % 256, (yy * 0.5) % 256, ((xx + yy) * 0.3) % 256], axis=2).astype(np.uint8)
    base = cv2.add(base, rng.integers(0, 40, base.shape, dtype=np.uint8))
    t0 = 1_700_000_000 * NS
    n_frames = 0
    written = 0
    with writer:
        c_img = writer.add_connection("/front/image_raw" if images == "raw" else "/front/image_raw/compressed",
                                      "sensor_msgs/msg/Image" if images == "raw" else "sensor_msgs/msg/CompressedImage",
                                      typestore=ts)
        c_info = writer.add_connection("/front/camera_info", "sensor_msgs/msg/CameraInfo", typestore=ts)
        c_imu = writer.add_connection("/imu/data", "sensor_msgs/msg/Imu", typestore=ts)
        c_odom = writer.add_connection("/wheel/odom", "nav_msgs/msg/Odometry", typestore=ts)
        c_fix = writer.add_connection("/gnss/fix", "sensor_msgs/msg/NavSatFix", typestore=ts)
        c_tf = writer.add_connection("/tf_static", "tf2_msgs/msg/TFMessage", typestore=ts)
        tf = T["tf2_msgs/msg/TFMessage"](transforms=[T["geometry_msgs/msg/TransformStamped"](
            header=header(t0, "base_footprint"), child_frame_id="front_camera_optical",
            transform=T["geometry_msgs/msg/Transform"](translation=vec(0.3, 0.0, 0.7),
                                                        rotation=quat(-0.5, 0.5, -0.5, 0.5)))])
        data = ser(tf, "tf2_msgs/msg/TFMessage")
        writer.write(c_tf, t0, data)
        names = ("D", "K", "R", "P") if ros1 else ("d", "k", "r", "p")
        arrays = dict(zip(names, (np.array([-0.1, 0.01, 0.0, 0.0, 0.0]),
                                  np.array([500.0, 0, 319.5, 0, 500.0, 239.5, 0, 0, 1]), np.eye(3).ravel(),
                                  np.array([500.0, 0, 319.5, 0, 0, 500.0, 239.5, 0, 0, 0, 1, 0]))))
        roi = T["sensor_msgs/msg/RegionOfInterest"](x_offset=0, y_offset=0, height=0, width=0, do_rectify=False)
        k = 0  # 5 ms ticks
        while written < size_bytes:
            stamp = t0 + k * 5_000_000
            if k % 20 == 0:
                img = np.roll(base, n_frames * 3, axis=1)
                if images == "raw":
                    msg = T["sensor_msgs/msg/Image"](header=header(stamp, "front_camera_optical"), height=H, width=W,
                                                     encoding="bgr8", is_bigendian=0, step=W * 3, data=img.reshape(-1))
                    data = ser(msg, "sensor_msgs/msg/Image")
                else:
                    buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, 90])[1].reshape(-1)
                    msg = T["sensor_msgs/msg/CompressedImage"](header=header(stamp, "front_camera_optical"),
                                                               format="jpeg", data=buf)
                    data = ser(msg, "sensor_msgs/msg/CompressedImage")
                writer.write(c_img, stamp + 3_000_000, data)
                written += len(data)
                info = T["sensor_msgs/msg/CameraInfo"](header=header(stamp, "front_camera_optical"), height=H, width=W,
                                                       distortion_model="plumb_bob", binning_x=0, binning_y=0, roi=roi,
                                                       **arrays)
                data = ser(info, "sensor_msgs/msg/CameraInfo")
                writer.write(c_info, stamp + 3_000_000, data)
                written += len(data)
                n_frames += 1
            imu = T["sensor_msgs/msg/Imu"](header=header(stamp, "base_footprint"), orientation=quat(0, 0, 0, 1),
                                           orientation_covariance=np.array([-1.0] + [0.0] * 8),
                                           angular_velocity=vec(0, 0, 0.01), angular_velocity_covariance=np.zeros(9),
                                           linear_acceleration=vec(0.01 * math.sin(k), 0.0, 9.81),
                                           linear_acceleration_covariance=np.full(9, 0.01))
            data = ser(imu, "sensor_msgs/msg/Imu")
            writer.write(c_imu, stamp + 1_000_000, data)
            written += len(data)
            if k % 4 == 0:
                p = T["geometry_msgs/msg/Pose"](position=T["geometry_msgs/msg/Point"](x=k * 0.005, y=0.0, z=0.0),
                                                orientation=quat(0, 0, 0, 1))
                od = T["nav_msgs/msg/Odometry"](
                    header=header(stamp, "odom"), child_frame_id="base_link",
                    pose=T["geometry_msgs/msg/PoseWithCovariance"](pose=p, covariance=np.zeros(36)),
                    twist=T["geometry_msgs/msg/TwistWithCovariance"](
                        twist=T["geometry_msgs/msg/Twist"](linear=vec(1.0, 0, 0), angular=vec(0, 0, 0)),
                        covariance=np.zeros(36)))
                data = ser(od, "nav_msgs/msg/Odometry")
                writer.write(c_odom, stamp + 1_000_000, data)
                written += len(data)
            if k % 40 == 0:
                fix = T["sensor_msgs/msg/NavSatFix"](
                    header=header(stamp, "gnss"), status=T["sensor_msgs/msg/NavSatStatus"](status=0, service=1),
                    latitude=12.3456, longitude=-45.6789 + k * 1e-8, altitude=20.0,
                    position_covariance=np.diag([1.0, 1.0, 4.0]).ravel(), position_covariance_type=2)
                data = ser(fix, "sensor_msgs/msg/NavSatFix")
                writer.write(c_fix, stamp + 1_000_000, data)
                written += len(data)
            k += 1
    return {"frames": n_frames, "payload_bytes": written, "duration_s": k * 0.005}


def _bag_bytes(path: Path) -> int:
    if path.is_file():
        return path.stat().st_size
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def _child(code: str) -> tuple[float, float, str]:
    """Run python code in a child; returns (wall s, the child's own peak RSS in MB, its stdout)."""
    # VmHWM is the high-water mark of this process image only (ru_maxrss would include the parent's
    # memory from before exec on Linux, i.e. the bag generator's).
    code += ("\nprint('PEAK_RSS_KB', next(ln.split()[1] for ln in open('/proc/self/status') "
             "if ln.startswith('VmHWM')))\n")
    t = time.perf_counter()
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    wall = time.perf_counter() - t
    if res.returncode:
        raise SystemExit(f"child failed ({res.returncode}): {res.stderr.strip()[-2000:]}")
    lines = res.stdout.splitlines()
    peak_kb = next(float(ln.split()[1]) for ln in lines if ln.startswith("PEAK_RSS_KB"))
    return wall, peak_kb / 1024.0, "\n".join(ln for ln in lines if not ln.startswith("PEAK_RSS_KB"))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--size-gb", type=float, default=2.0, help="bag size to generate (default 2 GB)")
    ap.add_argument("--storage", choices=("mcap", "sqlite3", "ros1"), default="mcap")
    ap.add_argument("--images", choices=("raw", "jpeg"), default="raw", help="bgr8 Image or JPEG CompressedImage")
    ap.add_argument("--keep", metavar="DIR", help="work in DIR and keep the bag and run folder")
    ap.add_argument("--workers", default="0", help="comma-separated frame-encoder thread counts to run, "
                                                   "e.g. 1,2 (0: automatic, the import's default)")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    a = ap.parse_args(argv)
    work = Path(a.keep) if a.keep else Path(tempfile.mkdtemp(prefix="tinyloc-bagbench-"))
    work.mkdir(parents=True, exist_ok=True)
    bag = work / ("bench.bag" if a.storage == "ros1" else f"bench_{a.storage}")
    run = work / "run"
    try:
        if not bag.exists():
            t = time.perf_counter()
            gen = _write_bag(bag, int(a.size_gb * 1e9), a.storage, a.images)
            gen["write_s"] = time.perf_counter() - t
            print(f"generated {bag}: {gen}", file=sys.stderr)
        size = _bag_bytes(bag)
        shutil.rmtree(run, ignore_errors=True)
        # Baseline: rosbags alone, every message read (not decoded). Run first, so both see a warm page cache.
        base_code = ("import sys; from pathlib import Path; from rosbags.highlevel import AnyReader\n"
                     "from rosbags.typesys import Stores, get_typestore\n"
                     f"p = Path({str(bag)!r}); n = 0\n"
                     "with AnyReader([p], default_typestore=get_typestore(Stores.ROS2_HUMBLE)) as r:\n"
                     "    for c, t, raw in r.messages(): n += len(raw)\n"
                     "print(n)")
        _child(base_code)  # warm the page cache
        base_s, base_rss, _ = _child(base_code)
        mb = size / 1e6
        res = {"bag": str(bag), "storage": a.storage, "images": a.images, "bag_mb": round(mb, 1),
               "baseline_read_s": round(base_s, 2), "baseline_read_mb_per_s": round(mb / base_s, 1),
               "baseline_peak_rss_mb": round(base_rss, 1)}
        for k, w in enumerate(int(v) for v in a.workers.split(",")):
            shutil.rmtree(run, ignore_errors=True)
            imp_code = ("from tinyloc.bagio.import_bag import ImportOptions, import_bag\n"
                        f"r = import_bag({str(bag)!r}, {str(run)!r}, ImportOptions(progress=False, workers={w}))\n"
                        "print(r.lines[0])")
            # Seconds of driving in the run (first to last frame), for a real-time factor.
            imp_s, imp_rss, out = _child(imp_code)
            tag = f"{k}_w{w}"
            res.update({f"import_{tag}_s": round(imp_s, 2), f"import_{tag}_mb_per_s": round(mb / imp_s, 1),
                        f"import_{tag}_peak_rss_mb": round(imp_rss, 1),
                        f"import_{tag}_over_read_time": round(imp_s / base_s, 2),
                        f"import_{tag}_result": out.splitlines()[0] if out else ""})
            t = [float(ln.split(",")[0]) for ln in (run / "frames.csv").read_text().splitlines()[1:] if ln]
            if len(t) > 1:
                res[f"import_{tag}_x_real_time"] = round((t[-1] - t[0]) / imp_s, 2)
        if a.json:
            print(json.dumps(res))
        else:
            for k, v in res.items():
                print(f"{k:<24} {v}")
        return 0
    finally:
        if not a.keep:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
