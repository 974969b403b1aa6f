"""The shared known-answer vectors of firmware_bridge/vectors: Python decodes and encodes them byte for byte.

The C side (firmware_bridge/test_tlink.c, run by tests/test_firmware_c.py) checks the same files.
"""

import math
import struct
from pathlib import Path

import pytest

from tinyloc.link import messages as m
from tinyloc.link.framer import Framer

VEC = Path(__file__).resolve().parents[1] / "firmware_bridge" / "vectors"


def _manifest():
    out = []
    for line in (VEC / "vectors.txt").read_text().splitlines():
        if line.startswith(("frame ", "stream ")):
            kind, fname, *rest = line.split()
            out.append((kind, fname, rest))
    return out


FRAMES = [v for v in _manifest() if v[0] == "frame"]
STREAMS = [v for v in _manifest() if v[0] == "stream"]


def _num(s):
    try:
        return int(s)
    except ValueError:
        return float(s)


def _build(tname, kv):
    """The message of a manifest line (wire-level fields -> message fields)."""
    t = kv.pop("t_us") / 1e6
    seq = kv.pop("seq")
    lat = lambda v: math.nan if v == m.LATLON_UNKNOWN else v / 1e7  # noqa: E731
    if tname == "pose":
        c = [kv[f"cov{i}"] for i in range(6)]
        return m.Pose(t, kv["x_m"], kv["y_m"], kv["yaw_rad"], lat(kv["lat_e7"]), lat(kv["lon_e7"]),
                      ((c[0], c[1], c[2]), (c[1], c[3], c[4]), (c[2], c[4], c[5])),
                      m.QUALITIES[kv["quality"]], str(kv["status"]), kv["frame_ms"], seq)
    if tname == "status":
        return m.Status(t, m.HOST_STATES[kv["state"]], m.QUALITIES[kv["quality"]], kv["flags"], kv["frames_in"],
                        kv["frames_dropped"], kv["link_errors"], str(kv["text"]), seq)
    if tname == "timesync":
        return m.TimeSync(t, m.SYNC_PHASES[kv["phase"]], kv["t_origin_us"] / 1e6, kv["t_receive_us"] / 1e6,
                          kv["t_transmit_us"] / 1e6, seq)
    if tname == "odometry":
        return m.Odometry(t, kv["x_m"], kv["y_m"], kv["yaw_rad"], kv["speed_mps"], kv["yaw_rate_radps"],
                          kv["left_ticks"], kv["right_ticks"], kv["flags"], seq)
    if tname == "imu":
        return m.Imu(t, kv["fx"], kv["fy"], kv["fz"], kv["gx"], kv["gy"], kv["gz"], kv["flags"], seq)
    return m.Heartbeat(t, kv["uptime_ms"], kv["rx_ok"], kv["rx_bad_crc"], kv["rx_resyncs"], kv["state"],
                       kv["reset_cause"], kv["flags"], seq)


def _same(a, b):
    if isinstance(a, float) and math.isnan(a):
        return isinstance(b, float) and math.isnan(b)
    if isinstance(a, tuple):
        return all(_same(x, y) for x, y in zip(a, b))
    return a == b


def test_manifest_is_complete():
    names = {rest[0] for _, _, rest in FRAMES}
    assert names == {"pose", "status", "timesync", "odometry", "imu", "heartbeat"}
    assert STREAMS


@pytest.mark.parametrize("kind,fname,rest", FRAMES, ids=[f for _, f, _ in FRAMES])
def test_frame_vector(kind, fname, rest):
    wire = (VEC / fname).read_bytes()
    kv = {}
    for tok in rest[1:]:
        k, v = tok.split("=", 1)
        kv[k] = v if k in ("status", "text") else _num(v)
    want = _build(rest[0], dict(kv))
    # encode: byte-identical
    assert m.encode_frame(want) == wire
    # decode, byte at a time: the same fields
    fr = Framer()
    got = []
    for b in wire:
        got += fr.feed(bytes([b]))
    assert len(got) == 1
    for f in want.__dataclass_fields__:
        assert _same(getattr(want, f), getattr(got[0], f)), f
    # every float field in the manifest is a binary32 value (so decimal text is exact)
    for k, v in kv.items():
        if isinstance(v, float) and math.isfinite(v):
            assert struct.unpack("<f", struct.pack("<f", v))[0] == v or k.endswith("_us")


@pytest.mark.parametrize("kind,fname,rest", STREAMS, ids=[f for _, f, _ in STREAMS])
def test_stream_vector(kind, fname, rest):
    data = (VEC / fname).read_bytes()
    want = {k: int(v) for k, v in (t.split("=") for t in rest)}
    whole = Framer()
    n_whole = len(whole.feed(data))
    single = Framer()
    n_single = sum(len(single.feed(data[i:i + 1])) for i in range(len(data)))
    for fr in (whole, single):
        for k, v in want.items():
            assert getattr(fr.counters, k) == v, k
    # the unknown type is counted but not returned
    assert n_whole == n_single == want["frames_ok"] - want["unknown_type"]
    # every kind of damage in the file is represented
    assert all(want[k] >= 1 for k in ("bad_crc", "bad_cobs", "bad_length", "bad_version", "too_long"))
