"""The run log: round trip, torn tails, damaged records, limits, and a real kill -9 of the writer."""

import os
import signal
import struct
import subprocess
import sys
import time
import zlib

import msgpack
import numpy as np
import pytest

from tinyloc.errors import InputError
from tinyloc.runtime.loop import PoseEstimate
from tinyloc.runtime.runlog import FILE_MAGIC, HEAD, MAX_RECORD, REC_MAGIC, RunLog, read_runlog


def _pose(k):
    return PoseEstimate(0.1 * k, 1.0 + k, 2.0, 0.5, 46.5, 7.25, np.eye(3) * 0.01, "tracking",
                        [(1.0 + k, 2.0, 0.5, 0.9)], 3.2, "ok")


def test_round_trip(tmp_path):
    p = tmp_path / "a.tlog"
    with RunLog(p, {"map": "site.tlm"}) as log:
        for k in range(5):
            assert log.pose(_pose(k))
        log.event("stopped: test")
    recs, problems = read_runlog(p)
    assert problems == []
    assert recs[0]["k"] == "header" and recs[0]["format"] == "tinyloc-runlog" and recs[0]["map"] == "site.tlm"
    poses = [r for r in recs if r["k"] == "pose"]
    assert [r["x"] for r in poses] == [1.0, 2.0, 3.0, 4.0, 5.0]
    assert poses[0]["cov"][0][0] == pytest.approx(0.01) and poses[0]["quality"] == "tracking"
    assert recs[-1] == {"k": "event", "text": "stopped: test"}
    # each record is framed as documented: magic, length, CRC-32 of the payload (zlib.crc32 = IEEE 802.3)
    data = p.read_bytes()
    assert data.startswith(FILE_MAGIC)
    magic, length, crc = HEAD.unpack_from(data, len(FILE_MAGIC))
    payload = data[len(FILE_MAGIC) + HEAD.size:len(FILE_MAGIC) + HEAD.size + length]
    assert magic == REC_MAGIC and zlib.crc32(payload) == crc and msgpack.unpackb(payload)["k"] == "header"


def test_appending_to_an_existing_log_keeps_one_header(tmp_path):
    p = tmp_path / "a.tlog"
    with RunLog(p) as log:
        log.pose(_pose(0))
    with RunLog(p) as log:
        log.pose(_pose(1))
    recs, problems = read_runlog(p)
    assert problems == [] and [r["k"] for r in recs] == ["header", "pose", "pose"]


@pytest.mark.parametrize("cut", [1, 5, HEAD.size, HEAD.size + 3])
def test_torn_tail_loses_only_the_last_record(tmp_path, cut):
    p = tmp_path / "a.tlog"
    with RunLog(p) as log:
        for k in range(4):
            log.pose(_pose(k))
    full = p.read_bytes()
    with RunLog(p) as log:
        log.pose(_pose(99))
    data = p.read_bytes()
    p.write_bytes(data[:len(full) + cut])  # the last record cut short at `cut` bytes
    recs, problems = read_runlog(p)
    assert [r["x"] for r in recs if r["k"] == "pose"] == [1.0, 2.0, 3.0, 4.0]
    assert len(problems) == 1 and "torn tail" in problems[0]


def test_damaged_record_in_the_middle_is_skipped(tmp_path):
    p = tmp_path / "a.tlog"
    with RunLog(p) as log:
        for k in range(6):
            log.pose(_pose(k))
    data = bytearray(p.read_bytes())
    # flip a byte inside the third pose record's payload: its CRC fails, the reader resyncs
    offs = [i for i in range(len(data) - 1) if data[i:i + 2] == REC_MAGIC]
    data[offs[3] + HEAD.size + 5] ^= 0x40
    p.write_bytes(bytes(data))
    recs, problems = read_runlog(p)
    xs = [r["x"] for r in recs if r["k"] == "pose"]
    assert xs == [1.0, 2.0, 4.0, 5.0, 6.0]
    assert len(problems) == 1 and "CRC mismatch" in problems[0]


def test_declared_length_is_checked_before_reading(tmp_path):
    p = tmp_path / "a.tlog"
    with RunLog(p) as log:
        log.pose(_pose(0))
    good = p.read_bytes()
    # a record claiming one byte more than the limit, followed by nothing: rejected, not allocated
    p.write_bytes(good + HEAD.pack(REC_MAGIC, MAX_RECORD + 1, 0) + b"x" * 16)
    recs, problems = read_runlog(p)
    assert sum(r["k"] == "pose" for r in recs) == 1
    assert "out of range" in problems[0]
    # at the limit the length is accepted (then found cut short: a torn tail)
    p.write_bytes(good + HEAD.pack(REC_MAGIC, MAX_RECORD, 0) + b"x" * 16)
    recs, problems = read_runlog(p)
    assert "torn tail" in problems[0]


def test_not_a_run_log(tmp_path):
    p = tmp_path / "x.tlog"
    p.write_bytes(b"hello world")
    with pytest.raises(InputError, match="not a tinyloc run log"):
        read_runlog(p)


WRITER = r"""
import sys, time
import numpy as np
from tinyloc.runtime.runlog import RunLog
log = RunLog(sys.argv[1])
k = 0
while True:
    log.append({"k": "pose", "i": k, "pad": "x" * 200})
    k += 1
    if k % 50 == 0:
        print(k, flush=True)
"""


def test_kill_9_loses_at_most_the_last_record(tmp_path):
    p = tmp_path / "k.tlog"
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(p)], stdout=subprocess.PIPE, text=True)
    try:
        for _ in range(3):  # let it write a few hundred records
            assert proc.stdout.readline()
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    recs, problems = read_runlog(p)
    idx = [r["i"] for r in recs if r["k"] == "pose"]
    assert len(idx) >= 150
    assert idx == list(range(len(idx)))  # nothing lost or reordered before the end
    assert len(problems) <= 1 and all("torn tail" in s for s in problems)
