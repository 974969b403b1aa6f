"""The cut-short recording readers, fed truncated and damaged files written by rosbags' writers
(MCAP with and without zstd chunks; ROS 1 with uncompressed and bz2 chunks): they never fail
other than with a one-line InputError, and what they return is always a prefix of what rosbags'
own reader gets from the intact file."""

import numpy as np
import pytest
from rosbags.highlevel import AnyReader
from rosbags.rosbag1 import Writer as Writer1
from rosbags.rosbag2 import CompressionFormat, CompressionMode, StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from tinyloc.bagio.salvage import SalvagedMcap, SalvagedRos1
from tinyloc.errors import InputError

TS = get_typestore(Stores.ROS2_HUMBLE)
TS1 = get_typestore(Stores.ROS1_NOETIC)


def _bag(tmp_path, rng, kind):
    """kind: 'mcap', 'mcap-zstd', 'ros1', 'ros1-bz2'. Returns (file, salvage reader class)."""
    ros1 = kind.startswith("ros1")
    ts = TS1 if ros1 else TS
    T = ts.types
    if ros1:
        path = tmp_path / f"{kind}.bag"
        w = Writer1(path)
        if kind.endswith("bz2"):
            w.set_compression(Writer1.CompressionFormat.BZ2)
    else:
        path = tmp_path / kind
        w = Writer(path, version=9, storage_plugin=StoragePlugin.MCAP)
        if kind.endswith("zstd"):
            w.set_compression(CompressionMode.STORAGE, CompressionFormat.ZSTD)
    with w:
        c = w.add_connection("/imu/data", "sensor_msgs/msg/Imu", typestore=ts)
        for k in range(600):
            stamp = 10**18 + k * 10**7
            hk = {"seq": k} if ros1 else {}
            h = T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=stamp // 10**9,
                                                                              nanosec=stamp % 10**9), frame_id="imu",
                                         **hk)
            v = T["geometry_msgs/msg/Vector3"]
            msg = T["sensor_msgs/msg/Imu"](header=h, orientation=T["geometry_msgs/msg/Quaternion"](x=0, y=0, z=0, w=1),
                                           orientation_covariance=np.zeros(9), angular_velocity=v(x=0, y=0, z=0),
                                           angular_velocity_covariance=np.zeros(9),
                                           linear_acceleration=v(x=float(k), y=rng.normal(), z=9.8),
                                           linear_acceleration_covariance=np.zeros(9))
            w.write(c, stamp, ts.serialize_ros1(msg, "sensor_msgs/msg/Imu") if ros1 else
                    ts.serialize_cdr(msg, "sensor_msgs/msg/Imu"))
    if ros1:
        return path, SalvagedRos1
    return next(path.glob("*.mcap")), SalvagedMcap


def _values(reader):
    return [reader.deserialize(raw, c.msgtype).linear_acceleration.x for c, _, raw in reader.messages()]


KINDS = ["mcap", "mcap-zstd", "ros1", "ros1-bz2"]


@pytest.mark.parametrize("kind", KINDS)
def test_every_cut_gives_a_prefix(tmp_path, rng, kind):
    f, cls = _bag(tmp_path, rng, kind)
    with AnyReader([f]) as r:  # the reference: rosbags reading the intact file
        full = _values(r)
    whole = cls(f)
    assert _values(whole) == full
    compress = kind.endswith(("zstd", "bz2"))
    whole.close()
    data = f.read_bytes()
    got_last = -1
    for frac in np.linspace(0.02, 0.999, 12):
        g = tmp_path / f"cut{f.suffix}"
        g.write_bytes(data[: int(len(data) * frac)])
        try:
            r = cls(g)
        except InputError as e:
            assert "\n" not in str(e)
            continue
        vals = _values(r)
        r.close()
        assert vals == full[: len(vals)]
        assert len(vals) >= got_last  # more file never gives fewer messages
        got_last = len(vals)
    assert got_last > 0.9 * len(full) if not compress else got_last > 0


@pytest.mark.parametrize("kind", ["mcap-zstd", "ros1"])
def test_damaged_bytes_never_crash(tmp_path, rng, kind):
    f, cls = _bag(tmp_path, rng, kind)
    data = f.read_bytes()
    for trial in range(12):
        b = bytearray(data)
        for i in rng.integers(8, len(b), 8):
            b[i] ^= int(rng.integers(1, 256))
        g = tmp_path / f"bad{f.suffix}"
        g.write_bytes(bytes(b))
        try:
            r = cls(g)
        except InputError as e:
            assert "\n" not in str(e)
            continue
        for c, _, raw in r.messages():
            try:
                r.deserialize(raw, c.msgtype)
            except Exception:  # a damaged message body: the importer drops it (tested there)
                pass
        r.close()
