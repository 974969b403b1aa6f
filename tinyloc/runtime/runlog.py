"""The run log: an append-only, crash-safe record of what the loop did.

File format (ours, version 1). The file starts with the 8 bytes ``TLRUNLG1``, then records:

    magic   2 bytes  0xA7 0x1C
    length  u32 LE   payload bytes (1 .. MAX_RECORD)
    crc     u32 LE   CRC-32 (IEEE 802.3, as zlib.crc32) of the payload
    payload          one message-pack map

The first record is a header map (``{"k": "header", "format": "tinyloc-runlog", "version": 1, ...}``);
then ``{"k": "pose", ...}`` (the PoseEstimate fields), ``{"k": "status", ...}`` (health counters)
and ``{"k": "event", "text": ...}`` records, in order.

Crash safety: each record goes to the file in one ``write`` on a descriptor opened with
``O_APPEND``, so once :meth:`RunLog.append` returns the record is in the operating system's
hands and a ``kill -9`` of the process cannot lose it; a crash in the middle of a write can
only leave a torn last record. ``fsync_every`` adds an ``fsync`` every N records against
power loss. The reader checks the magic, the declared length against the limit and the rest
of the file *before* reading the payload, and the CRC after; it stops at a torn tail (and
says so) and skips a damaged record in the middle by searching for the next magic.
"""

from __future__ import annotations

import os
import struct
import zlib

import msgpack

from ..errors import InputError

FILE_MAGIC = b"TLRUNLG1"
REC_MAGIC = b"\xa7\x1c"
HEAD = struct.Struct("<2sII")
MAX_RECORD = 1 << 20  # 1 MiB: far above any record we write


class RunLog:
    """Append records to a run log (creates the file, or appends to an existing log).

    Parameters
    ----------
    path : str or Path
    header : dict, optional
        Extra fields for the header record (written only when the file is new).
    fsync_every : int
        ``fsync`` after every this many records (0: never; the OS still keeps what was written).
    """

    def __init__(self, path, header: dict | None = None, *, fsync_every: int = 0):
        self.path = str(path)
        self.fsync_every = int(fsync_every)
        self.records = 0
        self.errors = 0
        try:
            self.fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        except OSError as e:
            raise InputError(f"{self.path}: cannot open the run log ({e.strerror or e})") from None
        if os.fstat(self.fd).st_size == 0:
            os.write(self.fd, FILE_MAGIC)
            self.append({"k": "header", "format": "tinyloc-runlog", "version": 1, **(header or {})})
        self._packer = msgpack.Packer(use_bin_type=True)

    def append(self, rec: dict) -> bool:
        """Write one record; False (and counted) if it could not be written. Never raises."""
        if self.fd is None:
            return False
        try:
            payload = msgpack.packb(rec, use_bin_type=True, default=_default)
            if len(payload) > MAX_RECORD:
                self.errors += 1
                return False
            os.write(self.fd, HEAD.pack(REC_MAGIC, len(payload), zlib.crc32(payload)) + payload)
            self.records += 1
            if self.fsync_every and self.records % self.fsync_every == 0:
                os.fsync(self.fd)
            return True
        except (OSError, TypeError, ValueError, OverflowError):
            self.errors += 1
            return False

    def pose(self, pose) -> bool:
        """Append a PoseEstimate."""
        d = pose.as_dict() if hasattr(pose, "as_dict") else dict(pose)
        d["k"] = "pose"
        return self.append(d)

    def event(self, text: str, **fields) -> bool:
        """Append a short event record (start, stop, fault...)."""
        return self.append({"k": "event", "text": str(text), **fields})

    def close(self) -> None:
        """Flush to disk and close (idempotent)."""
        if self.fd is not None:
            try:
                os.fsync(self.fd)
            except OSError:
                pass
            os.close(self.fd)
            self.fd = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _default(o):
    import numpy as np

    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"cannot log {type(o).__name__}")


def read_runlog(path) -> tuple[list[dict], list[str]]:
    """Read every intact record; returns (records, problems).

    ``problems`` names what was skipped: damaged records in the middle (by byte offset) and a
    torn tail (the last record cut short by a crash). A file that is not a run log raises
    :class:`~tinyloc.errors.InputError`.
    """
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as e:
        raise InputError(f"{path}: cannot read ({e.strerror or e})") from None
    if not data.startswith(FILE_MAGIC):
        raise InputError(f"{path}: not a tinyloc run log (bad magic)")
    out, problems = [], []
    pos, n = len(FILE_MAGIC), len(data)
    while pos < n:
        if n - pos < HEAD.size:
            problems.append(f"torn tail at byte {pos} ({n - pos} bytes of a record header)")
            break
        magic, length, crc = HEAD.unpack_from(data, pos)
        bad = None
        if magic != REC_MAGIC:
            bad = "no record marker"
        elif not 0 < length <= MAX_RECORD:
            bad = f"declared length {length} out of range"
        elif pos + HEAD.size + length > n:
            nxt = data.find(REC_MAGIC, pos + 1)
            if nxt < 0:
                problems.append(f"torn tail at byte {pos} (record of {length} bytes cut short)")
                break
            bad = "record runs past the next one"
        else:
            payload = data[pos + HEAD.size:pos + HEAD.size + length]
            if zlib.crc32(payload) != crc:
                bad = "CRC mismatch"
            else:
                try:
                    rec = msgpack.unpackb(payload, raw=False, strict_map_key=False)
                except (ValueError, msgpack.ExtraData, msgpack.FormatError, msgpack.StackError):
                    rec = None
                if isinstance(rec, dict):
                    out.append(rec)
                    pos += HEAD.size + length
                    continue
                bad = "payload is not a message-pack map"
        nxt = data.find(REC_MAGIC, pos + 1)
        if nxt < 0:
            problems.append(f"damaged tail at byte {pos} ({bad})")
            break
        problems.append(f"damaged record at byte {pos} ({bad}); skipped {nxt - pos} bytes")
        pos = nxt
    return out, problems
