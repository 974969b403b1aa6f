"""The C side (firmware_bridge/): strict build, host tests under sanitizers, config #errors, and the
example MCU loop talking to the Python endpoint over a pseudo-terminal pair.

Compiled with the system C compiler; skipped, saying so, when there is none.
"""

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from tinyloc.link import messages as m, open_endpoint

from _link_helpers import PtyCable

FB = Path(__file__).resolve().parents[1] / "firmware_bridge"
CC = os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc") or shutil.which("clang")
STRICT = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-Wshadow", "-Wconversion", "-Wstrict-prototypes"]
SAN = ["-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-fno-omit-frame-pointer"]

pytestmark = pytest.mark.skipif(CC is None, reason="no C compiler (cc, gcc or clang) on PATH; the C side is untested")


def build(out: Path, sources, extra=()):
    cmd = [CC, *STRICT, *extra, *[str(FB / s) for s in sources], "-o", str(out)]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    return r


@pytest.fixture(scope="module")
def sanitized(tmp_path_factory):
    exe = tmp_path_factory.mktemp("c") / "test_tlink_san"
    r = build(exe, ["tlink.c", "test_tlink.c"], ["-O1", "-g", *SAN])
    if r.returncode != 0 and "sanitiz" in r.stderr.lower() and ("cannot find" in r.stderr or "unrecognized" in r.stderr):
        r = build(exe, ["tlink.c", "test_tlink.c"], ["-O1"])   # compiler without sanitizer runtimes
    assert r.returncode == 0, r.stderr
    return exe


def test_host_tests_pass_under_sanitizers(sanitized):
    r = subprocess.run([str(sanitized), str(FB / "vectors")], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "0 failures" in r.stdout and "vectors: 9 frames, 1 streams" in r.stdout
    assert "0 wrong accepted" in r.stdout


@pytest.mark.parametrize("flags", [["-DTLINK_CRC_TABLE=16"], ["-DTLINK_CRC_TABLE=0"], ["-DTLINK_MAX_PAYLOAD=80"],
                                   ["-DTLINK_USE_CONFIG"]], ids=["crc16", "crc-bitwise", "payload80", "config-file"])
def test_build_variants(tmp_path, flags):
    exe = tmp_path / "t"
    r = build(exe, ["tlink.c", "test_tlink.c"], ["-O2", *flags])
    assert r.returncode == 0, r.stderr
    r = subprocess.run([str(exe), str(FB / "vectors")], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "0 failures" in r.stdout, r.stdout + r.stderr


@pytest.mark.parametrize("flags,msg", [(["-DTLINK_MAX_PAYLOAD=50"], "largest message"),
                                       (["-DTLINK_MAX_PAYLOAD=201"], "at most 200"),
                                       (["-DTLINK_CRC_TABLE=8"], "must be 0, 16 or 256")])
def test_inconsistent_options_stop_the_build(tmp_path, flags, msg):
    r = build(tmp_path / "t", ["tlink.c", "test_tlink.c"], flags)
    assert r.returncode != 0 and msg in r.stderr


def _python_decode(stream: bytes):
    """The Python framer's view of a stream, in the C program's --decode format."""
    from tinyloc.link.framer import Framer

    fr = Framer(keep_unknown=True)
    lines = []
    for msg in fr.feed(stream):
        raw = m.cobs.decode(m.encode_frame(msg)[1:-1])
        lines.append(f"frame {raw[1]} {msg.seq} {round(msg.t * 1e6)} {raw[13:-4].hex()}")
    c = fr.counters
    lines.append("counters " + " ".join(f"{k}={getattr(c, k)}" for k in (
        "bytes_in", "frames_ok", "bad_crc", "bad_cobs", "bad_length", "bad_version", "too_long", "unknown_type",
        "resyncs")))
    return lines


def test_c_and_python_decoders_agree_on_damaged_streams(sanitized):
    """Differential test: the same damaged byte stream through both decoders gives the same frames and counters."""
    import random

    rnd = random.Random(4242)
    good = []
    for i in range(300):
        k = i % 4
        if k == 0:
            msg = m.Pose(i * 0.01, rnd.uniform(-99, 99), rnd.uniform(-99, 99), 0.1, 44.44, -101.25, quality="tracking")
        elif k == 1:
            msg = m.Odometry(i * 0.01, rnd.uniform(-9, 9), 0.0, 0.0, left_ticks=i)
        elif k == 2:
            msg = m.Heartbeat(i * 0.01, i)
        else:
            msg = m.Unknown(i * 0.01, 0x90, bytes(rnd.randrange(256) for _ in range(rnd.randrange(0, 201))))
        good.append(m.encode_frame(msg, i))
    stream = bytearray()
    for f in good:
        b = bytearray(f)
        op = rnd.randrange(6)
        j = rnd.randrange(1, len(b) - 1)
        if op == 0:
            b[j] ^= 1 << rnd.randrange(8)
        elif op == 1:
            b.insert(j, rnd.randrange(256))
        elif op == 2:
            del b[j]
        elif op == 3:
            b = b[:j]
        elif op == 4:
            stream += bytes(rnd.randrange(256) for _ in range(rnd.randrange(300)))
        stream += b
    stream += bytes([7]) * 500 + good[0] + bytes(rnd.randrange(1, 256) for _ in range(2000)) + good[1]
    r = subprocess.run([str(sanitized), "--decode"], input=bytes(stream), capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr
    c_lines = r.stdout.decode().splitlines()
    py_lines = _python_decode(bytes(stream))
    assert c_lines == py_lines
    assert len(c_lines) > 60                                   # about a third of the frames are left intact
    assert "bad_crc=0" not in c_lines[-1] and "too_long=0" not in c_lines[-1]


_GOOD = [m.encode_frame(x, i) for i, x in enumerate([
    m.Pose(1.0, 2.0, 3.0, 0.5, 44.44, -101.25, quality="tracking"), m.Odometry(2.0, 1.0, 0.0, 0.0),
    m.Imu(3.0, 0.0, 0.0, 9.81), m.Heartbeat(4.0, 7), m.Unknown(5.0, 0x99, bytes(range(1, 60))),
    m.TimeSync(6.0, "request", 6.0)])]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.one_of(st.sampled_from(range(len(_GOOD))), st.binary(max_size=80)), max_size=12),
       st.lists(st.tuples(st.integers(0, 10 ** 6), st.integers(0, 255)), max_size=6))
def test_c_and_python_agree_on_hypothesis_streams(sanitized, parts, edits):
    """Property: for any mix of frames, noise and byte edits, both decoders give the same output."""
    stream = bytearray()
    for p in parts:
        stream += _GOOD[p] if isinstance(p, int) else p
    for pos, val in edits:
        if stream:
            stream[pos % len(stream)] = val
    r = subprocess.run([str(sanitized), "--decode"], input=bytes(stream), capture_output=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert r.stdout.decode().splitlines() == _python_decode(bytes(stream))


def test_example_builds_strict(tmp_path):
    r = build(tmp_path / "ex", ["tlink.c", "example_mcu.c", "uart_shim_posix.c"], ["-O2", "-DEXAMPLE_HOST"])
    assert r.returncode == 0, r.stderr
    # and the MCU part alone builds without the host shim (no main, no POSIX)
    r = subprocess.run([CC, *STRICT, "-c", str(FB / "example_mcu.c"), "-o", str(tmp_path / "ex.o")],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pseudo-terminal test needs Linux ptys")
def test_example_mcu_over_pty_with_python_host(tmp_path):
    exe = tmp_path / "example_mcu"
    r = build(exe, ["tlink.c", "example_mcu.c", "uart_shim_posix.c"], ["-O2", "-DEXAMPLE_HOST"])
    assert r.returncode == 0, r.stderr
    cable = PtyCable(tmp_path, baud=115200)
    try:
        proc = subprocess.Popen([str(exe), str(cable.end_b)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True, env={**os.environ, "EXAMPLE_RUN_SECONDS": "2.6"})
        host = open_endpoint(str(cable.end_a), timesync_s=0.25)
        time.sleep(0.2)
        got, n = [], 0
        t0 = time.monotonic()
        while time.monotonic() - t0 < 1.5:         # 100 Hz poses for 1.5 s
            while n < (time.monotonic() - t0) * 100:
                q = "tracking" if n % 2 else "degraded"
                assert host.send(m.Pose(n * 0.01, n * 0.5, 1.0, 0.2, 44.44, -101.25, quality=q, status="ok"))
                n += 1
            got += host.poll()
            time.sleep(0.001)
        end = time.monotonic() + 1.0
        while time.monotonic() < end:
            got += host.poll()
            time.sleep(0.002)
        out, err = proc.communicate(timeout=10)
        assert proc.returncode == 0, err
        res = json.loads(out)
        # every pose arrived and was decoded by the C side; only "tracking" ones count as trusted
        assert res["poses_received"] == n and res["poses_trusted"] == n // 2
        assert res["rx_bad_crc"] == 0 and res["rx_resyncs"] == 0
        assert res["last_pose_t_us"] == (n - 1) * 10000 and res["last_x_m"] == pytest.approx((n - 1) * 0.5)
        kinds = [g.NAME for g in got]
        assert kinds.count("odometry") >= 60 and kinds.count("imu") >= 60 and kinds.count("heartbeat") >= 2
        # Time sync against the C side's replies: both ends read CLOCK_MONOTONIC of this machine,
        # so the true offset is 0; the estimate must be within its own bound (half the round trip).
        assert host.clock.replies >= 4
        assert abs(host.clock.offset_s) <= host.clock.delay_s / 2 + 2e-6 and host.clock.delay_s < 0.1
        assert not [g for g in got if g.NAME == "timesync"]      # consumed by the endpoint
        c = host.counters
        assert c.resyncs == 0 and c.seq_lost == 0 and c.frames_ok == len(got) + host.clock.replies
        hb = [g for g in got if g.NAME == "heartbeat"][-1]
        assert 0 < hb.rx_ok <= c.frames_out
        host.close()
    finally:
        cable.close()
