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


_BYTE = [bytes((i,)) for i in range(256)]


def encode(data) -> bytes:
    """COBS-encode ``data`` (bytes-like). The result holds no zero byte and no delimiter."""
    data = bytes(data)
    n = len(data)
    chunks = data.split(b"\x00")
    if n < 254:
        # No block can reach 254 bytes: each zero-separated chunk is one block behind its code.
        return b"".join([_BYTE[len(c) + 1] + c for c in chunks])
    out = []
    # Every zero ends a block; a chunk of 254 bytes or more is cut into 254-byte blocks
    # with code 0xFF (no implied zero after them).
    for chunk in chunks:
        while len(chunk) >= 254:
            out.append(b"\xff")
            out.append(chunk[:254])
            chunk = chunk[254:]
        out.append(_BYTE[len(chunk) + 1])
        out.append(chunk)
    # A data end of exactly 254k non-zero bytes ends on a 0xFF block; the standard
    # encoding stops there, without the empty final block the loop above appends.
    if data[-1] != 0 and (len(chunks[-1]) % 254) == 0:
        out.pop()
        out.pop()
    return b"".join(out)


def decode(data) -> bytes:
    """Decode one COBS frame (without its delimiter).

    Raises
    ------
    ProtocolError
        If the frame holds a zero byte or a block runs past its end.
    """
    data = bytes(data)
    if 0 in data:
        raise ProtocolError(f"COBS: zero byte at offset {data.index(0)}")
    n = len(data)
    if n <= 254:
        # Short frames: every code byte (but the first) marks a zero of the output, unless a
        # 0xFF block precedes it (then fall through to the general loop).
        out = bytearray(data)
        i = 0
        while i < n:
            code = data[i]
            if code == 0xFF:
                break
            if i:
                out[i] = 0
            i += code
        else:
            if i > n:
                raise ProtocolError(f"COBS: last block runs past the end of the {n}-byte frame")
            return bytes(out[1:])
    out = []
    i = 0
    while i < n:
        code = data[i]
        end = i + code
        if end > n:
            raise ProtocolError(f"COBS: block at offset {i} runs past the end ({code - 1} bytes, {n - i - 1} left)")
        out.append(data[i + 1:end])
        i = end
        if code != 0xFF and i < n:
            out.append(b"\x00")
    return b"".join(out)
