"""Test helpers for bag import/export: a small run folder, and bags written from it with rosbags' own writers.

The bags are the reference side of the round trip: written by the general-purpose
``rosbags`` library (its ROS 1 writer and its ROS 2 sqlite3 / MCAP writers) from
messages built field by field here, independently of tinyloc's importer.
Rotations for /tf_static come from SciPy's Rotation (quaternions in (x, y, z, w) order).
"""

from __future__ import annotations

import math
from pathlib import Path

import cv2
import numpy as np
from rosbags.rosbag1 import Writer as Writer1
from rosbags.rosbag2 import StoragePlugin, Writer as Writer2
from rosbags.typesys import Stores, get_types_from_msg, get_typestore
from scipy.spatial.transform import Rotation

from tinyloc.camera.model import CameraModel, Mount
from tinyloc.geo import LocalFrame
from tinyloc.runfolder import RunFolder, RunWriter

NS = 1_000_000_000
ORIGIN = (12.3456, -45.6789, 20.0)  # our invented site (open sea, far from anything)
STAMP_BASE_NS = 1_700_000_000 * NS  # header clock of the fake robot (an epoch-like value)
LATENCY_NS = 2_000_000  # the recorder writes each message 2 ms after its stamp
CAMERA = CameraModel(width=64, height=48, fx=52.5, fy=51.25, cx=31.7, cy=23.9,
                     dist=(-0.21, 0.05, 0.001, -0.0005, 0.01),
                     mount=Mount(height_m=0.62, pitch_deg=12.5, roll_deg=-1.25, yaw_deg=3.0, x_m=0.31, y_m=-0.04))
IMU_YAW_DEG = 90.0  # the IMU is mounted turned a quarter left in the base frame
BASE_LINK_Z = 0.15  # base_link sits 0.15 m above base_footprint


def make_run(root, rng, *, n_frames: int = 6) -> RunFolder:
    """A small consistent run folder written with tinyloc's RunWriter (noise images, smooth motion)."""
    frame = LocalFrame(*ORIGIN)
    with RunWriter(root, camera=CAMERA, origin=ORIGIN, name="bagtest", source="test") as w:
        for k in range(n_frames):
            w.add_frame(0.05 + 0.1 * k, rng.integers(0, 256, (CAMERA.height, CAMERA.width, 3), dtype=np.uint8))
        dur = 0.1 * n_frames
        for k in range(int(dur / 0.01)):
            w.add_imu(0.003 + 0.01 * k, rng.normal(0, 0.3), rng.normal(0, 0.3), 9.81 + rng.normal(0, 0.1))
        for k in range(int(dur / 0.02)):
            t = 0.011 + 0.02 * k
            w.add_odometry(t, 1.5 * t, 0.2 * t * t, 0.3 * math.sin(t) - 2.0)
        for k in range(int(dur / 0.2)):
            t = 0.017 + 0.2 * k
            x, y = 3.0 + 1.5 * t, -7.0 + 0.4 * t
            lat, lon = frame.to_latlon(x, y)
            w.add_gnss(t, lat, lon, 20.5 + 0.1 * k, 0.8 + 0.3 * k)
        for k in range(int(dur / 0.05)):
            t = 0.023 + 0.05 * k
            x, y, yaw = 3.0 + 1.5 * t, -7.0 + 0.4 * t, 0.7 + 0.2 * t
            lat, lon = frame.to_latlon(x, y)
            w.add_truth(t, lat, lon, yaw, x, y)
    return RunFolder.open(root)


class _Msgs:
    """Message constructors for one typestore (ROS 1 headers carry a seq, ROS 2 ones do not)."""

    def __init__(self, ros1: bool):
        self.ros1 = ros1
        self.ts = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
        if "tf2_msgs/msg/TFMessage" not in self.ts.types:
            self.ts.register(get_types_from_msg("geometry_msgs/TransformStamped[] transforms",
                                                "tf2_msgs/msg/TFMessage"))
        self.T = self.ts.types
        self.seq = 0

    def header(self, stamp_ns: int, frame_id: str):
        T = self.T
        kw = {"stamp": T["builtin_interfaces/msg/Time"](sec=stamp_ns // NS, nanosec=stamp_ns % NS),
              "frame_id": frame_id}
        if self.ros1:
            kw["seq"] = self.seq
            self.seq += 1
        return T["std_msgs/msg/Header"](**kw)

    def vec(self, x, y, z):
        return self.T["geometry_msgs/msg/Vector3"](x=float(x), y=float(y), z=float(z))

    def quat(self, q):
        return self.T["geometry_msgs/msg/Quaternion"](x=float(q[0]), y=float(q[1]), z=float(q[2]), w=float(q[3]))

    def serialize(self, msg):
        return self.ts.serialize_ros1(msg, msg.__msgtype__) if self.ros1 else \
            self.ts.serialize_cdr(msg, msg.__msgtype__)

    def image(self, stamp, img, encoding="bgr8", frame_id="front_camera_optical"):
        h, w = img.shape[:2]
        ch = 1 if img.ndim == 2 else img.shape[2]
        return self.T["sensor_msgs/msg/Image"](header=self.header(stamp, frame_id), height=h, width=w,
                                               encoding=encoding, is_bigendian=0, step=w * ch,
                                               data=np.ascontiguousarray(img).reshape(-1))

    def compressed(self, stamp, data: bytes, fmt: str, frame_id="front_camera_optical"):
        return self.T["sensor_msgs/msg/CompressedImage"](header=self.header(stamp, frame_id), format=fmt,
                                                         data=np.frombuffer(data, dtype=np.uint8))

    def camera_info(self, stamp, cam: CameraModel, model="plumb_bob", d=None, frame_id="front_camera_optical"):
        T = self.T
        d = np.asarray(cam.dist if d is None else d, dtype=np.float64)
        k = np.array([cam.fx, 0, cam.cx, 0, cam.fy, cam.cy, 0, 0, 1], dtype=np.float64)
        p = np.array([cam.fx, 0, cam.cx, 0, 0, cam.fy, cam.cy, 0, 0, 0, 1, 0], dtype=np.float64)
        roi = T["sensor_msgs/msg/RegionOfInterest"](x_offset=0, y_offset=0, height=0, width=0, do_rectify=False)
        names = ("D", "K", "R", "P") if self.ros1 else ("d", "k", "r", "p")
        arrays = dict(zip(names, (d, k, np.eye(3).ravel(), p)))
        return T["sensor_msgs/msg/CameraInfo"](header=self.header(stamp, frame_id), height=cam.height,
                                               width=cam.width, distortion_model=model, binning_x=0, binning_y=0,
                                               roi=roi, **arrays)

    def imu(self, stamp, f, frame_id="imu_link", accel_cov0=0.01):
        T = self.T
        cov = np.zeros(9)
        cov[0] = accel_cov0
        return T["sensor_msgs/msg/Imu"](header=self.header(stamp, frame_id), orientation=self.quat((0, 0, 0, 1)),
                                        orientation_covariance=np.array([-1.0] + [0.0] * 8),
                                        angular_velocity=self.vec(0, 0, 0), angular_velocity_covariance=np.zeros(9),
                                        linear_acceleration=self.vec(*f), linear_acceleration_covariance=cov)

    def _pose(self, x, y, yaw):
        T = self.T
        return T["geometry_msgs/msg/Pose"](position=T["geometry_msgs/msg/Point"](x=float(x), y=float(y), z=0.0),
                                           orientation=self.quat(Rotation.from_euler("z", yaw).as_quat()))

    def odometry(self, stamp, x, y, yaw):
        T = self.T
        return T["nav_msgs/msg/Odometry"](
            header=self.header(stamp, "odom"), child_frame_id="base_link",
            pose=T["geometry_msgs/msg/PoseWithCovariance"](pose=self._pose(x, y, yaw), covariance=np.zeros(36)),
            twist=T["geometry_msgs/msg/TwistWithCovariance"](
                twist=T["geometry_msgs/msg/Twist"](linear=self.vec(0, 0, 0), angular=self.vec(0, 0, 0)),
                covariance=np.zeros(36)))

    def fix(self, stamp, lat, lon, h, cov, cov_type=2, status=0):
        T = self.T
        return T["sensor_msgs/msg/NavSatFix"](
            header=self.header(stamp, "gnss"), status=T["sensor_msgs/msg/NavSatStatus"](status=status, service=1),
            latitude=float(lat), longitude=float(lon), altitude=float(h),
            position_covariance=np.asarray(cov, dtype=np.float64).ravel(), position_covariance_type=cov_type)

    def pose_stamped(self, stamp, x, y, yaw):
        return self.T["geometry_msgs/msg/PoseStamped"](header=self.header(stamp, "enu"), pose=self._pose(x, y, yaw))

    def tf_static(self, stamp, transforms):
        """transforms: list of (parent, child, R parent_from_child 3x3, t 3)."""
        T = self.T
        items = []
        for parent, child, r, t in transforms:
            q = Rotation.from_matrix(r).as_quat()
            items.append(T["geometry_msgs/msg/TransformStamped"](
                header=self.header(stamp, parent), child_frame_id=child,
                transform=T["geometry_msgs/msg/Transform"](translation=self.vec(*t), rotation=self.quat(q))))
        return T["tf2_msgs/msg/TFMessage"](transforms=items)


def static_transforms(cam: CameraModel = CAMERA):
    """The fake robot's /tf_static: base_footprint -> base_link -> front_camera_optical, base_footprint -> imu_link."""
    r_bc, t_bc = cam.mount.base_from_camera()  # base_footprint_from_optical
    link_t = np.array([0.0, 0.0, BASE_LINK_Z])
    return [("base_footprint", "base_link", np.eye(3), link_t),
            ("base_link", "front_camera_optical", r_bc, t_bc - link_t),
            ("base_footprint", "imu_link", Rotation.from_euler("z", IMU_YAW_DEG, degrees=True).as_matrix(),
             np.array([0.1, 0.0, 0.2]))]


def run_messages(rf: RunFolder, m: _Msgs, *, image="raw", info_model="plumb_bob", info_d=None, tf=True,
                 truth=True, stamp_hook=None, jpeg_quality=90):
    """(record ns, topic, message) of the whole run, sorted by record time.

    ``image``: 'raw' (bgr8 Image), 'rgb8', 'mono8', 'file' (CompressedImage carrying the run's own
    PNG/JPEG frame files byte for byte), 'jpeg' (CompressedImage, re-encoded), or a bayer encoding
    such as 'bayer_rggb8'.
    ``stamp_hook(topic, index, stamp_ns) -> stamp_ns`` lets a test break stamps.
    """
    out = []
    counters = {}

    def add(topic, t_s, build):
        stamp = STAMP_BASE_NS + int(round(t_s * NS))
        i = counters.get(topic, 0)
        counters[topic] = i + 1
        rec = stamp + LATENCY_NS
        if stamp_hook is not None:
            stamp = stamp_hook(topic, i, stamp)
        out.append((rec, topic, build(stamp)))

    if tf:
        add("/tf_static", 0.0, lambda s: m.tf_static(s, static_transforms(rf.camera)))
    r_imu = Rotation.from_euler("z", IMU_YAW_DEG, degrees=True).as_matrix()
    for i, t in enumerate(rf.frame_t):
        img = rf.load_frame(i)
        add("/front/camera_info", t, lambda s: m.camera_info(s, rf.camera, info_model, info_d))
        if image == "raw":
            add("/front/image_raw", t, lambda s: m.image(s, img))
        elif image == "rgb8":
            add("/front/image_raw", t, lambda s: m.image(s, img[:, :, ::-1], "rgb8"))
        elif image == "mono8":
            add("/front/image_raw", t, lambda s: m.image(s, cv2.cvtColor(img, cv2.COLOR_BGR2GRAY), "mono8"))
        elif image == "file":  # the run's own frame files, byte for byte
            data = (rf.path / rf.frame_files[i]).read_bytes()
            fmt = "bgr8; png compressed bgr8" if rf.frame_files[i].endswith(".png") else "bgr8; jpeg compressed bgr8"
            add("/front/image_raw/compressed", t, lambda s: m.compressed(s, data, fmt))
        elif image == "jpeg":
            ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, jpeg_quality])
            add("/front/image_raw/compressed", t, lambda s: m.compressed(s, buf.tobytes(), "jpeg"))
        elif image.startswith("bayer_"):
            add("/front/image_raw", t, lambda s: m.image(s, mosaic(img, image[6:10]), image))
        else:
            raise ValueError(image)
    for t, fx, fy, fz in rf.imu:
        f_imu = r_imu.T @ np.array([fx, fy, fz])  # what an IMU turned by IMU_YAW_DEG measures
        add("/imu/data", t, lambda s: m.imu(s, f_imu))
    for t, x, y, yaw in rf.odometry:
        add("/wheel/odom", t, lambda s: m.odometry(s, x, y, yaw))
    for t, lat, lon, h, acc in rf.gnss:
        cov = np.diag([acc * acc, acc * acc, 4 * acc * acc])
        add("/gnss/fix", t, lambda s: m.fix(s, lat, lon, h, cov))
    if truth and rf.truth is not None:
        for t, lat, lon, yaw, x, y in rf.truth:
            add("/ins/pose", t, lambda s: m.pose_stamped(s, x, y, yaw))
    out.sort(key=lambda r: r[0])
    return out


def mosaic(bgr: np.ndarray, pattern: str) -> np.ndarray:
    """Sample a BGR image into a Bayer mosaic; ``pattern`` names the top-left 2x2 block row by row ('rggb')."""
    chan = {"b": 0, "g": 1, "r": 2}
    out = np.empty(bgr.shape[:2], dtype=np.uint8)
    for k, (dy, dx) in enumerate(((0, 0), (0, 1), (1, 0), (1, 1))):
        out[dy::2, dx::2] = bgr[dy::2, dx::2, chan[pattern[k]]]
    return out


def write_bag(path, messages, m: _Msgs, storage: str):
    """Write (record ns, topic, msg) with rosbags: storage 'ros1', 'sqlite3' or 'mcap'. Returns the bag path."""
    path = Path(path)
    if storage == "ros1":
        writer = Writer1(path)
    else:
        plugin = StoragePlugin.MCAP if storage == "mcap" else StoragePlugin.SQLITE3
        writer = Writer2(path, version=9, storage_plugin=plugin)
    conns = {}
    with writer:
        for rec, topic, msg in messages:
            if topic not in conns:
                conns[topic] = writer.add_connection(topic, msg.__msgtype__, typestore=m.ts)
            writer.write(conns[topic], rec, m.serialize(msg))
    return path


def bag_from_run(rf: RunFolder, path, storage: str, **kw):
    """One call: the run's messages written as a bag (``kw`` as :func:`run_messages`)."""
    m = _Msgs(storage == "ros1")
    return write_bag(path, run_messages(rf, m, **kw), m, storage)


def bag_name(tmp_path, storage: str, stem: str = "drive") -> Path:
    """Bag path for a storage kind: ROS 1 file ``.bag``, ROS 2 folder."""
    return tmp_path / (f"{stem}.bag" if storage == "ros1" else f"{stem}_{storage}")


def reader_failing_after(n_messages: int):
    """A stand-in for the importer's ``_Importer._run`` whose bag reader raises an I/O error mid-way.

    The main pass (the call asking for more than three connections, not the look-ahead) fails
    after ``n_messages`` messages, as a disk or network read would.
    """
    from tinyloc.bagio import import_bag as ib

    real = ib._Importer._run

    def failing(self, reader):
        orig = reader.messages

        def messages(*a, **k):
            gen = orig(*a, **k)
            if k.get("connections") and len(k["connections"]) > 3:
                for i, item in enumerate(gen):
                    if i == n_messages:
                        raise OSError("Input/output error")
                    yield item
            else:
                yield from gen

        reader.messages = messages
        return real(self, reader)

    return failing
