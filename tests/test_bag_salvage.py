"""The cut-short MCAP reader, fed truncated and damaged files (written by rosbags' MCAP writer,
with and without zstd chunk compression): it never fails other than with a one-line InputError,
and what it returns is always a prefix of what the intact file holds."""

import numpy as np
import pytest
from rosbags.highlevel import AnyReader
from rosbags.rosbag2 import CompressionFormat, CompressionMode, StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from tinyloc.bagio.salvage import SalvagedMcap
from tinyloc.errors import InputError

TS = get_typestore(Stores.ROS2_HUMBLE)


def _mcap(tmp_path, rng, compress):
    T = TS.types
    path = tmp_path / ("z" if compress else "u")
    w = Writer(path, version=9, storage_plugin=StoragePlugin.MCAP)
    if compress:
        w.set_compression(CompressionMode.STORAGE, CompressionFormat.ZSTD)
    with w:
        c = w.add_connection("/imu/data", "sensor_msgs/msg/Imu", typestore=TS)
        for k in range(3000):
            stamp = 10**18 + k * 10**7
            h = T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=stamp // 10**9,
                                                                              nanosec=stamp % 10**9), frame_id="imu")
            v = T["geometry_msgs/msg/Vector3"]
            msg = T["sensor_msgs/msg/Imu"](header=h, orientation=T["geometry_msgs/msg/Quaternion"](x=0, y=0, z=0, w=1),
                                           orientation_covariance=np.zeros(9), angular_velocity=v(x=0, y=0, z=0),
                                           angular_velocity_covariance=np.zeros(9),
                                           linear_acceleration=v(x=float(k), y=rng.normal(), z=9.8),
                                           linear_acceleration_covariance=np.zeros(9))
            w.write(c, stamp, TS.serialize_cdr(msg, "sensor_msgs/msg/Imu"))
    return next(path.glob("*.mcap"))


def _values(reader):
    return [reader.deserialize(raw, c.msgtype).linear_acceleration.x for c, _, raw in reader.messages()]


@pytest.mark.parametrize("compress", [False, True])
def test_every_cut_gives_a_prefix(tmp_path, rng, compress):
    f = _mcap(tmp_path, rng, compress)
    with AnyReader([f]) as r:  # the reference: rosbags reading the intact file
        full = _values(r)
    whole = SalvagedMcap(f)
    assert _values(whole) == full and whole.cut_at is None
    whole.close()
    data = f.read_bytes()
    got_last = -1
    for frac in np.linspace(0.02, 0.999, 25):
        g = tmp_path / "cut.mcap"
        g.write_bytes(data[: int(len(data) * frac)])
        try:
            r = SalvagedMcap(g)
        except InputError as e:
            assert "\n" not in str(e)
            continue
        vals = _values(r)
        r.close()
        assert vals == full[: len(vals)]
        assert len(vals) >= got_last  # more file never gives fewer messages
        got_last = len(vals)
    assert got_last > 0.9 * len(full) if not compress else got_last > 0


def test_damaged_bytes_never_crash(tmp_path, rng):
    f = _mcap(tmp_path, rng, True)
    data = f.read_bytes()
    for trial in range(30):
        b = bytearray(data)
        for i in rng.integers(8, len(b), 8):
            b[i] ^= int(rng.integers(1, 256))
        g = tmp_path / "bad.mcap"
        g.write_bytes(bytes(b))
        try:
            r = SalvagedMcap(g)
        except InputError as e:
            assert "\n" not in str(e)
            continue
        for c, _, raw in r.messages():
            try:
                r.deserialize(raw, c.msgtype)
            except Exception:  # a damaged message body: the importer drops it (tested there)
                pass
        r.close()
