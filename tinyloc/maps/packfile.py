"""The packed map file (``.tlm``), format version 2: writer and random-access window reader.

Layout (all little-endian; the full specification is ``maps_packed/FORMAT.md``)::

    header   magic b"TLMAP\r\n\x1a", version u16, flags u16, header_size u32,
             origin lat/lon (f64 deg), origin h (f64 m), res_m f64, x_min f64, y_max f64,
             rows u32, cols u32, tile u16, n_channels u16, n_tiles u32, model_size u32,
             class table (n_channels x [class index u8, flags u8, name length u8, ASCII name]),
             CRC-32 of everything before it
    index    n_tiles x [length u32, crc32 u32] (row-major tiles), CRC-32 of the index
    model    model_size bytes (a zlib stream: one probability byte per context and channel), CRC-32
    tiles    back to back in index order. Each: present mask, full mask (ceil(n_channels / 8) bytes
             each), then, when a channel is present and not full, a coding byte and the body:
             0 = zlib of the stored channels' uint8 codes, 1 = context-coded 16-level coverage.
             length 0 = a tile with nothing on it (all zero, but known).

Context coding (``coding 1``) codes each cell's coverage level (0..15) as a few binary decisions
whose probabilities come from the map's model, chosen by the cell's already-coded neighbours and by
what the ground-partition channels before it left of the cell; blocks of 8 x 8 cells that are empty
or full cost two decisions. The kernels are in :mod:`tinyloc.maps._kernels`.

The reader checks every declared size against hard limits and against the file
size *before* allocating, so a damaged or hostile file costs at most what the
file itself justifies. A tile whose checksum or stream is bad reads as unknown
(``known_out`` = 0) and is reported once as a warning; the rest of the map works.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass
import logging
import math
import os
from pathlib import Path
import struct
import threading
import zlib

import numpy as np

from ..errors import InputError, MapFormatError
from ..geo import LocalFrame
from . import _kernels

log = logging.getLogger("tinyloc.maps")

MAGIC = b"TLMAP\r\n\x1a"
VERSION = 2
_FIXED = struct.Struct("<8sHHI6dIIHHII")  # 84 bytes
_ENTRY = struct.Struct("<II")  # 8 bytes: payload length, CRC-32
MIN_HEADER = _FIXED.size + 4
CODING_ZLIB = 0
CODING_CONTEXT = 1
FLAG_PARTITION = 1          # class table entry flag: the channel belongs to the ground partition
NCTX = _kernels.NCTX        # model bytes per channel
PROB_SCALE = 12.0           # model byte k -> probability 1 / (1 + exp((128 - k) / PROB_SCALE))
PRUNE_BITS = 8.0            # a model byte costs about this much in the file
# Hard limits (the decoder refuses anything beyond them before allocating).
MAX_HEADER = 65536
MAX_SIDE = 1 << 18          # cells per side (131 km at 0.5 m)
MAX_TILES = 1 << 22
MIN_TILE, MAX_TILE = 8, 1024
MAX_CHANNELS = 64
MAX_RES_M = 1000.0
ZLIB_LEVEL = 9
INV255 = np.float32(1.0 / 255.0)
DEFAULT_CACHE_BYTES = 32 << 20


def _prob_table() -> np.ndarray:
    """Model byte (0..255) -> probability x 65536 that a decision is 1 (byte 0: an unused context, 1/2)."""
    k = np.arange(256, dtype=np.float64)
    p = np.floor(65536.0 / (1.0 + np.exp((128.0 - k) / PROB_SCALE)) + 0.5)
    p = np.clip(p, 1, 65535).astype(np.uint16)
    p[0] = 32768
    return p


PROB_LUT = _prob_table()


def model_from_counts(counts: np.ndarray) -> np.ndarray:
    """Decision counts (n_ctx, 2) -> model bytes (n_ctx,) uint8.

    Each used context gets the rounded logit of its estimated probability of a 1 (Krichevsky-Trofimov
    estimate, (n1 + 1/2) / (n + 1)). A context whose byte would cost more than it saves (fewer than
    ``PRUNE_BITS`` bits gained over coding its decisions at 1/2) is left 0, which reads as 1/2.
    """
    n = counts.sum(axis=1)
    p1 = (counts[:, 1] + 0.5) / (n + 1.0)
    k = np.clip(np.rint(128.0 + PROB_SCALE * np.log(p1 / (1.0 - p1))), 1, 255)
    p = PROB_LUT[k.astype(np.uint8)] / 65536.0
    coded_bits = -(counts[:, 1] * np.log2(p) + counts[:, 0] * np.log2(1.0 - p))
    keep = (n > 0) & (n - coded_bits > PRUNE_BITS)
    return np.where(keep, k, 0).astype(np.uint8)


def _mask_bytes(n_channels: int) -> int:
    return (n_channels + 7) // 8


def _max_payload(m) -> int:
    raw = m.n_channels * m.tile * m.tile
    return 2 * _mask_bytes(m.n_channels) + 1 + raw + (raw >> 8) + 64  # > zlib's worst case


def _max_model(n_channels: int) -> int:
    raw = n_channels * NCTX
    return raw + (raw >> 8) + 64


@dataclass(frozen=True)
class MapMeta:
    """Georeference and layout of a packed map.

    Cell (row i, col j) has its centre at ``x = x_min + (j + 0.5) * res_m``,
    ``y = y_max - (i + 0.5) * res_m`` (ENU metres at the origin; row 0 is north).
    """

    lat0_deg: float
    lon0_deg: float
    h0_m: float
    res_m: float
    x_min: float
    y_max: float
    rows: int
    cols: int
    tile: int
    class_names: tuple
    class_ids: tuple
    version: int = VERSION
    partition: tuple = ()   # channels of the ground partition (their coverage sums to at most 1 per cell)

    # Aliases, so "origin" reads naturally at call sites.
    @property
    def origin_lat(self) -> float:
        return self.lat0_deg

    @property
    def origin_lon(self) -> float:
        return self.lon0_deg

    @property
    def origin_h(self) -> float:
        return self.h0_m

    @property
    def x_max(self) -> float:
        return self.x_min + self.cols * self.res_m

    @property
    def y_min(self) -> float:
        return self.y_max - self.rows * self.res_m

    @property
    def n_channels(self) -> int:
        return len(self.class_names)

    @property
    def tile_rows(self) -> int:
        return -(-self.rows // self.tile)

    @property
    def tile_cols(self) -> int:
        return -(-self.cols // self.tile)


def _check_meta(m: MapMeta, where: str) -> None:
    """Shared by writer and reader: the same limits on both sides."""
    def bad(msg):
        return MapFormatError(f"{where}: {msg}")

    for name in ("lat0_deg", "lon0_deg", "h0_m", "x_min", "y_max"):
        if not math.isfinite(getattr(m, name)):
            raise bad(f"header field {name} is not finite")
    if abs(m.lat0_deg) > 90.0 or abs(m.lon0_deg) > 180.0:
        raise bad("header origin latitude/longitude out of range")
    if not (math.isfinite(m.res_m) and 0.0 < m.res_m <= MAX_RES_M):
        raise bad(f"header resolution {m.res_m!r} m is not in (0, {MAX_RES_M:g}]")
    if not (1 <= m.rows <= MAX_SIDE and 1 <= m.cols <= MAX_SIDE):
        raise bad(f"header declares {m.rows} x {m.cols} cells (limit 1..{MAX_SIDE} per side)")
    if not MIN_TILE <= m.tile <= MAX_TILE:
        raise bad(f"header declares tile size {m.tile} (limit {MIN_TILE}..{MAX_TILE})")
    if not 1 <= m.n_channels <= MAX_CHANNELS:
        raise bad(f"header declares {m.n_channels} channels (limit 1..{MAX_CHANNELS})")
    if m.tile_rows * m.tile_cols > MAX_TILES:
        raise bad(f"header declares {m.tile_rows * m.tile_cols} tiles (limit {MAX_TILES})")
    if any(not 0 <= int(c) < m.n_channels for c in m.partition):
        raise bad(f"partition channels {m.partition} outside 0..{m.n_channels - 1}")


def _header_bytes(m: MapMeta, model_size: int) -> bytes:
    table = b""
    part = set(int(c) for c in m.partition)
    for i, (cid, name) in enumerate(zip(m.class_ids, m.class_names)):
        nb = name.encode("ascii")
        if not 1 <= len(nb) <= 255 or not 0 <= cid <= 255:
            raise InputError(f"class {name!r}: name must be 1..255 ASCII characters and index 0..255")
        table += struct.pack("<BBB", cid, FLAG_PARTITION if i in part else 0, len(nb)) + nb
    size = _FIXED.size + len(table) + 4
    fixed = _FIXED.pack(MAGIC, VERSION, 0, size, m.lat0_deg, m.lon0_deg, m.h0_m, m.res_m, m.x_min, m.y_max,
                        m.rows, m.cols, m.tile, m.n_channels, m.tile_rows * m.tile_cols, model_size)
    body = fixed + table
    return body + struct.pack("<I", zlib.crc32(body))


class PackWriter:
    """Writes a packed map tile by tile (any order); everything goes to disk on :meth:`close`.

    Tiles are held compressed in memory until then, because the map's probability model (the
    statistics of every context-coded tile) must be known before the first tile is coded. The file
    appears at ``path`` only when complete (written to a temporary name, then renamed).
    """

    def __init__(self, path, meta: MapMeta, *, level: int = ZLIB_LEVEL):
        _check_meta(meta, str(path))
        self.path = Path(path)
        self.meta = meta
        self.level = level
        self._tmp = self.path.with_name(self.path.name + ".part")
        if self.path.is_dir():
            raise InputError(f"{self.path}: is a directory; give the packed map's file name")
        if not self.path.parent.is_dir():
            raise InputError(f"{self.path}: directory {self.path.parent} does not exist")
        try:
            self._f = open(self._tmp, "wb")
        except OSError as e:
            raise InputError(f"{self.path}: cannot write ({e.strerror or e})") from None
        self._n = meta.tile_rows * meta.tile_cols
        self._spool = [None] * self._n  # per tile: None (empty) or (present, full, coding, zlib bytes)
        self._part = np.zeros(meta.n_channels, dtype=np.uint8)
        self._part[list(int(c) for c in meta.partition)] = 1
        self._counts = np.zeros((meta.n_channels * NCTX, 2), dtype=np.int64)
        nb = -(-meta.tile // _kernels.BLOCK)
        self._blk = np.zeros((meta.n_channels, nb, nb), dtype=np.uint8)
        self._taken = np.zeros((meta.tile, meta.tile), dtype=np.int64)
        self._qp = np.zeros((meta.tile + 2, meta.tile + 4), dtype=np.uint8)
        self._st = np.zeros(9, dtype=np.int64)
        self._nobuf = np.zeros(1, dtype=np.uint8)
        self._probs = np.zeros(meta.n_channels * NCTX, dtype=np.uint16)
        self.stored_bytes = 0
        self.empty_tiles = 0
        self.context_tiles = 0

    def write_tile(self, tile_row: int, tile_col: int, data: np.ndarray) -> None:
        """Store one tile: ``data`` (C, tile, tile) uint8 coverage (edge tiles padded with 0).

        Tiles whose stored codes are all multiples of 17 (16 coverage levels) are context-coded;
        any other codes are kept exactly, compressed with zlib.
        """
        m = self.meta
        if data.shape != (m.n_channels, m.tile, m.tile) or data.dtype != np.uint8:
            raise InputError(f"tile data must be uint8 {(m.n_channels, m.tile, m.tile)}, got {data.dtype} {data.shape}")
        k = tile_row * m.tile_cols + tile_col
        flat = data.reshape(m.n_channels, -1)
        present = flat.max(axis=1) > 0
        if not present.any():
            self._spool[k] = None
            return
        full = flat.min(axis=1) == 255
        stored = present & ~full
        pm = sum(1 << int(i) for i in np.flatnonzero(present))
        fm = sum(1 << int(i) for i in np.flatnonzero(full))
        if not stored.any():
            self._spool[k] = (pm, fm, None, b"")
            return
        codes = np.ascontiguousarray(data[stored])
        if not np.any(codes % 17):
            levels = data // 17
            kinds = np.where(full, 1, np.where(present, 2, 0)).astype(np.uint8)
            _kernels.count_tile(levels, kinds, self._part, self._probs, self._counts, self._nobuf, self._st,
                                self._blk, self._taken, self._qp)
            self._spool[k] = (pm, fm, CODING_CONTEXT, zlib.compress(codes.tobytes(), 1))
        else:
            self._spool[k] = (pm, fm, CODING_ZLIB, zlib.compress(codes.tobytes(), self.level))

    def _payload(self, item) -> bytes:
        m = self.meta
        pm, fm, coding, body = item
        mb = _mask_bytes(m.n_channels)
        head = pm.to_bytes(mb, "little") + fm.to_bytes(mb, "little")
        if coding is None:
            return head
        if coding == CODING_ZLIB:
            return head + bytes([CODING_ZLIB]) + body
        present = [(pm >> i) & 1 == 1 for i in range(m.n_channels)]
        full = [(fm >> i) & 1 == 1 for i in range(m.n_channels)]
        stored = [i for i in range(m.n_channels) if present[i] and not full[i]]
        raw = zlib.decompress(body)
        data = np.zeros((m.n_channels, m.tile, m.tile), dtype=np.uint8)
        data[stored] = np.frombuffer(raw, dtype=np.uint8).reshape(len(stored), m.tile, m.tile)
        for i in range(m.n_channels):
            if full[i]:
                data[i] = 255
        levels = data // 17
        kinds = np.array([1 if full[i] else (2 if present[i] else 0) for i in range(m.n_channels)], dtype=np.uint8)
        out = np.zeros(len(raw) + 64, dtype=np.uint8)
        st = self._st
        st[:] = 0
        st[1] = 0xFFFFFFFF
        st[3] = 1
        st[7] = 1
        _kernels.encode_tile(levels, kinds, self._part, self._probs, self._counts, out, st, self._blk, self._taken,
                             self._qp)
        n = _kernels.finish_stream(st, out)
        if n < 0:  # the model fits this tile badly: keep it as zlib, never larger than that
            return head + bytes([CODING_ZLIB]) + zlib.compress(raw, self.level)
        self.context_tiles += 1
        return head + bytes([CODING_CONTEXT]) + out[:n].tobytes()

    def close(self) -> int:
        """Build the model, code every tile, write the file and rename it into place; returns its size."""
        if self._f is None:
            return self.path.stat().st_size
        try:
            coded = any(it is not None and it[2] == CODING_CONTEXT for it in self._spool)
            model = b""
            if coded:
                table = model_from_counts(self._counts)
                self._probs[:] = PROB_LUT[table]
                model = zlib.compress(table.tobytes(), 9)
            index = []
            f = self._f
            head = _header_bytes(self.meta, len(model))
            f.write(head)
            f.write(b"\0" * (self._n * _ENTRY.size + 4))
            f.write(model + struct.pack("<I", zlib.crc32(model)))
            for it in self._spool:
                if it is None:
                    index.append((0, 0))
                    self.empty_tiles += 1
                    continue
                blob = self._payload(it)
                f.write(blob)
                index.append((len(blob), zlib.crc32(blob)))
                self.stored_bytes += len(blob)
            idx = b"".join(_ENTRY.pack(*e) for e in index)
            f.seek(len(head))
            f.write(idx + struct.pack("<I", zlib.crc32(idx)))
            f.close()
            self._f = None
            self._spool = []
            os.replace(self._tmp, self.path)
        except BaseException:
            self.abort()
            raise
        return self.path.stat().st_size

    def abort(self) -> None:
        """Drop the partial file."""
        if self._f is not None:
            self._f.close()
            self._f = None
        try:
            self._tmp.unlink()
        except FileNotFoundError:
            pass

    def __enter__(self):
        return self

    def __exit__(self, et, ev, tb):
        if et is None:
            self.close()
        else:
            self.abort()


def write_packed(path, meta: MapMeta, coverage: np.ndarray, *, levels: int = 256) -> int:
    """Write a whole (C, rows, cols) float coverage array (0..1) as a packed map; returns bytes written."""
    t = meta.tile
    with PackWriter(path, meta) as w:
        for tr in range(meta.tile_rows):
            for tc in range(meta.tile_cols):
                block = np.zeros((meta.n_channels, t, t), dtype=np.uint8)
                src = coverage[:, tr * t:(tr + 1) * t, tc * t:(tc + 1) * t]
                block[:, :src.shape[1], :src.shape[2]] = quantize(src, levels)
                w.write_tile(tr, tc, block)
    return w.path.stat().st_size


def quantize(cov: np.ndarray, levels: int = 256) -> np.ndarray:
    """Coverage 0..1 -> uint8 codes 0..255 on ``levels`` evenly spaced steps (clipped, rounded).

    ``levels = 16`` keeps codes k * 17: coverage in steps of 1/15, which compress
    far better than 256 steps and still place an edge to a fifteenth of a cell.
    """
    if not 2 <= int(levels) <= 256:
        raise InputError(f"coverage levels must be 2..256, got {levels}")
    c = np.clip(cov, 0.0, 1.0)
    if levels == 256:
        return np.rint(c * 255.0).astype(np.uint8)
    step = 255.0 / (levels - 1)
    return np.rint(np.rint(c * (levels - 1)) * step).astype(np.uint8)


_DAMAGED = object()


class PackedMap:
    """Random-access reader of a packed map. Open with :meth:`open`.

    Attributes
    ----------
    meta : MapMeta
    frame : LocalFrame
        The ENU frame at the map's origin.
    path : Path
    """

    def __init__(self, path: Path, f, meta: MapMeta, index: np.ndarray, cache_bytes: int, file_size: int,
                 probs=None):
        self.path = path
        self._f = f
        self.meta = meta
        self.frame = LocalFrame(meta.lat0_deg, meta.lon0_deg, meta.h0_m)
        self._index = index
        self._cache: OrderedDict = OrderedDict()
        self._cache_bytes = max(int(cache_bytes), 0)
        self._cached = 0
        self._damaged: set = set()
        self._lock = threading.Lock()
        self.file_size = file_size
        self._tile_nbytes = meta.n_channels * meta.tile * meta.tile
        self._probs = probs  # (C * NCTX,) uint16 from the model, or None when the map has no model
        self._part = np.zeros(meta.n_channels, dtype=np.uint8)
        self._part[list(meta.partition)] = 1
        self._nocounts = np.zeros((1, 2), dtype=np.int64)

    # ------------------------------------------------------------------ opening
    @classmethod
    def open(cls, path, *, cache_bytes: int = DEFAULT_CACHE_BYTES) -> "PackedMap":
        """Open and validate a packed map (header, class table and tile index; tiles are read on demand).

        Parameters
        ----------
        path : str or Path
        cache_bytes : int
            Upper bound of the decoded-tile cache (bytes); 0 disables caching.

        Raises
        ------
        MapFormatError
            Wrong magic, unsupported version, truncated file, checksum mismatch
            in the header or index, or declared sizes beyond the limits.
        """
        p = Path(path)
        try:
            f = open(p, "rb")
        except FileNotFoundError:
            raise MapFormatError(f"{p}: no such file") from None
        except IsADirectoryError:
            raise MapFormatError(f"{p}: is a directory, not a packed map") from None
        except OSError as e:
            raise MapFormatError(f"{p}: cannot read ({e.strerror or e})") from None
        try:
            size = os.fstat(f.fileno()).st_size
            meta, index, probs = _read_head(f, size, str(p))
        except BaseException:
            f.close()
            raise
        return cls(p, f, meta, index, cache_bytes, size, probs)

    def close(self) -> None:
        if self._f is not None:
            self._f.close()
            self._f = None
        self._cache.clear()
        self._cached = 0

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __repr__(self):
        m = self.meta
        return f"PackedMap({str(self.path)!r}, {m.rows}x{m.cols} cells at {m.res_m:g} m, {m.n_channels} classes)"

    # ------------------------------------------------------------------ geometry
    def cell_of(self, x_m, y_m):
        """ENU metres -> continuous (row, col) cell coordinates (a cell centre is at +0.5)."""
        m = self.meta
        if np.ndim(x_m) == 0 and np.ndim(y_m) == 0:
            return (m.y_max - float(y_m)) / m.res_m, (float(x_m) - m.x_min) / m.res_m
        return ((m.y_max - np.asarray(y_m, dtype=np.float64)) / m.res_m,
                (np.asarray(x_m, dtype=np.float64) - m.x_min) / m.res_m)

    def xy_of(self, row, col):
        """Continuous (row, col) -> ENU metres (x east, y north)."""
        m = self.meta
        if np.ndim(row) == 0 and np.ndim(col) == 0:
            return m.x_min + float(col) * m.res_m, m.y_max - float(row) * m.res_m
        return (m.x_min + np.asarray(col, dtype=np.float64) * m.res_m,
                m.y_max - np.asarray(row, dtype=np.float64) * m.res_m)

    @property
    def tiles_damaged(self) -> int:
        """Number of distinct damaged tiles met so far."""
        return len(self._damaged)

    @property
    def empty_tiles(self) -> int:
        """Number of tiles stored as empty (nothing mapped in them)."""
        return int((self._index[:, 1] == 0).sum())

    @property
    def cache_used_bytes(self) -> int:
        return self._cached

    def check_tiles(self) -> int:
        """Read and verify every stored tile (checksum, stream, size); returns the number damaged.

        Damaged tiles are logged once each, as during window reads. Uses no cache.
        """
        m = self.meta
        for k in range(m.tile_rows * m.tile_cols):
            off, length, crc = (int(v) for v in self._index[k])
            if length == 0 or k in self._damaged:
                continue
            with self._lock:
                if self._f is None:
                    raise InputError(f"{self.path}: map is closed")
                self._f.seek(off)
                blob = self._f.read(length)
            self._decode(k, blob, crc)
        return len(self._damaged)

    def warmup(self) -> None:
        """Load (or, on a first run, compile) the context-tile decoder now rather than at the first read.

        The live loop's first window read should not pay for it. Decodes a tiny synthetic tile; the map
        itself is not read.
        """
        kinds = np.array([2], dtype=np.uint8)
        probs = np.full(NCTX, 32768, dtype=np.uint16)
        levels = np.zeros((1, MIN_TILE, MIN_TILE), dtype=np.uint8)
        st = np.array([0, 0xFFFFFFFF, 0, 0, 4, 0, 0, 0, 0], dtype=np.int64)
        nb = -(-MIN_TILE // _kernels.BLOCK)
        _kernels.decode_tile(levels, kinds, np.zeros(1, dtype=np.uint8), probs, self._nocounts,
                             np.zeros(1, dtype=np.uint8), st, np.zeros((1, nb, nb), dtype=np.uint8),
                             np.zeros((MIN_TILE, MIN_TILE), dtype=np.int64),
                             np.zeros((MIN_TILE + 2, MIN_TILE + 4), dtype=np.uint8))

    def clear_cache(self) -> None:
        """Forget every decoded tile (the next reads are cold)."""
        with self._lock:
            self._cache.clear()
            self._cached = 0

    # ------------------------------------------------------------------ reading
    def read_window(self, row0: int, col0: int, out: np.ndarray, *, known_out: np.ndarray | None = None) -> int:
        """Fill ``out[C, H, W]`` with cells [row0, row0+H) x [col0, col0+W) (global cell indices).

        Parameters
        ----------
        row0, col0 : int
            Global cell index of the window's north-west cell; may be negative or
            past the map (those cells are unknown).
        out : (C, H, W) float32
            Caller-owned buffer; receives coverage 0..1 (0 where unknown).
        known_out : (H, W) uint8, optional
            Receives 1 where the cell is inside the map and its tile is sound, else 0.

        Returns
        -------
        int
            Number of damaged tiles met by this window (each is logged once as a warning).
        """
        m = self.meta
        if out.ndim != 3 or out.shape[0] != m.n_channels or out.dtype != np.float32:
            raise InputError(f"read_window: out must be float32 ({m.n_channels}, H, W), got {out.dtype} {out.shape}")
        _, h, w = out.shape
        if known_out is not None and (known_out.shape != (h, w) or known_out.dtype != np.uint8):
            raise InputError(f"read_window: known_out must be uint8 ({h}, {w}), got {known_out.dtype} {known_out.shape}")
        row0, col0 = int(row0), int(col0)
        r_lo, r_hi = max(row0, 0), min(row0 + h, m.rows)
        c_lo, c_hi = max(col0, 0), min(col0 + w, m.cols)
        inside_all = r_lo == row0 and c_lo == col0 and r_hi == row0 + h and c_hi == col0 + w
        if not inside_all:
            out[...] = 0.0
        if known_out is not None:
            known_out[...] = 0
        if r_lo >= r_hi or c_lo >= c_hi:
            return 0
        t = m.tile
        damaged = 0
        for tr in range(r_lo // t, (r_hi - 1) // t + 1):
            a0, a1 = max(r_lo, tr * t), min(r_hi, (tr + 1) * t)
            for tc in range(c_lo // t, (c_hi - 1) // t + 1):
                b0, b1 = max(c_lo, tc * t), min(c_hi, (tc + 1) * t)
                dst = out[:, a0 - row0:a1 - row0, b0 - col0:b1 - col0]
                tile = self._tile(tr, tc)
                if tile is _DAMAGED:
                    damaged += 1
                    dst[...] = 0.0
                    continue
                if tile is None:
                    dst[...] = 0.0
                else:
                    np.multiply(tile[:, a0 - tr * t:a1 - tr * t, b0 - tc * t:b1 - tc * t], INV255, out=dst)
                if known_out is not None:
                    known_out[a0 - row0:a1 - row0, b0 - col0:b1 - col0] = 1
        return damaged

    def coverage_at(self, x_m: float, y_m: float):
        """Coverage of every channel in the cell holding ENU point (x, y): (C,) float32, or None if unknown."""
        r, c = self.cell_of(x_m, y_m)
        buf = np.zeros((self.meta.n_channels, 1, 1), dtype=np.float32)
        known = np.zeros((1, 1), dtype=np.uint8)
        self.read_window(int(math.floor(r)), int(math.floor(c)), buf, known_out=known)
        return buf[:, 0, 0] if known[0, 0] else None

    def read_all(self, *, known_out: np.ndarray | None = None) -> np.ndarray:
        """The whole map as (C, rows, cols) float32 (allocates; for tools, not for the robot's loop)."""
        m = self.meta
        out = np.empty((m.n_channels, m.rows, m.cols), dtype=np.float32)
        self.read_window(0, 0, out, known_out=known_out)
        return out

    def _tile(self, tr: int, tc: int):
        """Decoded tile (C, t, t) uint8, None for an empty tile, or _DAMAGED."""
        k = tr * self.meta.tile_cols + tc
        off, length, crc = (int(v) for v in self._index[k])
        if length == 0:
            return None
        if k in self._damaged:
            return _DAMAGED
        with self._lock:
            hit = self._cache.get(k)
            if hit is not None:
                self._cache.move_to_end(k)
                return hit
            if self._f is None:
                raise InputError(f"{self.path}: map is closed")
            self._f.seek(off)
            blob = self._f.read(length)
        tile = self._decode(k, blob, crc)
        if tile is _DAMAGED:
            return tile
        if self._cache_bytes >= tile.nbytes:
            with self._lock:
                self._cache[k] = tile
                self._cached += tile.nbytes
                while self._cached > self._cache_bytes:
                    _, old = self._cache.popitem(last=False)
                    self._cached -= old.nbytes
        return tile

    def _decode(self, k: int, blob: bytes, crc: int):
        m = self.meta
        reason = None
        tsz = m.tile * m.tile
        mb = _mask_bytes(m.n_channels)
        stored, full, raw, levels = [], [], b"", None
        if len(blob) != int(self._index[k][1]):
            reason = "file shorter than its index says"
        elif zlib.crc32(blob) != crc:
            reason = "CRC-32 mismatch"
        elif len(blob) < 2 * mb:
            reason = "shorter than its channel masks"
        else:
            pm = int.from_bytes(blob[:mb], "little")
            fm = int.from_bytes(blob[mb:2 * mb], "little")
            allowed = (1 << m.n_channels) - 1
            if pm & ~allowed or fm & ~pm or pm == 0:
                reason = "channel masks name channels the map does not have"
            else:
                present = [(pm >> i) & 1 == 1 for i in range(m.n_channels)]
                full = [(fm >> i) & 1 == 1 for i in range(m.n_channels)]
                stored = [i for i in range(m.n_channels) if present[i] and not full[i]]
                body = memoryview(blob)[2 * mb + 1:]
                if not stored:
                    if len(blob) != 2 * mb:
                        reason = "data after a tile with no stored channels"
                elif len(blob) < 2 * mb + 1:
                    reason = "no coding byte after the channel masks"
                elif blob[2 * mb] == CODING_ZLIB:
                    want = len(stored) * tsz
                    try:
                        d = zlib.decompressobj()
                        raw = d.decompress(body, want)
                        if len(raw) != want or d.unconsumed_tail or not d.eof or d.unused_data:
                            reason = "stream does not inflate to the declared tile size"
                    except zlib.error as e:
                        reason = f"bad zlib stream ({e})"
                elif blob[2 * mb] == CODING_CONTEXT:
                    if self._probs is None:
                        reason = "context-coded, but the map has no model"
                    else:
                        levels = self._decode_context(present, full, body)
                else:
                    reason = f"unknown tile coding {blob[2 * mb]}"
        if reason is not None:
            with self._lock:
                first = k not in self._damaged
                self._damaged.add(k)
            if first:
                tr, tc = divmod(k, m.tile_cols)
                log.warning("%s: damaged tile (row %d, col %d): %s; its cells read as unknown",
                            self.path, tr, tc, reason)
            return _DAMAGED
        if levels is not None:
            np.multiply(levels, np.uint8(17), out=levels)  # levels 0..15 -> codes 0..255
            return levels
        tile = np.zeros((m.n_channels, m.tile, m.tile), dtype=np.uint8)
        if stored:
            tile[stored] = np.frombuffer(raw, dtype=np.uint8).reshape(len(stored), m.tile, m.tile)
        for i in range(m.n_channels):
            if full[i]:
                tile[i] = 255
        return tile

    def _decode_context(self, present, full, body) -> np.ndarray:
        """Levels (C, t, t) uint8 of a context-coded tile (full channels 15, absent 0)."""
        m = self.meta
        kinds = np.array([1 if full[i] else (2 if present[i] else 0) for i in range(m.n_channels)], dtype=np.uint8)
        levels = np.zeros((m.n_channels, m.tile, m.tile), dtype=np.uint8)
        levels[kinds == 1] = 15
        buf = np.frombuffer(bytearray(body), dtype=np.uint8) if len(body) else np.zeros(1, dtype=np.uint8)
        head = bytes(body[:4]).ljust(4, b"\0")
        st = np.array([0, 0xFFFFFFFF, 0, 0, 4, int.from_bytes(head, "big"), len(body), 0, 0], dtype=np.int64)
        nb = -(-m.tile // _kernels.BLOCK)
        blk = np.zeros((m.n_channels, nb, nb), dtype=np.uint8)
        taken = np.zeros((m.tile, m.tile), dtype=np.int64)
        qp = np.zeros((m.tile + 2, m.tile + 4), dtype=np.uint8)
        _kernels.decode_tile(levels, kinds, self._part, self._probs, self._nocounts, buf, st, blk, taken, qp)
        return levels


def _read_head(f, size: int, where: str):
    """Parse and check the header, the tile index and the model; raises MapFormatError."""
    def bad(msg):
        return MapFormatError(f"{where}: {msg}")

    head = f.read(min(size, MAX_HEADER))
    if not head:
        raise bad("truncated: the file is empty")
    if head[:len(MAGIC)] != MAGIC[:len(head)]:
        raise bad("not a tinyloc packed map (wrong magic bytes)")
    if len(head) >= 10:
        (version,) = struct.unpack_from("<H", head, 8)
        if version > VERSION:
            raise bad(f"format version {version} is newer than this tinyloc reads ({VERSION}); update tinyloc")
        if version == 1:
            raise bad("format version 1 is no longer read by this tinyloc; pack the map again from its GeoJSON "
                      "(tinyloc map pack)")
        if version < 1:
            raise bad(f"unsupported format version {version}")
    if len(head) < MIN_HEADER:
        raise bad(f"truncated: file is {size} bytes, shorter than the smallest header ({MIN_HEADER} bytes)")
    (magic, version, flags, hsize, lat0, lon0, h0, res, x_min, y_max, rows, cols, tile, nch,
     ntiles, model_size) = _FIXED.unpack_from(head)
    if not MIN_HEADER <= hsize <= MAX_HEADER:
        raise bad(f"header declares its size as {hsize} bytes (limit {MIN_HEADER}..{MAX_HEADER})")
    if hsize > size:
        raise bad(f"truncated: header needs {hsize} bytes, file has {size}")
    (crc,) = struct.unpack_from("<I", head, hsize - 4)
    if zlib.crc32(head[:hsize - 4]) != crc:
        raise bad("header checksum mismatch (the file is damaged)")
    if flags != 0:
        raise bad(f"unknown header flags 0x{flags:04x} (written by a newer tinyloc?)")
    names, ids, part = [], [], []
    pos = _FIXED.size
    for i in range(nch if nch <= MAX_CHANNELS else 0):
        if pos + 3 > hsize - 4:
            raise bad(f"class table runs past the header (entry {i})")
        cid, cflags, n = head[pos], head[pos + 1], head[pos + 2]
        name = head[pos + 3:pos + 3 + n]
        if n == 0 or pos + 3 + n > hsize - 4:
            raise bad(f"class table entry {i} is malformed")
        if cflags & ~FLAG_PARTITION:
            raise bad(f"class table entry {i} has unknown flags 0x{cflags:02x} (written by a newer tinyloc?)")
        try:
            names.append(name.decode("ascii"))
        except UnicodeDecodeError:
            raise bad(f"class table entry {i} is not ASCII") from None
        ids.append(cid)
        if cflags & FLAG_PARTITION:
            part.append(i)
        pos += 3 + n
    meta = MapMeta(lat0, lon0, h0, res, x_min, y_max, rows, cols, tile, tuple(names), tuple(ids), version,
                   tuple(part))
    if nch > MAX_CHANNELS:
        raise bad(f"header declares {nch} channels (limit 1..{MAX_CHANNELS})")
    _check_meta(meta, where)
    if pos != hsize - 4:
        raise bad("class table does not fill the header exactly")
    if ntiles != meta.tile_rows * meta.tile_cols:
        raise bad(f"header declares {ntiles} tiles, the extent needs {meta.tile_rows * meta.tile_cols}")
    if model_size > _max_model(nch):
        raise bad(f"header declares a model of {model_size} bytes (limit {_max_model(nch)})")
    index_end = hsize + ntiles * _ENTRY.size + 4
    if index_end > size:
        raise bad(f"truncated: tile index needs {index_end} bytes, file has {size}")
    f.seek(hsize)
    raw = f.read(ntiles * _ENTRY.size + 4)
    if len(raw) != ntiles * _ENTRY.size + 4:
        raise bad("truncated while reading the tile index")
    (icrc,) = struct.unpack_from("<I", raw, ntiles * _ENTRY.size)
    if zlib.crc32(raw[:-4]) != icrc:
        raise bad("tile index checksum mismatch (the file is damaged)")
    entries = np.frombuffer(raw[:-4], dtype=np.dtype([("len", "<u4"), ("crc", "<u4")]))
    lengths = entries["len"].astype(np.int64)
    max_blob = _max_payload(meta)
    if np.any(lengths > max_blob):
        raise bad(f"tile index declares a tile larger than any valid tile ({max_blob} bytes)")
    model_end = index_end + model_size + 4
    if model_end > size:
        raise bad(f"truncated: model needs {model_end} bytes, file has {size}")
    ends = model_end + np.cumsum(lengths)
    if ends.size and int(ends[-1]) > size:
        raise bad(f"truncated: tile data needs {int(ends[-1])} bytes, file has {size}")
    index = np.stack([ends - lengths, lengths, entries["crc"].astype(np.int64)], axis=1)
    probs = None
    f.seek(index_end)
    blob = f.read(model_size + 4)
    if len(blob) != model_size + 4:
        raise bad("truncated while reading the model")
    (mcrc,) = struct.unpack_from("<I", blob, model_size)
    if zlib.crc32(blob[:model_size]) != mcrc:
        raise bad("model checksum mismatch (the file is damaged)")
    if model_size:
        want = nch * NCTX
        try:
            d = zlib.decompressobj()
            table = d.decompress(blob[:model_size], want)
            ok = len(table) == want and not d.unconsumed_tail and d.eof and not d.unused_data
        except zlib.error:
            ok = False
        if not ok:
            raise bad(f"model does not inflate to its declared size ({want} bytes)")
        probs = PROB_LUT[np.frombuffer(table, dtype=np.uint8)]
    return meta, index, probs
