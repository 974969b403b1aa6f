"""The streaming framer: fuzzed (hypothesis), limits, byte-at-a-time, damage and recovery."""

import random

from hypothesis import HealthCheck, given, settings, strategies as st

from tinyloc.link import messages as m
from tinyloc.link.framer import Framer


def frames(n, seed=1):
    rnd = random.Random(seed)
    out = []
    for i in range(n):
        kind = i % 3
        if kind == 0:
            msg = m.Pose(i * 0.01, rnd.uniform(-500, 500), rnd.uniform(-500, 500), rnd.uniform(-3, 3),
                         44.4 + rnd.random(), -101.3 + rnd.random(), ((0.1, 0, 0), (0, 0.1, 0), (0, 0, 0.01)),
                         "tracking", "ok")
        elif kind == 1:
            msg = m.Odometry(i * 0.01, rnd.uniform(-5, 5), 0.0, 0.0, left_ticks=rnd.randrange(-99, 99))
        else:
            msg = m.Imu(i * 0.01, 0.0, 0.0, 9.81)
        out.append(m.encode_frame(msg, i))
    return out


GOOD = frames(30)
DECODED = [m.decode_frame(f[1:-1]) for f in GOOD]


def _key(msg):
    return m.encode_frame(msg)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.binary(max_size=3000))
def test_random_bytes_never_raise_and_buffer_stays_capped(data):
    fr = Framer()
    out = fr.feed(data)
    assert fr.buffered <= m.MAX_ENCODED
    # A CRC-32 lets a random candidate frame through with probability 2^-32, so over this
    # test's few thousand candidate runs an accepted frame would mean a broken check.
    assert out == []
    c = fr.counters
    assert c.bytes_in == len(data) and c.frames_ok == 0


def _damage(frame: bytes, op: int, pos: int, val: int) -> bytes:
    b = bytearray(frame)
    i = 1 + pos % (len(b) - 2)          # inside the frame, not its delimiters
    if op == 0:
        b[i] ^= 1 << (val % 8)          # flipped bit
    elif op == 1:
        b.insert(i, val % 256)          # inserted byte
    elif op == 2:
        del b[i]                        # deleted byte
    elif op == 3:
        b = b[:i]                       # truncated
    else:
        for k in range(val % 5 + 2):    # a burst of flips
            j = 1 + (pos + k) % (len(b) - 2)
            b[j] ^= (val * 37 + k) % 255 + 1
    return bytes(b)


@settings(max_examples=250, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 29), st.integers(0, 4), st.integers(0, 10 ** 6), st.integers(0, 10 ** 6)),
                min_size=1, max_size=12),
       st.binary(max_size=40))
def test_damaged_frames_rejected_intact_frames_recovered(damage, noise):
    """Damaged frames are never accepted with a wrong payload; every intact frame is recovered."""
    damaged = {}
    for idx, op, pos, val in damage:
        damaged[idx] = _damage(GOOD[idx], op, pos, val)
    stream = bytearray(noise)
    for i, f in enumerate(GOOD):
        stream += damaged.get(i, f)
    out = Framer().feed(bytes(stream))
    sent = {_key(d): i for i, d in enumerate(DECODED)}
    got = set()
    for msg in out:
        k = _key(msg)
        assert k in sent, "a frame with a wrong payload was accepted"
        got.add(sent[k])
    intact = {i for i in range(len(GOOD)) if i not in damaged or damaged[i] == GOOD[i]}
    assert intact <= got


@settings(max_examples=100, deadline=None)
@given(st.binary(min_size=1, max_size=600), st.lists(st.integers(1, 50), min_size=1, max_size=40))
def test_chunking_does_not_matter(noise, cuts):
    stream = noise + b"".join(GOOD[:6]) + noise[:20] + b"".join(GOOD[6:12])
    whole = Framer()
    a = whole.feed(stream)
    piecewise = Framer()
    b = []
    pos = 0
    k = 0
    while pos < len(stream):
        step = cuts[k % len(cuts)]
        b += piecewise.feed(stream[pos:pos + step])
        pos += step
        k += 1
    assert [_key(x) for x in a] == [_key(x) for x in b]
    assert whole.counters.as_dict() == piecewise.counters.as_dict()


def test_byte_at_a_time_clean_stream():
    fr = Framer()
    out = []
    for b in b"".join(GOOD):
        out += fr.feed(bytes([b]))
    assert [_key(x) for x in out] == [_key(x) for x in DECODED]
    c = fr.counters
    assert c.frames_ok == 30 and c.resyncs == 0 and c.seq_lost == 0


def test_run_at_the_cap_and_one_past():
    fr = Framer()
    # exactly MAX_ENCODED bytes between delimiters: decoded (and rejected on its content, not its length)
    fr.feed(b"\x00" + b"\x07" * m.MAX_ENCODED + b"\x00")
    assert fr.counters.too_long == 0 and fr.counters.resyncs == 1
    # one byte more: too_long, buffer stays at the cap the whole time
    fr2 = Framer()
    for _ in range(m.MAX_ENCODED + 1):
        fr2.feed(b"\x07")
        assert fr2.buffered <= m.MAX_ENCODED
    assert fr2.counters.too_long == 1
    # a huge run without a delimiter costs one count and no memory, then the next frame decodes
    fr3 = Framer()
    assert fr3.feed(b"\x05" * 1_000_000) == []
    assert fr3.buffered == 0 and fr3.counters.too_long == 1
    assert len(fr3.feed(GOOD[0])) == 1


def test_max_size_frame_byte_at_a_time():
    raw = m.frame_bytes(0x10, 9, 0, bytes(range(1, 201)))
    from tinyloc.link import cobs

    wire = b"\x00" + cobs.encode(raw) + b"\x00"
    assert len(wire) == m.MAX_ENCODED + 2
    fr = Framer()
    out = []
    for b in wire:
        out += fr.feed(bytes([b]))
    assert len(out) == 1 and out[0].seq == 9


def test_truncated_frames_at_every_length():
    f = GOOD[0]
    for n in range(2, len(f) - 1):
        fr = Framer()
        out = fr.feed(f[:n] + GOOD[1])
        assert [_key(x) for x in out] == [_key(DECODED[1])]
        assert fr.counters.resyncs == 1


def test_sequence_gaps_are_counted():
    fr = Framer()
    fr.feed(GOOD[0] + GOOD[1] + GOOD[5] + GOOD[6])
    assert fr.counters.seq_lost == 3
    fr.feed(GOOD[2])
    assert fr.counters.seq_restarts == 1
