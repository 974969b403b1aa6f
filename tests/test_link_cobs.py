"""COBS against the worked examples of Cheshire and Baker (1999) and the `cobs` package."""

import random

import pytest
from hypothesis import given, settings, strategies as st

from tinyloc.errors import ProtocolError
from tinyloc.link import cobs

ref = pytest.importorskip("cobs.cobs", reason="the cobs package (reference COBS library) is not installed")

# Worked examples of COBS encoding (Cheshire and Baker, "Consistent Overhead Byte Stuffing",
# IEEE/ACM Transactions on Networking 7(2), 1999), in the form they are commonly reproduced
# (e.g. the example table of the encyclopedia article on COBS); quoted from memory, and each
# is also checked against the `cobs` package below.
BLOCK_254 = bytes(range(1, 255))
EXAMPLES = [
    (b"\x00", b"\x01\x01"),
    (b"\x00\x00", b"\x01\x01\x01"),
    (b"\x00\x11\x00", b"\x01\x02\x11\x01"),
    (b"\x11\x22\x00\x33", b"\x03\x11\x22\x02\x33"),
    (b"\x11\x22\x33\x44", b"\x05\x11\x22\x33\x44"),
    (b"\x11\x00\x00\x00", b"\x02\x11\x01\x01\x01"),
    (BLOCK_254, b"\xff" + BLOCK_254),                                     # 254 non-zero bytes
    (b"\x00" + BLOCK_254, b"\x01\xff" + BLOCK_254),
    (bytes(range(1, 256)), b"\xff" + BLOCK_254 + b"\x02\xff"),            # 255 non-zero bytes
    (bytes(range(2, 256)) + b"\x00", b"\xff" + bytes(range(2, 256)) + b"\x01\x01"),
    (bytes(range(3, 256)) + b"\x00\x01", b"\xfe" + bytes(range(3, 256)) + b"\x02\x01"),
    # An IP header with zeros, as in the paper's illustration of the encoding (from memory).
    (bytes.fromhex("4500002c4c79000040064f37"), bytes.fromhex("024501042c4c7901054006 4f37".replace(" ", ""))),
]


@pytest.mark.parametrize("raw,enc", EXAMPLES)
def test_worked_examples(raw, enc):
    assert cobs.encode(raw) == enc
    assert cobs.decode(enc) == raw
    assert ref.encode(raw) == enc        # the reference library agrees with the example


def test_empty():
    assert cobs.encode(b"") == ref.encode(b"") == b"\x01"
    assert cobs.decode(b"\x01") == b""


def _random_inputs():
    rnd = random.Random(99)
    for _ in range(3000):
        n = rnd.choice([0, 1, 2, 253, 254, 255, 256, 507, 508, 509, 510, rnd.randrange(1200)])
        kind = rnd.randrange(3)
        if kind == 0:      # no zeros at all: long runs of 254/255 and more non-zero bytes
            data = bytes(rnd.randrange(1, 256) for _ in range(n))
        elif kind == 1:    # sparse zeros
            data = bytes(0 if rnd.random() < 0.01 else rnd.randrange(1, 256) for _ in range(n))
        else:              # dense zeros
            data = bytes(rnd.choice([0, 0, 1, 255, rnd.randrange(256)]) for _ in range(n))
        yield data
    # runs of exactly 254/255 non-zero bytes around zeros
    for pre in (b"", b"\x00", b"\x05\x00"):
        for run in (253, 254, 255, 508, 509):
            for post in (b"", b"\x00", b"\x00\x07"):
                yield pre + bytes([0x42]) * run + post


def test_agrees_with_cobs_package_on_random_inputs():
    for data in _random_inputs():
        enc = cobs.encode(data)
        assert enc == ref.encode(data)
        assert 0 not in enc
        assert len(enc) <= cobs.max_encoded_len(len(data))
        assert cobs.decode(enc) == data == ref.decode(enc)


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=700))
def test_round_trip_property(data):
    enc = cobs.encode(data)
    assert 0 not in enc and cobs.decode(enc) == data and enc == ref.encode(data)


@pytest.mark.parametrize("bad,why", [(b"\x05\x01\x02", "runs past"), (b"\x02\x00", "zero"), (b"\x00", "zero")])
def test_decode_rejects_malformed(bad, why):
    with pytest.raises(ProtocolError, match=why):
        cobs.decode(bad)
    with pytest.raises(ref.DecodeError):
        ref.decode(bad)
