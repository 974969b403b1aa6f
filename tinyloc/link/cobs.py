"""Consistent Overhead Byte Stuffing (COBS), as defined by Cheshire and Baker (1999).

Encoding removes every zero byte from a frame so a single 0x00 can delimit frames
on the wire. Overhead: one byte per started block of 254 data bytes, so an encoded
frame of ``n`` bytes is at most ``n + ceil(n / 254) + (n == 0)`` bytes long.

These work on whole frames; the streaming side (framer) collects bytes up to a
delimiter under a hard cap before calling :func:`decode`.
"""

from __future__ import annotations

from ..errors import ProtocolError


def max_encoded_len(n: int) -> int:
    """Largest COBS encoding of ``n`` input bytes (without the delimiter)."""
    return n + n // 254 + 1


def encode(data) -> bytes:
    """COBS-encode ``data`` (bytes-like). The result holds no zero byte and no delimiter."""
    data = bytes(data)
    out = bytearray()
    # Split on zeros: every zero becomes the end of a block; a block longer than
    # 254 bytes is cut into 254-byte blocks with code 0xFF (no implied zero).
    for chunk in data.split(b"\x00"):
        while len(chunk) >= 254:
            out.append(0xFF)
            out += chunk[:254]
            chunk = chunk[254:]
        out.append(len(chunk) + 1)
        out += chunk
    # The split leaves a trailing empty block after a 0xFF block of exactly 254 bytes
    # that ended the data; the standard encoding ends there without a 0x01.
    if len(data) and data[-1] != 0 and _ends_with_full_block(data):
        del out[-1]
    return bytes(out)


def _ends_with_full_block(data: bytes) -> bool:
    last = data.rfind(b"\x00")
    tail = len(data) - last - 1
    return tail > 0 and tail % 254 == 0


def decode(data) -> bytes:
    """Decode one COBS frame (without its delimiter).

    Raises
    ------
    ProtocolError
        If the frame holds a zero byte or a block runs past its end.
    """
    data = bytes(data)
    n = len(data)
    out = bytearray()
    i = 0
    while i < n:
        code = data[i]
        if code == 0:
            raise ProtocolError(f"COBS: zero byte at offset {i}")
        end = i + code
        if end > n:
            raise ProtocolError(f"COBS: block at offset {i} runs past the end ({code - 1} bytes, {n - i - 1} left)")
        block = data[i + 1:end]
        if 0 in block:
            raise ProtocolError(f"COBS: zero byte inside the block at offset {i}")
        out += block
        i = end
        if code != 0xFF and i < n:
            out.append(0)
    return bytes(out)
