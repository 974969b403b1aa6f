"""``tinyloc bench link``: wire-protocol encode+decode rate on the host, and the C decoder's bytes/s.

Figures (medians over repeats):

- ``py_frames_per_s``: one pose encoded to a wire frame (COBS + CRC-32) and decoded back
  through the streaming framer, per second;
- ``msgpack_frames_per_s``: the baseline, ``msgpack.packb`` + ``msgpack.unpackb`` of the
  same message's map form (what the UDP endpoint does, minus validation);
- ``py_decode_bytes_per_s``: the framer alone on a long stream of pose frames;
- ``c_decode_bytes_per_s``: firmware_bridge/tlink.c built with the system compiler (-O2)
  decoding a stream of pose frames byte by byte (skipped when there is no compiler).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import statistics
import subprocess
import tempfile
import time
from pathlib import Path

import msgpack

NAME = "link"
HELP = "wire-protocol encode+decode frames/s vs msgpack, and the C decoder's bytes/s"
FB = Path(__file__).resolve().parents[2] / "firmware_bridge"


def add_arguments(p):
    p.add_argument("--frames", type=int, default=20000, help="frames per timed run (default 20000)")
    p.add_argument("--repeat", type=int, default=5, help="timed runs per figure (default 5)")
    p.add_argument("--c-seconds", type=float, default=0.5, help="duration of the C decoder run (default 0.5 s)")


def _rate(fn, n, repeat):
    fn(max(1, n // 10))  # warm-up
    ts = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn(n)
        ts.append(time.perf_counter() - t0)
    return n / statistics.median(ts)


def _c_bench(seconds: float):
    cc = os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc") or shutil.which("clang")
    if cc is None or not (FB / "tlink.c").is_file():
        return None, "no C compiler on PATH"
    with tempfile.TemporaryDirectory() as tmp:
        exe = Path(tmp) / "test_tlink"
        r = subprocess.run([cc, "-std=c99", "-O2", str(FB / "tlink.c"), str(FB / "test_tlink.c"), "-o", str(exe)],
                           capture_output=True, text=True)
        if r.returncode != 0:
            return None, "C build failed: " + (r.stderr.strip().splitlines() or ["?"])[0]
        r = subprocess.run([str(exe), "--bench", str(seconds)], capture_output=True, text=True, timeout=60)
        if r.returncode != 0:
            return None, "C benchmark failed"
        return json.loads(r.stdout), cc


def run(args) -> dict:
    from ..link import messages as m
    from ..link.framer import Framer

    pose = m.Pose(12.345678, 103.25, -47.5, 1.2345, 44.4412345, -101.2471234,
                  ((0.04, 0.001, 0.0), (0.001, 0.09, -0.002), (0.0, -0.002, 0.0025)), "tracking", "ok", 18.5, 7)
    n, rep = args.frames, args.repeat

    def ours(k):
        fr = Framer()
        enc, feed = m.encode_frame, fr.feed
        for i in range(k):
            feed(enc(pose, i))

    mp = m.to_map(pose)

    def baseline(k):
        packb, unpackb = msgpack.packb, msgpack.unpackb
        for _ in range(k):
            unpackb(packb(mp))

    stream = b"".join(m.encode_frame(pose, i) for i in range(2000))

    def decode_only(k):
        fr = Framer()
        for _ in range(k):
            fr.feed(stream)

    py = _rate(ours, n, rep)
    base = _rate(baseline, n, rep)
    dec = _rate(decode_only, max(1, n // 2000), rep) * len(stream)
    res = {
        "py_frames_per_s": py,
        "msgpack_frames_per_s": base,
        "py_vs_msgpack": py / base,
        "py_decode_bytes_per_s": dec,
        "pose_wire_bytes": len(m.encode_frame(pose)),
        "msgpack_map_bytes": len(msgpack.packb(mp)),
        "line_115200_poses_per_s": 11520.0 / len(m.encode_frame(pose)),
    }
    c, how = _c_bench(args.c_seconds)
    if c is None:
        res["c_decode_bytes_per_s"] = math.nan
        res["c_note"] = how
    else:
        res["c_decode_bytes_per_s"] = float(c["c_decode_bytes_per_s"])
        res["c_decode_frames_per_s"] = float(c["c_decode_frames_per_s"])
        res["c_vs_py_decode"] = res["c_decode_bytes_per_s"] / dec
    return res
