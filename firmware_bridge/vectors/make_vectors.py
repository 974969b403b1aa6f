"""Write the shared known-answer vectors (run once; the files are checked in and frozen).

Both sides must decode every ``*.bin`` here to the fields in ``vectors.txt`` and
encode those fields back to the identical bytes: tests/test_link_vectors.py does it
in Python, test_tlink.c in C. Regenerating changes the files; a diff in git review
then shows that the wire format changed.

Manifest grammar (one vector per line, ``#`` comments)::

    frame FILE TYPE seq=N t_us=N field=value ...     one frame; values exact (floats are binary32 values)
    stream FILE counter=N ...                        a byte stream and the decoder counters it must produce
"""

from __future__ import annotations

import random
import struct
from pathlib import Path

from tinyloc.link import cobs, messages as m
from tinyloc.link.crc import crc32

HERE = Path(__file__).resolve().parent


def f32(v: float) -> float:
    return struct.unpack("<f", struct.pack("<f", v))[0]


def text(s: str) -> str:
    return s  # no spaces allowed in the manifest; NUL-padding is implied


VECTORS = [
    ("pose_tracking", m.Pose(12.345678, 103.25, -47.5, f32(1.2345), 44.4412345, -101.2471234,
                             ((f32(0.04), f32(0.001), 0.0), (f32(0.001), f32(0.09), f32(-0.002)),
                              (0.0, f32(-0.002), f32(0.0025))), "tracking", "ok", 18.5), 7),
    ("pose_nofix", m.Pose(0.0, float("nan"), float("nan"), float("nan"), float("nan"), float("nan"),
                          ((f32(1e6), 0.0, 0.0), (0.0, f32(1e6), 0.0), (0.0, 0.0, f32(10.0))),
                          "no-fix", "waiting-for-map", 0.0), 0),
    ("pose_degraded_south_west", m.Pose(86400.000001, -1.5, 2.25, -3.0, -44.4412345, -101.2471234,
                                        ((0.25, 0.0, 0.0), (0.0, 0.25, 0.0), (0.0, 0.0, f32(0.01))),
                                        "degraded", "few-features-in-view-xyz", 33.0), 65535),
    ("status_running", m.Status(5.5, "running", "tracking", 3, 1200, 4, 2, "all-good"), 11),
    ("timesync_reply", m.TimeSync(100.0, "reply", 99.999, 100.0000005, 100.000002), 42),
    ("odometry", m.Odometry(1.25, 3.5, -0.75, f32(0.3), f32(1.1), f32(-0.05), 123456, -654321, 1), 300),
    ("imu", m.Imu(1.255, f32(0.12), f32(-0.03), f32(9.79), f32(0.001), f32(-0.002), f32(0.01), 0), 301),
    ("heartbeat", m.Heartbeat(2.0, 123456789, 1000, 3, 2, 1, 4, 0xBEEF), 302),
    # Bytes with zeros in the header (seq 0x0100, t = 0) exercise COBS code bytes of 1.
    ("odometry_zeros", m.Odometry(0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0, 0, 0), 0x0100),
]


def fields(msg) -> list[str]:
    """Wire-level field values, the same names as the C structs."""
    code, payload = m.encode_payload(msg)
    if code == m.Pose.TYPE:
        x, y, yaw, lat, lon, *cov, fms, q, _r, st = struct.unpack("<fffii6ffBB24s", payload)
        vals = dict(x_m=x, y_m=y, yaw_rad=yaw, lat_e7=lat, lon_e7=lon,
                    **{f"cov{i}": c for i, c in enumerate(cov)}, frame_ms=fms, quality=q,
                    status=st.rstrip(b"\0").decode())
    elif code == m.Status.TYPE:
        s, q, fl, fi, fd, le, tx = struct.unpack("<BBHIII24s", payload)
        vals = dict(state=s, quality=q, flags=fl, frames_in=fi, frames_dropped=fd, link_errors=le,
                    text=tx.rstrip(b"\0").decode())
    elif code == m.TimeSync.TYPE:
        a, b, c, ph = struct.unpack("<qqqB3x", payload)
        vals = dict(t_origin_us=a, t_receive_us=b, t_transmit_us=c, phase=ph)
    elif code == m.Odometry.TYPE:
        x, y, yaw, v, w, lt, rt, fl = struct.unpack("<fffffiiB3x", payload)
        vals = dict(x_m=x, y_m=y, yaw_rad=yaw, speed_mps=v, yaw_rate_radps=w, left_ticks=lt, right_ticks=rt,
                    flags=fl)
    elif code == m.Imu.TYPE:
        fx, fy, fz, gx, gy, gz, fl = struct.unpack("<ffffffB3x", payload)
        vals = dict(fx=fx, fy=fy, fz=fz, gx=gx, gy=gy, gz=gz, flags=fl)
    else:
        up, ok, bc, rs, st, rc, fl = struct.unpack("<IIIIBBH", payload)
        vals = dict(uptime_ms=up, rx_ok=ok, rx_bad_crc=bc, rx_resyncs=rs, state=st, reset_cause=rc, flags=fl)
    out = []
    for k, v in vals.items():
        if isinstance(v, float):
            out.append(f"{k}={'nan' if v != v else repr(v)}")
        else:
            out.append(f"{k}={v}")
    return out


def main() -> None:
    lines = ["# Shared known-answer vectors of the tinyloc wire protocol v1 (see make_vectors.py).",
             "# frame FILE TYPE seq=N t_us=N fields...   |   stream FILE counters..."]
    frames = {}
    for name, msg, seq in VECTORS:
        wire = m.encode_frame(msg, seq)
        frames[name] = wire
        (HERE / f"{name}.bin").write_bytes(wire)
        lines.append(f"frame {name}.bin {msg.NAME} seq={seq} t_us={round(msg.t * 1e6)} " + " ".join(fields(msg)))
    # A stream with every kind of damage the decoder counts, each followed by an intact frame.
    rng = random.Random(20261202)
    good = [frames[n] for n, _, _ in VECTORS]
    s = bytearray()
    s += bytes(rng.randrange(1, 256) for _ in range(40))           # line noise, no delimiter (1 bad run)
    s += good[0]
    bad = bytearray(good[1])
    bad[20] ^= 0x10                                                # flipped bit -> bad_crc
    s += bad + good[1]
    s += b"\x00" + b"\x05\x01\x02" + b"\x00" + good[2]             # COBS block past the end -> bad_cobs
    s += b"\x00" + cobs.encode(b"\x01\x02\x03") + b"\x00" + good[3]  # 3 bytes -> bad_length
    raw = bytearray(m.frame_bytes(0x10, 5, 0, b"\x00" * 31))       # 31 < 32-byte odometry layout -> bad_length
    s += b"\x00" + cobs.encode(raw) + b"\x00" + good[4]
    raw = bytearray(m.frame_bytes(0x10, 5, 0, b"\x00" * 32))
    raw[0] = 2
    raw[-4:] = struct.pack("<I", crc32(bytes(raw[:-4])))          # version 2 -> bad_version
    s += b"\x00" + cobs.encode(raw) + b"\x00" + good[5]
    s += b"\x00" + b"\x07" * 300 + b"\x00" + good[6]               # 300 bytes without delimiter -> too_long
    s += m.encode_frame(m.Unknown(1.0, 0x7E, b"future"), 9)        # unknown type: ok but skipped
    s += good[7] + good[8] + good[0][:30]                           # truncated frame at the end: left pending
    (HERE / "stream_damaged.bin").write_bytes(bytes(s))
    # The 40 noise bytes are followed by good[0]'s leading delimiter; they form one run of
    # random bytes, whatever their COBS reading, so the counter it lands in is recorded as measured.
    from tinyloc.link.framer import Framer
    fr = Framer()
    fr.feed(bytes(s))
    c = fr.counters
    lines.append("stream stream_damaged.bin " + " ".join(
        f"{k}={getattr(c, k)}" for k in ("frames_ok", "bad_crc", "bad_cobs", "bad_length", "bad_version",
                                         "too_long", "unknown_type", "resyncs")))
    (HERE / "vectors.txt").write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
