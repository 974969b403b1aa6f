"""Message types: payload layouts, limits, map forms, duck-typed pose input."""

import math
import struct
from types import SimpleNamespace

import msgpack
import numpy as np
import pytest

from tinyloc.errors import ProtocolError
from tinyloc.link import cobs, messages as m
from tinyloc.link.crc import crc32
from tinyloc.link.udp import pack_message, unpack_message


def f32(v):
    return struct.unpack("<f", struct.pack("<f", v))[0]


def sample_messages():
    return [
        m.Pose(3.25, 10.5, -4.0, 0.75, 44.4412345, -101.2476543, ((0.04, 0.01, 0.0), (0.01, 0.09, 0.0), (0.0, 0.0, 0.003)),
               "tracking", "ok", 21.0, seq=3),
        m.Status(4.0, "fault", "degraded", 7, 10, 2, 1, "camera-stalled", seq=4),
        m.TimeSync(5.0, "request", 4.999999, 0.0, 0.0, seq=5),
        m.Odometry(6.0, 1.0, 2.0, -3.0, 0.5, 0.1, -7, 9, 2, seq=6),
        m.Imu(7.0, 0.1, 0.2, 9.8, 0.01, 0.02, 0.03, 1, seq=7),
        m.Heartbeat(8.0, 5000, 12, 1, 2, 0, 1, 3, seq=8),
    ]


def test_payload_sizes_match_the_spec():
    # Sizes written in firmware_bridge/PROTOCOL.md and tlink.h.
    assert m.PAYLOAD_LEN == {0x01: 74, 0x02: 40, 0x03: 28, 0x10: 32, 0x11: 28, 0x12: 20}
    assert m.HEADER_LEN == 13 and m.OVERHEAD == 17 and m.MAX_ENCODED == 218


@pytest.mark.parametrize("msg", sample_messages(), ids=lambda x: x.NAME)
def test_frame_round_trip(msg):
    wire = m.encode_frame(msg)
    assert wire[0] == 0 and wire[-1] == 0 and 0 not in wire[1:-1]
    back = m.decode_frame(wire[1:-1])
    assert type(back) is type(msg) and back.seq == msg.seq and back.t == msg.t
    # Fields survive up to binary32 rounding; re-encoding the decoded message gives the same bytes.
    assert m.encode_frame(back) == wire
    for f in msg.__dataclass_fields__:
        a, b = getattr(msg, f), getattr(back, f)
        if isinstance(a, float):
            assert b == pytest.approx(a, rel=1e-6, abs=1e-6)
        elif f != "cov":
            assert a == b


def test_pose_fields_on_the_wire():
    p = sample_messages()[0]
    wire = m.encode_frame(p)
    raw = cobs.decode(wire[1:-1])
    assert raw[0] == 1 and raw[1] == 0x01 and struct.unpack_from("<H", raw, 2)[0] == 3
    assert struct.unpack_from("<q", raw, 4)[0] == 3250000 and raw[12] == 74
    x, y, yaw, lat, lon = struct.unpack_from("<fffii", raw, 13)
    assert (x, y, yaw) == (10.5, -4.0, 0.75) and lat == 444412345 and lon == -1012476543
    assert struct.unpack_from("<I", raw, len(raw) - 4)[0] == crc32(raw[:-4])
    back = m.decode_frame(wire[1:-1])
    c = np.array(back.cov)
    assert np.array_equal(c, c.T)  # symmetric by construction (upper triangle on the wire)
    assert np.max(np.abs(c - np.array(p.cov))) < 1e-8


def test_nan_latlon_is_unknown_and_huge_cov_saturates():
    p = m.Pose(0.0, math.nan, math.nan, math.nan, cov=((1e300, 0, 0), (0, -1e300, 0), (0, 0, 1.0)))
    back = m.decode_frame(m.encode_frame(p)[1:-1])
    assert math.isnan(back.lat) and math.isnan(back.lon) and math.isnan(back.x)
    assert back.cov[0][0] == math.inf and back.cov[1][1] == -math.inf
    assert back.quality == "no-fix"


def test_text_is_truncated_to_24_bytes():
    p = m.Pose(0.0, 0, 0, 0, status="x" * 40)
    assert m.decode_frame(m.encode_frame(p)[1:-1]).status == "x" * 24


@pytest.mark.parametrize("bad", [
    m.Pose(0.0, 0, 0, 0, quality="great"),
    m.Status(0.0, state="dancing"),
    m.TimeSync(0.0, phase="later"),
    m.Pose(math.inf, 0, 0, 0),
    m.Pose(0.0, 0, 0, 0, cov=((1, 2), (3, 4))),
])
def test_unencodable_messages_raise_protocol_error(bad):
    with pytest.raises(ProtocolError):
        m.encode_frame(bad)


def test_payload_limit_at_the_limit_and_one_past():
    ok = m.frame_bytes(0x70, 1, 0, bytes(range(200)))
    assert len(ok) == m.MAX_FRAME
    enc = cobs.encode(ok)
    assert len(enc) == m.MAX_ENCODED
    assert m.decode_frame(enc).payload == bytes(range(200))
    with pytest.raises(ProtocolError, match="exceeds the limit"):
        m.frame_bytes(0x70, 1, 0, bytes(201))
    # A hand-made 201-byte payload with a valid CRC is rejected by the decoder.
    body = m.HEADER.pack(1, 0x70, 1, 0, 201) + bytes(201)
    raw = body + m.CRC.pack(crc32(body))
    with pytest.raises(m.FrameError) as e:
        m.decode_frame(cobs.encode(raw))
    assert e.value.kind == "too_long"


def test_longer_payload_accepted_shorter_rejected():
    # Forward compatibility: appended fields are ignored; a short payload is malformed.
    _, payload = m.encode_payload(sample_messages()[3])
    longer = m.decode_raw(m.frame_bytes(0x10, 1, 0, payload + b"future"))
    assert longer.x == 1.0
    with pytest.raises(m.FrameError) as e:
        m.decode_raw(m.frame_bytes(0x10, 1, 0, payload[:-1]))
    assert e.value.kind == "bad_length"


def test_unknown_type_and_other_version():
    u = m.decode_raw(m.frame_bytes(0x99, 2, 1000, b"abc"))
    assert type(u) is m.Unknown and u.type == 0x99 and u.payload == b"abc" and u.t == 0.001
    with pytest.raises(m.FrameError) as e:
        m.decode_raw(m.frame_bytes(0x10, 1, 0, bytes(32), version=2))
    assert e.value.kind == "bad_version"


@pytest.mark.parametrize("msg", sample_messages(), ids=lambda x: x.NAME)
def test_map_forms_round_trip_through_msgpack(msg):
    d = m.to_map(msg)
    assert d["type"] == msg.NAME and d["v"] == 1
    back = unpack_message(pack_message(msg, msg.seq))
    assert back == msg  # float64 in the map form: exact


def test_map_form_validation():
    good = m.to_map(sample_messages()[0])
    for key, value in [("quality", "fine"), ("x", "ten"), ("cov", [[1, 2]]), ("seq", 1.5), ("t", True)]:
        bad = dict(good, **{key: value})
        with pytest.raises(ProtocolError):
            m.from_map(bad)
    with pytest.raises(ProtocolError, match="missing field 'x'"):
        m.from_map({k: v for k, v in good.items() if k != "x"})
    with pytest.raises(ProtocolError):
        unpack_message(msgpack.packb([1, 2, 3]))
    with pytest.raises(ProtocolError):
        unpack_message(b"\xc1garbage")
    with pytest.raises(ProtocolError):
        unpack_message(msgpack.packb({"type": "pose", "status": "x" * 5000}))


def test_pose_estimate_like_objects_are_sent_as_poses():
    est = SimpleNamespace(t=1.5, x=1.0, y=2.0, yaw=0.1, lat=44.44, lon=-101.25, cov=np.eye(3) * 0.01,
                          quality="tracking", modes=[], frame_ms=12.0, status="ok")
    p = m.as_message(est)
    assert type(p) is m.Pose and p.cov[2][2] == 0.01 and p.quality == "tracking"
    with pytest.raises(ProtocolError):
        m.as_message(SimpleNamespace(t=1.0))


def test_clock_offset_worked_example():
    # Requester sends at 10.0, responder (clock 2.5 s ahead) receives at 12.6 and replies at 12.7,
    # requester receives at 10.3: one-way delay 0.1 s each way.
    off, delay = m.clock_offset(10.0, 12.6, 12.7, 10.3)
    assert off == pytest.approx(2.5) and delay == pytest.approx(0.2)


def test_reserved_timesync_phase_is_skipped_not_damage():
    _, payload = m.encode_payload(m.TimeSync(1.0, "reply", 1.0, 2.0, 3.0))
    payload = payload[:24] + b"\x07" + payload[25:]
    u = m.decode_raw(m.frame_bytes(0x03, 4, 0, payload))
    assert type(u) is m.Unknown and u.type == 0x03


@pytest.mark.parametrize("bad", [
    m.Pose(0.0, "east", 0, 0), m.Pose(0.0, 0, 0, 0, lat="north"), m.Pose(0.0, 0, 0, 0, lat=500.0),
    m.Pose("noon", 0, 0, 0), m.Odometry(0.0, 0, 0, 0, flags=math.nan), m.Imu(0.0, None, 0, 0),
    m.Heartbeat(0.0, uptime_ms="long"), m.Pose(0.0, 0, 0, 0, status=None, frame_ms=[1]),
], ids=lambda x: type(x).__name__)
def test_garbage_fields_raise_protocol_error_only(bad):
    with pytest.raises(ProtocolError):
        m.encode_frame(bad)
    from tinyloc.link.serial_port import SerialEndpoint

    import io

    from tinyloc.link import open_endpoint

    rx = open_endpoint("udp-listen://127.0.0.1:0")
    for ep in (SerialEndpoint("loop://"), open_endpoint(f"udp://127.0.0.1:{rx.address[1]}"),
               open_endpoint("-", stream=io.StringIO()), open_endpoint("nmea:-", stream=io.StringIO())):
        if type(bad) is not m.Pose and "nmea" in ep.url:
            continue
        assert ep.send(bad) is False and ep.counters.bad_message == 1   # in the loop: counted, never raised
        ep.close()
    rx.close()


def test_no_fix_estimate_with_nones_goes_out_flagged():
    est = SimpleNamespace(t=2.0, x=None, y=None, yaw=None, lat=None, lon=None, cov=None, quality="no-fix",
                          modes=[], frame_ms=None, status="no map")
    back = m.decode_frame(m.encode_frame(m.as_message(est))[1:-1])
    assert math.isnan(back.x) and math.isnan(back.lat) and back.quality == "no-fix"
    assert back.cov[0][0] == back.cov[1][1] == back.cov[2][2] == math.inf


def test_runtime_pose_estimate_is_accepted():
    loop = pytest.importorskip("tinyloc.runtime.loop", reason="runtime loop not in this tree yet")
    est = loop.PoseEstimate(t=1.0, x=3.0, y=4.0, yaw=0.5, lat=44.44, lon=-101.25, cov=np.eye(3) * 0.04,
                            quality="tracking", frame_ms=9.0, status="ok")
    p = m.as_message(est)
    assert (p.x, p.y, p.quality, p.cov[1][1]) == (3.0, 4.0, "tracking", 0.04)


from hypothesis import given, settings, strategies as st  # noqa: E402

_any_float = st.floats(allow_nan=True, allow_infinity=True) | st.integers(-10 ** 20, 10 ** 20)


@settings(max_examples=120, deadline=None)
@given(st.tuples(_any_float, _any_float, _any_float, _any_float, _any_float, _any_float),
       st.lists(_any_float, min_size=9, max_size=9),
       st.sampled_from(list(m.QUALITIES) + ["", "TRACKING", "lost"]), st.text(max_size=40))
def test_any_pose_fields_encode_or_fail_cleanly(vals, cov, quality, status):
    t, x, y, yaw, lat, lon = vals
    p = m.Pose(t, x, y, yaw, lat, lon, (tuple(cov[0:3]), tuple(cov[3:6]), tuple(cov[6:9])), quality, status)
    try:
        wire = m.encode_frame(p)
    except ProtocolError:
        return
    back = m.decode_frame(wire[1:-1])
    assert back.quality == quality and len(back.status.encode("ascii")) <= 24
    assert m.encode_frame(back) == wire
