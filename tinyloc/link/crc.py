"""CRC-32/ISO-HDLC, the frame check of the wire protocol.

Parameters (Greg Cook's "Catalogue of parametrised CRC algorithms" naming):
width=32, poly=0x04c11db7, init=0xffffffff, refin=true, refout=true,
xorout=0xffffffff, check=0xcbf43926, residue=0xdebb20e3.

The fast path is :func:`zlib.crc32`, which computes exactly this variant; a
bit-at-a-time reference and the 256-entry table used by the C side are kept
here so the tests can check all three against each other and against the
catalogue.
"""

from __future__ import annotations

import zlib

WIDTH = 32
POLY = 0x04C11DB7
POLY_REFLECTED = 0xEDB88320
INIT = 0xFFFFFFFF
XOROUT = 0xFFFFFFFF
CHECK = 0xCBF43926
# Register value (before xorout) after running the CRC over data followed by its own
# CRC in little-endian order; after xorout it is RESIDUE ^ XOROUT.
RESIDUE = 0xDEBB20E3
NAME = "CRC-32/ISO-HDLC"


def crc32(data, value: int = 0) -> int:
    """CRC-32/ISO-HDLC of ``data`` (bytes-like); ``value`` continues a previous result."""
    return zlib.crc32(data, value)


def crc32_bitwise(data) -> int:
    """Slow, obviously-right reference: one bit at a time, reflected form."""
    reg = INIT
    for b in bytes(data):
        reg ^= b
        for _ in range(8):
            reg = (reg >> 1) ^ POLY_REFLECTED if reg & 1 else reg >> 1
    return reg ^ XOROUT


def make_table() -> list[int]:
    """The 256-entry lookup table of the reflected algorithm (as in firmware_bridge/tlink.c)."""
    table = []
    for n in range(256):
        reg = n
        for _ in range(8):
            reg = (reg >> 1) ^ POLY_REFLECTED if reg & 1 else reg >> 1
        table.append(reg)
    return table
