"""Endpoints: loop://, UDP, JSON lines, URL handling, rate limiting, and a real pseudo-terminal link.

The pseudo-terminal tests join two pty pairs with a relay paced at 115200 baud (8N1), open
both ends with pyserial through symlinks, and stream 100 Hz poses; one test unplugs the
"cable" mid-stream (closes the ptys, the device files vanish) and plugs in a new one.
"""

import io
import json
import os
import sys
import time

import pytest

from tinyloc.errors import LinkError
from tinyloc.link import messages as m, open_endpoint
from tinyloc.link.endpoint import RateLimiter
from tinyloc.link.serial_port import SerialEndpoint

from _link_helpers import PtyCable

needs_pty = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pseudo-terminal tests need Linux ptys")


def pose(i, t0=0.0):
    return m.Pose(t0 + i * 0.01, 100.0 + i * 0.01, -20.0, 0.5, 44.44 + i * 1e-7, -101.25, ((0.1, 0, 0), (0, 0.1, 0),
                  (0, 0, 0.01)), "tracking", f"frame {i}", 15.0)


def wire_view(msg):
    """What a message looks like after a trip over the wire (binary32 rounding)."""
    return m.decode_frame(m.encode_frame(msg)[1:-1])


# The round trip runs on pyserial's loop:// by default, and also on a real port when one is given:
# TINYLOC_TEST_PORT=/dev/ttyUSB0 (a port whose TX is wired to its RX) pytest tests/test_link_endpoints.py
LOOP_PORTS = ["loop://"] + [p for p in os.environ.get("TINYLOC_TEST_PORT", "").split(",") if p]


@pytest.mark.parametrize("url", LOOP_PORTS)
def test_loop_url_round_trip(url):
    with open_endpoint(url) as ep:
        sent = [pose(i) for i in range(20)] + [m.Odometry(1.0, 1, 2, 3), m.Heartbeat(2.0, 99)]
        for msg in sent:
            assert ep.send(msg)
        got = []
        for _ in range(200):
            got += ep.poll()
            if len(got) == len(sent):
                break
            time.sleep(0.005)
        assert [m.encode_frame(g) for g in got] == [m.encode_frame(wire_view(s), i) for i, s in enumerate(sent)]
        c = ep.counters
        assert c.frames_ok == c.frames_out == 22 and c.resyncs == 0 and c.seq_lost == 0
        assert 0.0 <= ep.rx_age_s < 1.0
    assert open_endpoint("loop://").rx_age_s == float("inf")


def test_send_accepts_pose_estimate_like_objects_and_counts_bad_ones():
    from types import SimpleNamespace

    with open_endpoint("loop://") as ep:
        est = SimpleNamespace(t=1.0, x=1.0, y=2.0, yaw=0.0, lat=44.44, lon=-101.25, cov=[[1, 0, 0], [0, 1, 0], [0, 0, 1]],
                              quality="searching", status="lost", modes=[], frame_ms=3.0)
        assert ep.send(est)
        assert not ep.send(SimpleNamespace(t=1.0, x=1.0, y=2.0, yaw=0.0, cov=None, quality="x"))
        assert not ep.send(m.Pose(0.0, 0, 0, 0, quality="excellent"))
        assert ep.counters.bad_message == 2
        got = ep.poll()
        assert len(got) == 1 and got[0].quality == "searching" and got[0].status == "lost"


def test_time_sync_on_loop_answers_itself():
    # loop:// echoes: our request comes back as a request, is answered, and the reply comes back.
    # Same clock on both "ends", so the offset must be within half the round trip of 0.
    with open_endpoint("loop://", timesync_s=0.02) as ep:
        got = []
        t0 = time.monotonic()
        while time.monotonic() - t0 < 0.2:
            got += ep.poll()
            time.sleep(0.002)
        assert got == []                               # time-sync traffic is handled, not returned
        cs = ep.clock
        assert cs.replies >= 3 and abs(cs.offset_s) <= cs.delay_s / 2 + 2e-6
        assert ep.to_host_time(10.0) == pytest.approx(10.0 - cs.offset_s)
    no_sync = open_endpoint("loop://")
    assert no_sync.to_host_time(5.0) == 5.0 and no_sync.clock is None
    no_sync.close()


def test_rate_limit_per_type():
    clock = [0.0]
    rl = RateLimiter({"pose": 10.0}, clock=lambda: clock[0])
    allowed = 0
    for i in range(100):            # 100 Hz for 1 s
        clock[0] = i * 0.01
        allowed += rl.allow("pose")
        assert rl.allow("odometry")  # types not named are not limited
    assert 10 <= allowed <= 12      # 10 Hz plus the burst of 2
    ep = SerialEndpoint("loop://", rate_hz=5.0, clock=lambda: clock[0])
    clock[0] = 10.0
    sent = sum(ep.send(pose(i)) for i in range(10))
    assert sent == 2 and ep.counters.dropped_rate == 8


def test_transmit_queue_is_capped():
    ep = SerialEndpoint("loop://", tx_queue_bytes=1000)
    results = [ep.send(pose(i)) for i in range(200)]   # nobody reads: the 4 KiB loop buffer fills, then the queue
    c = ep.counters
    assert c.dropped_busy > 0 and ep.tx_pending <= 1000
    assert c.frames_out == sum(results)
    ep.close()


def test_unopenable_port_is_a_one_line_error_or_waits():
    with pytest.raises(LinkError, match="/dev/tinyloc-no-such-port: cannot open"):
        open_endpoint("/dev/tinyloc-no-such-port")
    ep = open_endpoint("/dev/tinyloc-no-such-port", wait=True)
    assert not ep.connected and not ep.send(pose(0)) and ep.counters.dropped_down == 1
    assert ep.poll() == []
    ep.close()


@pytest.mark.parametrize("url,fault", [
    ("ftp://host", "unknown link scheme"),
    ("udp://127.0.0.1", "expected HOST:PORT"),
    ("udp://127.0.0.1:99999", "out of range"),
    ("udp://127.0.0.1:5000?colour=red", "unknown option"),
    ("udp://10.1.2.3:5000", "binds to loopback by default"),
    ("", "empty"),
])
def test_bad_urls(url, fault):
    with pytest.raises(LinkError, match=fault):
        open_endpoint(url)


def test_unknown_keyword_is_a_link_error():
    with pytest.raises(LinkError, match="baudrate"):
        open_endpoint("loop://", baudrate=9600)


def test_udp_round_trip_both_ways():
    rx = open_endpoint("udp-listen://127.0.0.1:0")
    tx = open_endpoint(f"udp://127.0.0.1:{rx.address[1]}")
    assert rx.address[0] == "127.0.0.1" and tx.address[0] == "127.0.0.1"   # loopback by default
    sent = [pose(i) for i in range(50)]
    for p in sent:
        assert tx.send(p)
    got = []
    end = time.monotonic() + 2.0
    while len(got) < 50 and time.monotonic() < end:
        got += rx.poll()
    assert got == [p.__class__(**{**{f: getattr(p, f) for f in p.__dataclass_fields__}, "seq": i})
                   for i, p in enumerate(sent)]          # float64 map form: exact values
    assert rx.counters.seq_lost == 0
    assert rx.send(m.Heartbeat(1.0, 5))                   # answers the last sender
    back = []
    end = time.monotonic() + 2.0
    while not back and time.monotonic() < end:
        back = tx.poll()
    assert back[0].uptime_ms == 5
    # garbage datagrams are counted and skipped
    tx._sock.sendto(b"\x93\x01\x02\x03", rx.address)
    tx._sock.sendto(b"\xc1", rx.address)
    time.sleep(0.05)
    assert rx.poll() == [] and rx.counters.bad_map == 2
    tx.close()
    rx.close()


def test_jsonl_lines():
    out = io.StringIO()
    ep = open_endpoint("-", stream=out)
    ep.send(m.Pose(1.0, 1.0, 2.0, 0.0))
    ep.send(m.Odometry(2.0, 1, 2, 3))
    lines = [json.loads(s) for s in out.getvalue().splitlines()]
    assert lines[0]["type"] == "pose" and lines[0]["lat"] is None and lines[0]["seq"] == 0
    assert lines[1]["type"] == "odometry" and lines[1]["seq"] == 1


def test_jsonl_file(tmp_path):
    path = tmp_path / "poses.jsonl"
    with open_endpoint(f"jsonl:{path}") as ep:
        for i in range(3):
            ep.send(pose(i))
    rows = [json.loads(s) for s in path.read_text().splitlines()]
    assert [r["x"] for r in rows] == [pose(i).x for i in range(3)]


# ---------------------------------------------------------------- pseudo-terminal pair

def _pump(a, b, seconds, sent, got_a, got_b, *, rate_hz=100.0, i0=0, on_tick=None):
    """Send 100 Hz poses from a to b for ``seconds``, polling both; returns the next pose index."""
    t0 = time.monotonic()
    i = i0
    while True:
        now = time.monotonic()
        if now - t0 >= seconds:
            break
        if on_tick is not None:
            on_tick(now - t0)
        while i - i0 < (now - t0) * rate_hz:
            p = pose(i)
            if a.send(p):
                sent.append(p)
            i += 1
        got_b += b.poll()
        got_a += a.poll()
        time.sleep(0.001)
    return i


@needs_pty
def test_pty_pair_100hz_at_115200_zero_loss(tmp_path):
    cable = PtyCable(tmp_path, baud=115200)
    try:
        a = open_endpoint(str(cable.end_a), baud=115200)
        b = open_endpoint(str(cable.end_b), baud=115200)
        sent, got_a, got_b = [], [], []
        n = _pump(a, b, 2.0, sent, got_a, got_b)
        for _ in range(300):            # let the line drain (relay paced at 11520 bytes/s)
            got_b += b.poll()
            if len(got_b) == len(sent):
                break
            time.sleep(0.005)
        assert n >= 195 and len(sent) == n          # nothing dropped on the sending side
        assert [m.encode_frame(g) for g in got_b] == [m.encode_frame(wire_view(p), k) for k, p in enumerate(sent)]
        c = b.counters
        assert c.frames_ok == n and c.resyncs == 0 and c.seq_lost == 0 and c.bad_crc == 0
        # ~94 bytes per pose at 100 Hz is ~82 % of the 11520 bytes/s a 115200-baud line carries
        assert a.counters.bytes_out == sum(len(m.encode_frame(p)) for p in sent)
        a.close()
        b.close()
    finally:
        cable.close()


@needs_pty
def test_pty_unplug_replug_reconnects_and_reports_the_gap(tmp_path):
    cable = PtyCable(tmp_path, baud=115200)
    events = []
    try:
        a = open_endpoint(str(cable.end_a), backoff_s=(0.02, 0.2), on_event=events.append)
        b = open_endpoint(str(cable.end_b), backoff_s=(0.02, 0.2), on_event=events.append)
        sent, got_a, got_b = [], [], []
        state = {"unplugged": False, "replugged": False}

        def tick(t):
            if t >= 0.8 and not state["unplugged"]:
                cable.unplug()
                state["unplugged"] = True
            if t >= 1.4 and not state["replugged"]:
                cable.plug()
                state["replugged"] = True

        n = _pump(a, b, 2.6, sent, got_a, got_b, on_tick=tick)
        for _ in range(200):
            got_b += b.poll()
            time.sleep(0.005)
        ca, cb = a.counters, b.counters
        # both ends noticed, and came back by themselves
        assert ca.disconnects >= 1 and ca.reconnects >= 1 and cb.disconnects >= 1 and cb.reconnects >= 1
        assert a.connected and b.connected
        assert any("reconnected after" in e for e in events)
        # the outage (0.6 s) is reported as the gap, give or take the back-off and detection
        assert 0.4 < cb.last_gap_s < 2.0 and 0.4 < ca.last_gap_s < 2.0
        # poses flow again after the replug, and every sequence number is accounted for:
        # received + reported lost = span of sequence numbers seen
        seqs = [g.seq for g in got_b]
        assert seqs == sorted(seqs) and seqs[-1] >= n - 30
        assert len(got_b) + cb.seq_lost == seqs[-1] - seqs[0] + 1
        assert cb.seq_lost >= 40                     # about 0.6 s of 100 Hz poses went missing
        assert ca.dropped_down >= 30
        # nothing damaged was accepted: every pose received is one that was sent
        for g in got_b:
            assert 0 <= g.seq < n and g.x == pytest.approx(100.0 + g.seq * 0.01, abs=1e-4)
        print(f"\nunplug/replug: sent {n}, received {len(got_b)}, receiver seq_lost {cb.seq_lost}, "
              f"gap {cb.last_gap_s:.2f} s (receiver) / {ca.last_gap_s:.2f} s (sender), "
              f"sender dropped_down {ca.dropped_down}; events: {events}")
        a.close()
        b.close()
    finally:
        cable.close()


def test_socket_url_round_trip_and_reconnect():
    # pyserial's socket:// handler against a local TCP echo server that drops the first connection.
    import socket
    import threading

    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(2)
    port = srv.getsockname()[1]

    def serve():
        for k in range(2):
            conn, _ = srv.accept()
            if k == 0:
                data = conn.recv(95)       # take one frame, echo it, then hang up
                conn.sendall(data)
                time.sleep(0.05)
                conn.close()
                continue
            conn.settimeout(2.0)
            try:
                while True:
                    data = conn.recv(4096)
                    if not data:
                        break
                    conn.sendall(data)
            except OSError:
                pass
            conn.close()

    th = threading.Thread(target=serve, daemon=True)
    th.start()
    ep = open_endpoint(f"socket://127.0.0.1:{port}", backoff_s=(0.02, 0.1), on_event=lambda s: None)
    got = []
    assert ep.send(pose(0))
    t0 = time.monotonic()
    while time.monotonic() - t0 < 1.0 and ep.counters.reconnects == 0:
        got += ep.poll()
        time.sleep(0.005)
    assert ep.counters.disconnects == 1 and ep.counters.reconnects == 1
    for i in range(1, 6):
        assert ep.send(pose(i))
    t0 = time.monotonic()
    while time.monotonic() - t0 < 1.0 and len(got) < 6:
        got += ep.poll()
        time.sleep(0.005)
    assert [g.seq for g in got] == list(range(6))
    ep.close()
    srv.close()
    th.join(timeout=3)
