"""CRC-32/ISO-HDLC of the wire protocol against its catalogue entry and the crcmod package."""

import random

import pytest

from tinyloc.link import crc

crcmod = pytest.importorskip("crcmod", reason="crcmod (reference CRC library) is not installed")
import crcmod.predefined  # noqa: E402


def test_catalogue_check_value():
    # Greg Cook, "Catalogue of parametrised CRC algorithms", entry CRC-32/ISO-HDLC:
    # check=0xcbf43926 for the ASCII string "123456789".
    assert crc.CHECK == 0xCBF43926
    assert crc.crc32(b"123456789") == 0xCBF43926
    assert crc.crc32_bitwise(b"123456789") == 0xCBF43926


def test_catalogue_residue():
    # Same catalogue entry: residue=0xdebb20e3 (register after data + CRC, before xorout).
    rnd = random.Random(7)
    for n in (0, 1, 13, 200):
        data = bytes(rnd.randrange(256) for _ in range(n))
        whole = data + crc.crc32(data).to_bytes(4, "little")
        assert crc.crc32(whole) ^ crc.XOROUT == crc.RESIDUE


def test_agrees_with_crcmod_on_random_inputs():
    # crcmod's predefined "crc-32" has the same parameters (poly 0x104C11DB7, reflected, init/xorout 0xFFFFFFFF).
    ref = crcmod.predefined.mkCrcFun("crc-32")
    rnd = random.Random(2026)
    for _ in range(2000):
        n = rnd.choice([0, 1, 2, 3, 4, 17, 91, 217, 218, rnd.randrange(600)])
        data = bytes(rnd.randrange(256) for _ in range(n))
        assert crc.crc32(data) == ref(data)
    for _ in range(200):
        data = bytes(rnd.randrange(256) for _ in range(rnd.randrange(64)))
        assert crc.crc32_bitwise(data) == ref(data)


def test_table_matches_crcmod_single_bytes():
    # The 256-entry table (the same numbers are in firmware_bridge/tlink.c) reproduces crcmod on every byte value.
    ref = crcmod.predefined.mkCrcFun("crc-32")
    table = crc.make_table()
    for b in range(256):
        reg = (0xFFFFFFFF >> 8) ^ table[(0xFFFFFFFF ^ b) & 0xFF]
        assert reg ^ 0xFFFFFFFF == ref(bytes([b]))


def test_c_source_table_is_the_computed_table():
    import re
    from pathlib import Path

    src = (Path(__file__).resolve().parents[1] / "firmware_bridge" / "tlink.c").read_text()
    block = src[src.index("crc_table[256] = {"):src.index("};", src.index("crc_table[256] = {"))]
    values = [int(v, 16) for v in re.findall(r"0x([0-9A-Fa-f]{8})u", block)]
    assert values == crc.make_table()
