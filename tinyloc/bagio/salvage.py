"""Read the intact part of an MCAP file that was cut short (a recorder killed by a power loss).

Such a file has its records but no summary, no footer, and usually no metadata.yaml
beside it, so the regular bag readers refuse it. This module walks the records from
the start, following the MCAP specification's record layout (opcode u8, length u64
little-endian, body), expanding chunks, and stops at the first record that is not
whole. It offers the small part of the reader interface the importer uses.

Limits: every declared length is checked against what is left of the file before
anything is read or allocated; chunks above ``MAX_CHUNK_BYTES`` are refused.
Chunk compression: none and zstd (through the zstd module rosbags itself depends on);
lz4 chunks need the ``lz4`` package.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError

MAGIC = b"\x89MCAP0\r\n"
OP_HEADER, OP_FOOTER, OP_SCHEMA, OP_CHANNEL, OP_MESSAGE, OP_CHUNK, OP_DATA_END = 0x01, 0x02, 0x03, 0x04, 0x05, \
    0x06, 0x0F
MAX_CHUNK_BYTES = 1 << 30
_U16, _U32, _U64 = struct.Struct("<H"), struct.Struct("<I"), struct.Struct("<Q")


class _Cut(Exception):
    """The data ends inside a record."""


@dataclass(frozen=True)
class Conn:
    """One channel (the fields the importer reads from a rosbags Connection)."""

    id: int
    topic: str
    msgtype: str


@dataclass(frozen=True)
class TopicInfo:
    msgtype: str
    msgcount: int


def _string(b: bytes, pos: int) -> tuple[str, int]:
    if pos + 4 > len(b):
        raise _Cut
    n = _U32.unpack_from(b, pos)[0]
    if pos + 4 + n > len(b):
        raise _Cut
    return b[pos + 4: pos + 4 + n].decode("utf-8", "replace"), pos + 4 + n


def _decompress(kind: str, data: bytes, size: int) -> bytes:
    if kind == "":
        return data
    if kind == "zstd":
        try:
            from compression import zstd  # Python >= 3.14
        except ImportError:
            from backports import zstd
        return zstd.decompress(data)
    if kind == "lz4":
        return _lz4_decompress(data, "MCAP")
    raise InputError(f"MCAP chunk compression '{kind}' is not supported")


def _lz4_decompress(data: bytes, fmt: str) -> bytes:
    """lz4-frame chunks, for either format; lz4 is optional (few bags use it)."""
    try:
        import lz4.frame
    except ImportError:
        raise InputError(f"{fmt} chunk compressed with lz4: install the 'lz4' package to read it") from None
    return lz4.frame.decompress(data)


class _TopicCounts:
    """``topics`` for a salvage reader: message counts per topic from its ``connections`` and ``counts``."""

    @property
    def topics(self) -> dict[str, TopicInfo]:
        out: dict[str, TopicInfo] = {}
        for c in self.connections:
            prev = out.get(c.topic)
            out[c.topic] = TopicInfo(c.msgtype, (prev.msgcount if prev else 0) + self.counts.get(c.id, 0))
        return out


class SalvagedMcap(_TopicCounts):
    """Records of a cut-short MCAP file, readable like a (small) rosbags AnyReader.

    Parameters
    ----------
    path : str or Path
        The ``.mcap`` file.

    Attributes
    ----------
    cut_at : int or None
        Byte offset where the last whole record ends, if the file stops inside one.
    note : str
        One line describing what was recovered.
    """

    is2 = True

    def __init__(self, path):
        self.path = Path(path)
        self.f = open(self.path, "rb")
        self.size = self.path.stat().st_size
        if self.f.read(8) != MAGIC:
            self.f.close()
            raise InputError(f"{self.path}: not an MCAP file (bad magic)")
        self.schemas: dict[int, tuple[str, str, bytes]] = {}
        self.channels: dict[int, tuple[str, int, str]] = {}
        self.counts: dict[int, int] = {}
        self.start_time = 0
        self.end_time = 0
        self.cut_at = None
        n = 0
        t0, t1 = None, None
        for op, body in self._records():
            if op == OP_MESSAGE:
                cid, log_time = _U16.unpack_from(body, 0)[0], _U64.unpack_from(body, 6)[0]
                self.counts[cid] = self.counts.get(cid, 0) + 1
                t0 = log_time if t0 is None else min(t0, log_time)
                t1 = log_time if t1 is None else max(t1, log_time)
                n += 1
        self.message_count = n
        self.start_time, self.end_time = (t0 or 0), ((t1 + 1) if t1 is not None else 0)
        self._typestore()
        self.connections = [Conn(cid, topic, self.schemas.get(sid, ("", "", b""))[0])
                            for cid, (topic, sid, _enc) in sorted(self.channels.items())]
        cut = (f"cut short (the record from byte {self.cut_at} of {self.size} is not whole)"
               if self.cut_at is not None else "without its summary")
        self.note = (f"{self.path.name}: recording {cut}; salvaged {n} whole messages spanning "
                     f"{(self.end_time - self.start_time) / 1e9:.3f} s of record time")

    # -- record walk
    def _records(self, start: int | None = None, stop: int | None = None):
        """Yield (opcode, body) of every whole record, chunks expanded; sets ``cut_at`` at a partial record."""
        f = self.f
        pos = 8
        while True:
            f.seek(pos)  # every generator keeps its own place in the shared file
            head = f.read(9)
            if len(head) < 9:
                if head:
                    self.cut_at = pos
                return
            op, length = head[0], _U64.unpack_from(head, 1)[0]
            if length > self.size - pos - 9:
                self.cut_at = pos
                if op == OP_CHUNK:  # an uncompressed chunk cut short still holds whole messages
                    yield from self._partial_chunk(f.read(min(length, MAX_CHUNK_BYTES)), start, stop)
                return
            if op == OP_CHUNK:
                if length > MAX_CHUNK_BYTES:
                    raise InputError(f"{self.path}: chunk at byte {pos} declares {length} bytes, more than the "
                                     f"limit of {MAX_CHUNK_BYTES}")
                if length < 40:
                    self.cut_at = pos
                    return
                t_start, t_end, usize = struct.unpack("<QQQ", f.read(24))
                if (start is not None and t_end < start) or (stop is not None and t_start >= stop):
                    pos += 9 + length
                    continue
                body = f.read(length - 24)
                try:
                    kind, p = _string(body, 4)
                    clen = _U64.unpack_from(body, p)[0]
                    if p + 8 + clen > len(body) or usize > MAX_CHUNK_BYTES:
                        raise _Cut
                    data = body[p + 8: p + 8 + clen]
                except (_Cut, struct.error):
                    self.cut_at = pos
                    return
                try:
                    inner = _decompress(kind, data, usize)
                except InputError:
                    raise
                except Exception:  # each codec has its own error types; a damaged chunk ends the readable part
                    self.cut_at = pos
                    return
                pos += 9 + length
                q = 0
                while q + 9 <= len(inner):
                    iop, ilen = inner[q], _U64.unpack_from(inner, q + 1)[0]
                    if q + 9 + ilen > len(inner):
                        break
                    yield from self._inner(iop, inner[q + 9: q + 9 + ilen], start, stop)
                    q += 9 + ilen
                continue
            if op in (OP_DATA_END, OP_FOOTER):
                return
            body = f.read(length)
            pos += 9 + length
            yield from self._inner(op, body, start, stop)

    def _partial_chunk(self, body: bytes, start, stop):
        try:
            kind, p = _string(body, 28)
        except (_Cut, struct.error):
            return
        if kind != "":
            return
        inner = body[p + 8:]
        q = 0
        while q + 9 <= len(inner):
            iop, ilen = inner[q], _U64.unpack_from(inner, q + 1)[0]
            if q + 9 + ilen > len(inner):
                break
            yield from self._inner(iop, inner[q + 9: q + 9 + ilen], start, stop)
            q += 9 + ilen

    def _inner(self, op, body, start, stop):
        try:
            if op == OP_SCHEMA:
                sid = _U16.unpack_from(body, 0)[0]
                name, p = _string(body, 2)
                enc, p = _string(body, p)
                n = _U32.unpack_from(body, p)[0]
                self.schemas.setdefault(sid, (name, enc, body[p + 4: p + 4 + n]))
            elif op == OP_CHANNEL:
                cid, sid = _U16.unpack_from(body, 0)[0], _U16.unpack_from(body, 2)[0]
                topic, p = _string(body, 4)
                enc, p = _string(body, p)
                self.channels.setdefault(cid, (topic, sid, enc))
            elif op == OP_MESSAGE:
                if len(body) < 22:
                    return
                if start is None and stop is None:
                    yield op, body
                else:
                    t = _U64.unpack_from(body, 6)[0]
                    if (start is None or t >= start) and (stop is None or t < stop):
                        yield op, body
        except (_Cut, struct.error):
            return

    def _typestore(self):
        from ._rosbags import rosbags, typestore

        ts_mod = rosbags().typesys
        typs = {}
        for name, enc, data in self.schemas.values():
            text = data.decode("utf-8", "replace")
            try:
                if enc == "ros2msg" and text:
                    typs.update(ts_mod.get_types_from_msg(text, name))
                elif enc == "ros2idl" and text:
                    sep = "=" * 80 + "\n"
                    parts = text.split(sep)[1:] if text.startswith(sep + "IDL: ") else [text]
                    for part in parts:
                        typs.update(ts_mod.get_types_from_idl(part.split("\n", 1)[1] if part.startswith("IDL: ")
                                                              else part))
            except ts_mod.TypesysError:
                continue
        store = typestore()
        if typs:
            store.register(typs)
        self.store = store

    # -- the reader interface used by the importer (topics: from _TopicCounts)

    def messages(self, connections=(), start=None, stop=None):
        """Yield (Conn, record time ns, raw CDR bytes) in file order."""
        want = {c.id: c for c in (connections or self.connections)}
        for op, body in self._records(start, stop):
            cid = _U16.unpack_from(body, 0)[0]
            c = want.get(cid)
            if c is not None:
                yield c, _U64.unpack_from(body, 6)[0], body[22:]

    def deserialize(self, raw: bytes, msgtype: str):
        return self.store.deserialize_cdr(raw, msgtype)

    def close(self) -> None:
        self.f.close()


def salvage_candidate(path: Path) -> Path | None:
    """The MCAP file to salvage for ``path`` (the file itself, or the only .mcap in a bag folder)."""
    if path.is_file() and path.suffix == ".mcap":
        return path
    if path.is_dir():
        files = sorted(path.glob("*.mcap"))
        if len(files) == 1:
            return files[0]
    return None


# ----------------------------------------------------------------------------- ROS 1 bags without an index

ROS1_MAGIC = b"#ROSBAG V2.0\n"
R1_MSG, R1_BAG_HEADER, R1_CHUNK, R1_CONNECTION = 0x02, 0x03, 0x05, 0x07
MAX_RECORD_BYTES = 1 << 30


def _r1_fields(b: bytes) -> dict[str, bytes]:
    """Fields of a ROS 1 record header: repeated (u32 length, b'name=value')."""
    out = {}
    p = 0
    while p + 4 <= len(b):
        n = _U32.unpack_from(b, p)[0]
        if p + 4 + n > len(b):
            raise _Cut
        name, _, value = b[p + 4: p + 4 + n].partition(b"=")
        out[name.decode("ascii", "replace")] = value
        p += 4 + n
    return out


def _r1_type(name: str) -> str:
    pkg, _, typ = name.partition("/")
    return f"{pkg}/msg/{typ}" if typ and "/msg/" not in name else name


class SalvagedRos1(_TopicCounts):
    """Records of a ROS 1 bag whose index was never written (a recorder killed mid-write, ``.bag.active``).

    Walks the records of the ROS bag 2.0 format (u32 header length, header fields, u32 data
    length, data) from the start, expanding chunks (none, bz2; lz4 with the ``lz4`` package),
    and stops at the first record that is not whole. Same small reader interface as
    :class:`SalvagedMcap`.
    """

    is2 = False

    def __init__(self, path):
        self.path = Path(path)
        self.f = open(self.path, "rb")
        self.size = self.path.stat().st_size
        if self.f.read(len(ROS1_MAGIC)) != ROS1_MAGIC:
            self.f.close()
            raise InputError(f"{self.path}: not a ROS 1 bag (bad magic)")
        self.conns: dict[int, tuple[str, str, str]] = {}  # id -> topic, type, definition
        self.counts: dict[int, int] = {}
        self.cut_at = None
        n, t0, t1 = 0, None, None
        for cid, t, _ in self._records():
            self.counts[cid] = self.counts.get(cid, 0) + 1
            t0 = t if t0 is None else min(t0, t)
            t1 = t if t1 is None else max(t1, t)
            n += 1
        self.message_count = n
        self.start_time, self.end_time = (t0 or 0), ((t1 + 1) if t1 is not None else 0)
        self.connections = [Conn(cid, topic, typ) for cid, (topic, typ, _) in sorted(self.conns.items())]
        self._typestore()
        cut = (f"cut short (the record from byte {self.cut_at} of {self.size} is not whole)"
               if self.cut_at is not None else "without its index")
        self.note = (f"{self.path.name}: ROS 1 recording {cut}; salvaged {n} whole messages spanning "
                     f"{(self.end_time - self.start_time) / 1e9:.3f} s of record time")

    def _read_record(self, buf, pos: int, end: int):
        """(header fields, data, next pos) of the record at ``pos`` in ``buf`` (bytes or the file)."""
        if pos + 4 > end:
            raise _Cut
        if isinstance(buf, bytes):
            hl = _U32.unpack_from(buf, pos)[0]
            if hl > end - pos - 8:
                raise _Cut
            head = buf[pos + 4: pos + 4 + hl]
            dl = _U32.unpack_from(buf, pos + 4 + hl)[0]
            if dl > end - pos - 8 - hl:
                raise _Cut
            data = buf[pos + 8 + hl: pos + 8 + hl + dl]
        else:
            buf.seek(pos)
            hl = _U32.unpack(buf.read(4))[0]
            if hl > min(end - pos - 8, MAX_RECORD_BYTES):
                raise _Cut
            head = buf.read(hl)
            dl = _U32.unpack(buf.read(4))[0]
            if dl > min(end - pos - 8 - hl, MAX_RECORD_BYTES):
                raise _Cut
            data = buf.read(dl)
        return _r1_fields(head), data, pos + 8 + hl + dl

    def _inner(self, fields, data, start, stop):
        op = fields.get("op", b"\x00")[:1]
        op = op[0] if op else 0
        if op == R1_CONNECTION:
            cid = _U32.unpack(fields["conn"][:4])[0]
            meta = _r1_fields(data)
            topic = fields.get("topic", meta.get("topic", b"")).decode("utf-8", "replace")
            self.conns.setdefault(cid, (topic, _r1_type(meta.get("type", b"").decode("utf-8", "replace")),
                                        meta.get("message_definition", b"").decode("utf-8", "replace")))
        elif op == R1_MSG:
            cid = _U32.unpack(fields["conn"][:4])[0]
            sec, nsec = struct.unpack("<II", fields["time"][:8])
            t = sec * 1_000_000_000 + nsec
            if (start is None or t >= start) and (stop is None or t < stop):
                yield cid, t, data

    def _records(self, start=None, stop=None):
        pos = len(ROS1_MAGIC)
        while pos < self.size:
            try:
                fields, data, nxt = self._read_record(self.f, pos, self.size)
            except (_Cut, struct.error):
                self.cut_at = pos
                yield from self._partial_chunk(pos, start, stop)
                return
            op = fields.get("op", b"\x00")[:1]
            op = op[0] if op else 0
            try:
                if op == R1_CHUNK:
                    kind = fields.get("compression", b"none").decode("ascii", "replace")
                    try:
                        inner = self._decompress(kind, data)
                    except InputError:
                        raise
                    except Exception:  # a damaged chunk ends the readable part
                        self.cut_at = pos
                        return
                    q = 0
                    while q < len(inner):
                        try:
                            f2, d2, q = self._read_record(inner, q, len(inner))
                        except (_Cut, struct.error):
                            break
                        yield from self._inner(f2, d2, start, stop)
                elif op in (R1_CONNECTION, R1_MSG):
                    yield from self._inner(fields, data, start, stop)
            except (KeyError, struct.error):
                pass  # a record missing its fields is skipped
            pos = nxt

    def _partial_chunk(self, pos: int, start, stop):
        # An uncompressed chunk cut short still holds whole connection and message records.
        f = self.f
        f.seek(pos)
        try:
            hl = _U32.unpack(f.read(4))[0]
            if hl > self.size - pos - 8:
                return
            fields = _r1_fields(f.read(hl))
            f.read(4)
        except (_Cut, struct.error):
            return
        if fields.get("op", b"")[:1] != bytes([R1_CHUNK]) or fields.get("compression", b"none") != b"none":
            return
        inner = f.read(min(self.size - pos, MAX_RECORD_BYTES))
        q = 0
        while q < len(inner):
            try:
                f2, d2, q = self._read_record(inner, q, len(inner))
                yield from self._inner(f2, d2, start, stop)
            except (_Cut, struct.error, KeyError):
                return

    @staticmethod
    def _decompress(kind: str, data: bytes) -> bytes:
        if kind == "none":
            return data
        if kind == "bz2":
            import bz2

            return bz2.decompress(data)
        if kind == "lz4":
            return _lz4_decompress(data, "ROS 1")
        raise InputError(f"ROS 1 chunk compression '{kind}' is not supported")

    def _typestore(self):
        from ._rosbags import rosbags, typestore

        ts_mod = rosbags().typesys
        typs = {}
        for _topic, typ, text in self.conns.values():
            try:
                if text:
                    typs.update(ts_mod.get_types_from_msg(text, typ))
            except ts_mod.TypesysError:
                continue
        store = typestore(ros1=True)
        if typs:
            store.register(typs)
        self.store = store


    def messages(self, connections=(), start=None, stop=None):
        """Yield (Conn, record time ns, raw ROS 1 bytes) in file order."""
        want = {c.id: c for c in (connections or self.connections)}
        for cid, t, data in self._records(start, stop):
            c = want.get(cid)
            if c is not None:
                yield c, t, data

    def deserialize(self, raw: bytes, msgtype: str):
        return self.store.deserialize_ros1(raw, msgtype)

    def close(self) -> None:
        self.f.close()


def open_salvage(path: Path):
    """A salvage reader for ``path`` (by magic bytes: MCAP or ROS 1), or None if neither fits."""
    f = salvage_candidate(path)
    if f is None:
        if not path.is_file():
            return None
        f = path
    with open(f, "rb") as fh:
        head = fh.read(len(ROS1_MAGIC))
    if head.startswith(MAGIC):
        return SalvagedMcap(f)
    if head == ROS1_MAGIC:
        return SalvagedRos1(f)
    return None
