"""The packed map format: round trip, window reads, cache bound, and a hostile-input decoder.

References: the CRC-32/ISO-HDLC catalogue check value (CRC of ASCII "123456789" is
0xCBF43926, CRC RevEng catalogue; from memory) and the independent `crcmod`
implementation (predefined "crc-32"); zlib (RFC 1950) for the stream format. The
context-coded tiles are checked against a slow pure-Python coder written from
maps_packed/FORMAT.md (tests/_maps_helpers.py).
"""

import logging
import struct
import tracemalloc
import zlib

import crcmod.predefined
import numpy as np
import pytest

from tinyloc.errors import InputError, MapFormatError
from tinyloc.maps import packfile
from tinyloc.maps.packfile import MapMeta, PackedMap, quantize, write_packed

NAMES = ("building", "road", "sidewalk", "grass", "tree", "pole", "fence", "parking", "water")


GROUND = (0, 1, 2, 3, 7, 8)


def meta(rows=150, cols=210, tile=32, names=NAMES, partition=()):
    return MapMeta(44.4321, -101.2345, 312.5, 0.5, -40.0, 60.0, rows, cols, tile, tuple(names),
                   tuple(range(len(names))), partition=partition)


def sample_coverage(rng, m):
    cov = np.zeros((m.n_channels, m.rows, m.cols), dtype=np.float32)
    for c in range(m.n_channels):
        for _ in range(6):
            r0, c0 = rng.integers(0, m.rows), rng.integers(0, m.cols)
            cov[c, r0:r0 + rng.integers(3, 40), c0:c0 + rng.integers(3, 40)] = rng.random()
    cov[:, 96:128, 160:192] = 0.0  # at least one empty tile
    cov[:, :, :] *= rng.random(cov.shape) > 0.05
    return cov


def make_packed(tmp_path, levels):
    rng = np.random.default_rng(2024)
    m = meta(partition=GROUND if levels == 16 else ())
    cov = sample_coverage(rng, m)
    p = tmp_path / f"site{levels}.tlm"
    write_packed(p, m, cov, levels=levels)
    # What the reader must return: the 8-bit code times 1/255 in float32.
    return p, m, quantize(cov, levels) * np.float32(1.0 / 255.0)


@pytest.fixture(params=[256, 16], ids=["zlib-256-levels", "context-16-levels"])
def packed(tmp_path, request):
    """Both tile codings: 256 levels (zlib, no model) and 16 levels (context-coded with a model)."""
    return make_packed(tmp_path, request.param)


@pytest.fixture
def packed256(tmp_path):
    return make_packed(tmp_path, 256)


@pytest.fixture
def packed16(tmp_path):
    return make_packed(tmp_path, 16)


def test_crc32_is_iso_hdlc():
    assert zlib.crc32(b"123456789") == 0xCBF43926  # catalogue check value
    ref = crcmod.predefined.mkCrcFun("crc-32")
    rng = np.random.default_rng(5)
    for n in (0, 1, 7, 4096):
        data = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        assert zlib.crc32(data) == ref(data)


def test_stored_tile_checksums_agree_with_crcmod(packed):
    p, m, _ = packed
    ref = crcmod.predefined.mkCrcFun("crc-32")
    raw = p.read_bytes()
    with PackedMap.open(p) as pm:
        for off, length, crc in pm._index:
            if length:
                assert ref(raw[off:off + length]) == crc
    (hsize,) = struct.unpack_from("<I", raw, 12)
    assert ref(raw[:hsize - 4]) == struct.unpack_from("<I", raw, hsize - 4)[0]


def test_round_trip_and_metadata(packed):
    p, m, want = packed
    with PackedMap.open(p) as pm:
        assert pm.meta == m
        assert pm.frame.lat0_deg == m.lat0_deg and pm.frame.h0_m == m.h0_m
        known = np.zeros((m.rows, m.cols), dtype=np.uint8)
        got = pm.read_all(known_out=known)
        assert np.max(np.abs(got - want)) < 1e-7
        assert known.all()
        assert pm.empty_tiles > 0


def test_random_windows_partly_or_wholly_outside(packed):
    p, m, want = packed
    rng = np.random.default_rng(9)
    pad = 300
    ref = np.zeros((m.n_channels, m.rows + 2 * pad, m.cols + 2 * pad), dtype=np.float32)
    ref[:, pad:pad + m.rows, pad:pad + m.cols] = want
    kref = np.zeros(ref.shape[1:], dtype=np.uint8)
    kref[pad:pad + m.rows, pad:pad + m.cols] = 1
    with PackedMap.open(p, cache_bytes=40_000) as pm:
        for _ in range(60):
            h, w = rng.integers(1, 90, 2)
            r0, c0 = rng.integers(-pad + 1, m.rows + pad - 100), rng.integers(-pad + 1, m.cols + pad - 100)
            out = np.full((m.n_channels, h, w), 7.0, dtype=np.float32)
            known = np.full((h, w), 9, dtype=np.uint8)
            assert pm.read_window(r0, c0, out, known_out=known) == 0
            assert np.array_equal(out, ref[:, r0 + pad:r0 + pad + h, c0 + pad:c0 + pad + w])
            assert np.array_equal(known, kref[r0 + pad:r0 + pad + h, c0 + pad:c0 + pad + w])
            assert pm.cache_used_bytes <= 40_000


def test_cell_of_follows_the_raster_convention(packed):
    p, m, _ = packed
    with PackedMap.open(p) as pm:
        # Cell (i, j) centre: x = x_min + (j + 0.5) res, y = y_max - (i + 0.5) res.
        i, j = 17, 23
        x, y = m.x_min + (j + 0.5) * m.res_m, m.y_max - (i + 0.5) * m.res_m
        assert pm.cell_of(x, y) == pytest.approx((i + 0.5, j + 0.5))
        assert pm.xy_of(i + 0.5, j + 0.5) == pytest.approx((x, y))


def test_warm_window_reads_allocate_no_arrays(packed):
    # The per-frame path: once the tiles are cached, a read only writes into the caller's buffers.
    # numpy's uint8 -> float32 cast runs through its own fixed-size buffers (8192 elements), so the bound
    # is far below one window (1.1 MB here) but not zero.
    p, m, _ = packed
    with PackedMap.open(p) as pm:
        out = np.zeros((m.n_channels, m.rows, m.cols), dtype=np.float32)
        known = np.zeros((m.rows, m.cols), dtype=np.uint8)
        pm.read_window(0, 0, out, known_out=known)
        tracemalloc.start()
        try:
            for _ in range(5):
                pm.read_window(0, 0, out, known_out=known)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    assert peak < 100_000 < out.nbytes // 10


def test_cache_disabled_still_reads(packed):
    p, m, want = packed
    with PackedMap.open(p, cache_bytes=0) as pm:
        out = np.zeros((m.n_channels, 40, 50), dtype=np.float32)
        pm.read_window(10, 20, out)
        assert np.array_equal(out, want[:, 10:50, 20:70])
        assert pm.cache_used_bytes == 0


def test_bad_buffers_are_rejected(packed):
    p, m, _ = packed
    with PackedMap.open(p) as pm:
        with pytest.raises(InputError, match="out must be float32"):
            pm.read_window(0, 0, np.zeros((m.n_channels, 4, 4), dtype=np.float64))
        with pytest.raises(InputError, match="out must be float32"):
            pm.read_window(0, 0, np.zeros((3, 4, 4), dtype=np.float32))
        with pytest.raises(InputError, match="known_out must be uint8"):
            pm.read_window(0, 0, np.zeros((m.n_channels, 4, 4), dtype=np.float32),
                           known_out=np.zeros((4, 5), dtype=np.uint8))


# ---------------------------------------------------------------- hostile input

def header_end(raw):
    """(header size, end of the tile index, end of the model section)."""
    (hsize,) = struct.unpack_from("<I", raw, 12)
    (ntiles, msize) = struct.unpack_from("<II", raw, 76)
    return hsize, hsize + ntiles * 8 + 4, hsize + ntiles * 8 + 4 + msize + 4


def test_both_codings_are_exercised(packed16, packed256):
    # The 16-level map is context-coded with a model; the 256-level one is zlib-coded without one.
    for (p, m, _), coded in ((packed16, True), (packed256, False)):
        raw = p.read_bytes()
        _, index_end, model_end = header_end(raw)
        assert (model_end - index_end > 4) == coded
        with PackedMap.open(p) as pm:
            codings = {raw[int(off) + 4] for off, length, _ in pm._index if length > 4}
        assert codings == ({1} if coded else {0})


def test_truncated_at_every_byte_of_header_index_and_model(packed, tmp_path):
    p, m, _ = packed
    raw = p.read_bytes()
    _, _, model_end = header_end(raw)
    q = tmp_path / "cut.tlm"
    for n in range(model_end + 1):
        q.write_bytes(raw[:n])
        with pytest.raises(MapFormatError) as e:
            PackedMap.open(q)
        msg = str(e.value)
        assert msg.startswith(f"{q}: truncated"), msg
        assert "\n" not in msg


def test_truncated_at_random_points_in_tile_data(packed, tmp_path):
    p, m, _ = packed
    raw = p.read_bytes()
    _, _, model_end = header_end(raw)
    rng = np.random.default_rng(77)
    q = tmp_path / "cut.tlm"
    for n in rng.integers(model_end + 1, len(raw), 40):
        q.write_bytes(raw[:n])
        with pytest.raises(MapFormatError, match=r"truncated: tile data needs \d+ bytes, file has \d+"):
            PackedMap.open(q)


def test_wrong_magic(packed, tmp_path):
    p, _, _ = packed
    raw = bytearray(p.read_bytes())
    raw[0:5] = b"GIF89"
    q = tmp_path / "x.tlm"
    q.write_bytes(bytes(raw))
    with pytest.raises(MapFormatError, match=r"x.tlm: not a tinyloc packed map \(wrong magic bytes\)$"):
        PackedMap.open(q)
    q.write_text('{"type": "FeatureCollection"}')
    with pytest.raises(MapFormatError, match="wrong magic bytes"):
        PackedMap.open(q)


def patch_header(raw, fmt, offset, value, fix_crc=True):
    b = bytearray(raw)
    struct.pack_into(fmt, b, offset, value)
    if fix_crc:
        (hsize,) = struct.unpack_from("<I", b, 12)
        if 88 <= hsize <= len(b):
            struct.pack_into("<I", b, hsize - 4, zlib.crc32(bytes(b[:hsize - 4])))
    return bytes(b)


def test_newer_version(packed, tmp_path):
    p, _, _ = packed
    q = tmp_path / "v3.tlm"
    q.write_bytes(patch_header(p.read_bytes(), "<H", 8, 3))
    with pytest.raises(MapFormatError,
                       match=r"v3.tlm: format version 3 is newer than this tinyloc reads \(2\); update tinyloc$"):
        PackedMap.open(q)


def test_version_1_is_refused_with_the_fix(packed, tmp_path):
    p, _, _ = packed
    q = tmp_path / "v1.tlm"
    q.write_bytes(patch_header(p.read_bytes(), "<H", 8, 1))
    with pytest.raises(MapFormatError, match=r"v1.tlm: format version 1 is no longer read by this tinyloc; "
                                             r"pack the map again from its GeoJSON \(tinyloc map pack\)$"):
        PackedMap.open(q)


MODEL_LIMIT = 9 * packfile.NCTX + (9 * packfile.NCTX >> 8) + 64  # zlib's worst case over the model table

ABSURD = [
    ("<I", 12, 0xFFFFFFF0, r"header declares its size as 4294967280 bytes \(limit 88\.\.65536\)"),
    ("<I", 64, 1 << 31, r"header declares 2147483648 x 210 cells \(limit 1\.\.262144 per side\)"),
    ("<I", 68, 0, r"header declares 150 x 0 cells"),
    ("<H", 72, 1, r"header declares tile size 1 \(limit 8\.\.1024\)"),
    ("<H", 74, 60000, r"header declares 60000 channels \(limit 1\.\.64\)"),
    ("<I", 76, 123456, r"header declares 123456 tiles, the extent needs 35"),
    ("<d", 40, float("nan"), r"header resolution nan m is not in \(0, 1000\]"),
    ("<d", 16, 95.0, r"header origin latitude/longitude out of range"),
    ("<I", 80, 0xFFFFFFFF, rf"header declares a model of 4294967295 bytes \(limit {MODEL_LIMIT}\)"),
    ("<I", 80, MODEL_LIMIT + 1, rf"header declares a model of {MODEL_LIMIT + 1} bytes \(limit {MODEL_LIMIT}\)"),
]


@pytest.mark.parametrize("fmt,offset,value,msg", ABSURD)
def test_absurd_declared_sizes(packed, tmp_path, fmt, offset, value, msg):
    p, _, _ = packed
    raw = p.read_bytes()
    q = tmp_path / "absurd.tlm"
    q.write_bytes(patch_header(raw, fmt, offset, value))
    tracemalloc.start()
    try:
        with pytest.raises(MapFormatError, match=msg):
            PackedMap.open(q)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 4 * len(raw) + (1 << 20)  # never more than the file justifies


def patch_index(raw, tile_k, length=None, crc=None):
    b = bytearray(raw)
    hsize, index_end, _ = header_end(raw)
    o = hsize + 8 * tile_k
    old_len, old_crc = struct.unpack_from("<II", b, o)
    struct.pack_into("<II", b, o, old_len if length is None else length, old_crc if crc is None else crc)
    struct.pack_into("<I", b, index_end - 4, zlib.crc32(bytes(b[hsize:index_end - 4])))
    return bytes(b)


def replace_tile(raw, tile_k, payload):
    """The file with tile k's payload replaced (tiles lie back to back in index order) and its CRC fixed."""
    hsize, index_end, model_end = header_end(raw)
    lengths = [struct.unpack_from("<I", raw, hsize + 8 * k)[0] for k in range((index_end - 4 - hsize) // 8)]
    off = model_end + sum(lengths[:tile_k])
    b = raw[:off] + payload + raw[off + lengths[tile_k]:]
    return patch_index(b, tile_k, length=len(payload), crc=zlib.crc32(payload))


def first_stored_tile(p):
    with PackedMap.open(p) as pm:
        return int(np.flatnonzero(pm._index[:, 1] > 0)[0]), pm._index.copy()


def test_absurd_tile_index_entries(packed, tmp_path):
    p, m, _ = packed
    raw = p.read_bytes()
    k, _ = first_stored_tile(p)
    limit = 2 * 2 + 1 + 9 * 32 * 32 + (9 * 32 * 32 >> 8) + 64
    q = tmp_path / "idx.tlm"
    for length in (0xFFFFFFFF, limit + 1):
        q.write_bytes(patch_index(raw, k, length=length))
        with pytest.raises(MapFormatError, match=rf"tile index declares a tile larger than any valid tile \({limit} bytes\)"):
            PackedMap.open(q)
    q.write_bytes(patch_index(raw, k, length=limit))  # at the limit: accepted, but the file is too short
    with pytest.raises(MapFormatError, match=r"truncated: tile data needs \d+ bytes, file has \d+"):
        PackedMap.open(q)


def test_model_damage_is_detected(packed16, tmp_path):
    p, m, _ = packed16
    raw = p.read_bytes()
    hsize, index_end, model_end = header_end(raw)
    q = tmp_path / "model.tlm"
    b = bytearray(raw)
    b[index_end + 5] ^= 0x04
    q.write_bytes(bytes(b))
    with pytest.raises(MapFormatError, match=r"model.tlm: model checksum mismatch \(the file is damaged\)$"):
        PackedMap.open(q)
    # A sound checksum over a model that inflates to the wrong size: refused, whatever the checksum says.
    for table in (bytes(9 * packfile.NCTX - 1), bytes(9 * packfile.NCTX + 1), b"not zlib"):
        model = zlib.compress(table) if table != b"not zlib" else table
        c = raw[:index_end] + model + struct.pack("<I", zlib.crc32(model)) + raw[model_end:]
        c = patch_header(c, "<I", 80, len(model))
        q.write_bytes(c)
        with pytest.raises(MapFormatError, match=rf"model does not inflate to its declared size \({9 * packfile.NCTX} bytes\)$"):
            PackedMap.open(q)


def test_header_and_index_damage_is_detected(packed, tmp_path):
    p, _, _ = packed
    raw = bytearray(p.read_bytes())
    hsize, index_end, _ = header_end(raw)
    q = tmp_path / "d.tlm"
    b = bytearray(raw)
    b[44] ^= 0x10  # inside res_m, CRC left stale
    q.write_bytes(bytes(b))
    with pytest.raises(MapFormatError, match=r"header checksum mismatch \(the file is damaged\)$"):
        PackedMap.open(q)
    b = bytearray(raw)
    b[hsize + 3] ^= 0x01
    q.write_bytes(bytes(b))
    with pytest.raises(MapFormatError, match=r"tile index checksum mismatch \(the file is damaged\)$"):
        PackedMap.open(q)


def test_byte_flips_in_tiles_read_as_unknown_with_one_warning(packed, tmp_path, caplog):
    p, m, want = packed
    raw = bytearray(p.read_bytes())
    _, index = first_stored_tile(p)
    stored = np.flatnonzero(index[:, 1] > 0)
    rng = np.random.default_rng(31)
    hit = sorted(rng.choice(stored, 3, replace=False))
    for k in hit:
        off, length, _ = index[k]
        raw[off + int(rng.integers(0, length))] ^= 1 << int(rng.integers(0, 8))
    q = tmp_path / "flip.tlm"
    q.write_bytes(bytes(raw))
    t = m.tile
    with caplog.at_level(logging.WARNING, logger="tinyloc.maps"):
        with PackedMap.open(q) as pm:
            known = np.zeros((m.rows, m.cols), dtype=np.uint8)
            out = np.zeros((m.n_channels, m.rows, m.cols), dtype=np.float32)
            assert pm.read_window(0, 0, out, known_out=known) == 3
            assert pm.read_window(0, 0, out, known_out=known) == 3
            assert pm.tiles_damaged == 3
    warnings = [r for r in caplog.records if "damaged tile" in r.getMessage()]
    assert len(warnings) == 3  # once per tile, not once per read
    with PackedMap.open(q) as pm:
        assert pm.check_tiles() == 3
    with PackedMap.open(p) as pm:
        assert pm.check_tiles() == 0
    assert all("CRC-32 mismatch" in r.getMessage() for r in warnings)
    bad = np.zeros((m.rows, m.cols), dtype=bool)
    for k in hit:
        tr, tc = divmod(int(k), m.tile_cols)
        bad[tr * t:(tr + 1) * t, tc * t:(tc + 1) * t] = True
    assert np.all(known[bad] == 0) and np.all(out[:, bad] == 0)
    assert np.all(known[~bad] == 1)
    assert np.array_equal(out[:, ~bad], want[:, ~bad])


def test_stream_that_inflates_past_the_tile_size_is_damaged(packed256, tmp_path, caplog):
    p, m, _ = packed256
    raw = p.read_bytes()
    k, index = first_stored_tile(p)
    masks = struct.pack("<HHB", (1 << m.n_channels) - 1, 0, 0)  # every channel stored, zlib
    bomb = masks + zlib.compress(bytes(m.n_channels * m.tile * m.tile * 50), 9)  # 50x the tile, all zeros
    q = tmp_path / "bomb.tlm"
    q.write_bytes(replace_tile(raw, k, bomb))
    tr, tc = divmod(k, m.tile_cols)
    with caplog.at_level(logging.WARNING, logger="tinyloc.maps"), PackedMap.open(q) as pm:
        out = np.zeros((m.n_channels, m.tile, m.tile), dtype=np.float32)
        known = np.ones((m.tile, m.tile), dtype=np.uint8)
        assert pm.read_window(tr * m.tile, tc * m.tile, out, known_out=known) == 1
        assert not known.any()
    assert any("does not inflate to the declared tile size" in r.getMessage() for r in caplog.records)


MALFORMED = [
    (struct.pack("<HH", 1 << 12, 0), "channel masks name channels the map does not have"),
    (struct.pack("<HH", 0b1, 0b11), "channel masks name channels the map does not have"),
    (struct.pack("<HH", 0, 0), "channel masks name channels the map does not have"),
    (struct.pack("<H", 1), "shorter than its channel masks"),
    (struct.pack("<HH", 0b1, 0b1) + b"junk", "data after a tile with no stored channels"),
    (struct.pack("<HH", 0b1, 0), "no coding byte after the channel masks"),
    (struct.pack("<HHB", 0b1, 0, 7) + b"x", "unknown tile coding 7"),
    (struct.pack("<HHB", 0b1, 0, 0) + b"not a zlib stream", "bad zlib stream"),
    (struct.pack("<HHB", 0b11, 0, 0) + zlib.compress(bytes(32 * 32)), "stream does not inflate to the declared tile size"),
    (struct.pack("<HHB", 0b1, 0, 1) + b"\x12\x34", "context-coded, but the map has no model"),
]


@pytest.mark.parametrize("payload,reason", MALFORMED)
def test_malformed_tile_payloads_read_as_unknown(packed256, tmp_path, caplog, payload, reason):
    p, m, _ = packed256
    raw = p.read_bytes()
    k, _ = first_stored_tile(p)
    q = tmp_path / "payload.tlm"
    q.write_bytes(replace_tile(raw, k, payload))
    tr, tc = divmod(k, m.tile_cols)
    with caplog.at_level(logging.WARNING, logger="tinyloc.maps"), PackedMap.open(q) as pm:
        out = np.ones((m.n_channels, m.tile, m.tile), dtype=np.float32)
        known = np.ones((m.tile, m.tile), dtype=np.uint8)
        assert pm.read_window(tr * m.tile, tc * m.tile, out, known_out=known) == 1
        assert not known.any() and not out.any()
    assert any(reason in r.getMessage() for r in caplog.records), [r.getMessage() for r in caplog.records]


def test_context_stream_of_any_bytes_decodes_within_bounds(packed16, tmp_path):
    # A context-coded body has no structure to reject: whatever its bytes (here with a sound CRC, as a
    # hostile file could have), decoding ends after the tile's cells and yields levels 0..15, nothing else.
    p, m, _ = packed16
    raw = p.read_bytes()
    k, index = first_stored_tile(p)
    rng = np.random.default_rng(99)
    tr, tc = divmod(k, m.tile_cols)
    q = tmp_path / "junk.tlm"
    for n in (0, 1, 3, 4, 5, 64, 5000):
        body = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
        q.write_bytes(replace_tile(raw, k, struct.pack("<HHB", 0b1_1000_1111, 0b1, 1) + body))
        with PackedMap.open(q) as pm:
            out = np.full((m.n_channels, m.tile, m.tile), 7.0, dtype=np.float32)
            known = np.zeros((m.tile, m.tile), dtype=np.uint8)
            assert pm.read_window(tr * m.tile, tc * m.tile, out, known_out=known) == 0
        codes = np.rint(out * 255)
        assert known.all() and np.all(codes % 17 == 0) and codes.min() >= 0 and codes.max() <= 255
        assert np.all(out[0] == 1.0)  # the full channel
        assert not out[4:7].any()     # absent channels


def test_full_and_absent_channels_round_trip(tmp_path):
    m = meta(rows=64, cols=64, tile=32, names=("a", "b", "c"))
    cov = np.zeros((3, 64, 64), dtype=np.float32)
    cov[0] = 1.0                     # full in every tile
    cov[1, :32, :32] = 0.5           # stored in one tile, absent elsewhere
    cov[2, 40:, 40:] = 1.0           # full in one tile, partly in none
    q = tmp_path / "masks.tlm"
    write_packed(q, m, cov)
    with PackedMap.open(q) as pm:
        got = pm.read_all()
    assert np.array_equal(got, np.rint(cov * 255).astype(np.uint8) * np.float32(1 / 255))


def test_random_damage_anywhere_never_crashes(packed, tmp_path):
    p, m, _ = packed
    raw = p.read_bytes()
    _, _, model_end = header_end(raw)
    rng = np.random.default_rng(4242)
    q = tmp_path / "fuzz.tlm"
    out = np.zeros((m.n_channels, m.rows, m.cols), dtype=np.float32)
    in_tiles = 0
    for trial in range(150):
        b = bytearray(raw)
        # Half the trials anywhere, half in tile data only (in a small map the model is much of the file).
        where = rng.integers(model_end if trial % 2 else 0, len(b), int(rng.integers(1, 6)))
        for i in where:
            b[int(i)] = int(rng.integers(0, 256))
        q.write_bytes(bytes(b))
        try:
            pm = PackedMap.open(q)
        except MapFormatError:
            # Only damage to the header, the index or the model may refuse the whole file.
            assert bytes(b[:model_end]) != raw[:model_end]
            continue
        with pm:
            pm.read_window(-5, -5, out)
        in_tiles += bool(where.min() >= model_end)
    assert in_tiles >= 75  # damage confined to tile data always leaves the map readable


@pytest.mark.parametrize("levels", [256, 16])
@pytest.mark.parametrize("tile,ok", [(packfile.MIN_TILE, True), (packfile.MIN_TILE - 1, False),
                                     (packfile.MAX_TILE, True), (packfile.MAX_TILE + 1, False)])
def test_tile_size_limits(tmp_path, tile, ok, levels):
    m = meta(rows=20, cols=20, tile=tile, names=("grass",))
    cov = np.zeros((1, 20, 20), dtype=np.float32)
    cov[0, 3:9, 4:12] = 0.5
    q = tmp_path / "t.tlm"
    if ok:
        write_packed(q, m, cov, levels=levels)
        with PackedMap.open(q) as pm:
            pm.warmup()
            got = pm.read_all()
            assert got[0, 5, 5] == pytest.approx((128 if levels == 256 else 8 * 17) / 255)
            assert np.array_equal(got, quantize(cov, levels) * np.float32(1 / 255))
    else:
        with pytest.raises(MapFormatError, match=r"tile size"):
            write_packed(q, m, cov)
        assert not q.exists()


@pytest.mark.parametrize("n,ok", [(packfile.MAX_CHANNELS, True), (packfile.MAX_CHANNELS + 1, False)])
def test_channel_count_limits(tmp_path, n, ok):
    names = tuple(f"c{i}" for i in range(n))
    m = meta(rows=8, cols=8, tile=8, names=names)
    cov = np.zeros((n, 8, 8), dtype=np.float32)
    q = tmp_path / "c.tlm"
    if ok:
        write_packed(q, m, cov)
        with PackedMap.open(q) as pm:
            assert pm.meta.class_names == names
    else:
        with pytest.raises(MapFormatError, match=rf"header declares {n} channels \(limit 1\.\.64\)"):
            write_packed(q, m, cov)


@pytest.mark.parametrize("rows,ok", [(packfile.MAX_SIDE, True), (packfile.MAX_SIDE + 1, False)])
def test_side_limit(packed, tmp_path, rows, ok):
    # At the limit the header is accepted (and the missing index is reported); one past, the header is refused.
    p, m, _ = packed
    raw = patch_header(p.read_bytes(), "<I", 64, rows)
    raw = patch_header(raw, "<I", 76, -(-rows // m.tile) * m.tile_cols)
    q = tmp_path / "side.tlm"
    q.write_bytes(raw)
    msg = r"truncated: tile index needs \d+ bytes" if ok else rf"header declares {rows} x 210 cells"
    with pytest.raises(MapFormatError, match=msg):
        PackedMap.open(q)


def test_missing_file_and_directory(tmp_path):
    with pytest.raises(MapFormatError, match="nope.tlm: no such file"):
        PackedMap.open(tmp_path / "nope.tlm")
    with pytest.raises(MapFormatError, match="is a directory"):
        PackedMap.open(tmp_path)


# ---------------------------------------------------------------- context coding against the slow reference

def structured_levels(rng, nch, t):
    """Levels 0..15 with blocks of every state: rectangles, a partition pair, speckle and ramps."""
    lv = np.zeros((nch, t, t), dtype=np.uint8)
    for c in range(nch):
        for _ in range(3):
            r0, c0 = rng.integers(0, t, 2)
            lv[c, r0:r0 + rng.integers(1, t), c0:c0 + rng.integers(1, t)] = rng.integers(1, 16)
        if rng.random() < 0.5:
            lv[c] = np.where(rng.random((t, t)) < 0.1, rng.integers(0, 16, (t, t)), lv[c])
    if nch >= 2:  # channel 1 takes what channel 0 leaves, as ground classes do
        lv[1] = np.where(lv[0] > 0, 15 - lv[0], lv[1])
    return lv


def kernel_code(levels, kinds, part, probs):
    from tinyloc.maps import _kernels as K
    nch, t, _ = levels.shape
    nb = -(-t // K.BLOCK)
    scratch = dict(blk=np.zeros((nch, nb, nb), np.uint8), taken=np.zeros((t, t), np.int64),
                   qp=np.zeros((t + 2, t + 4), np.uint8))
    counts = np.zeros((nch * K.NCTX, 2), np.int64)
    out = np.zeros(nch * t * t * 2 + 64, np.uint8)
    st = np.array([0, 0xFFFFFFFF, 0, 1, 0, 0, 0, 1, 0], np.int64)
    K.encode_tile(levels, kinds, part, probs, counts, out, st, **scratch)
    n = K.finish_stream(st, out)
    body = out[:n].tobytes()
    dec = np.zeros_like(levels)
    dec[kinds == 1] = 15
    buf = np.frombuffer(bytearray(body) or bytearray(1), np.uint8)
    st = np.array([0, 0xFFFFFFFF, 0, 0, 4, int.from_bytes(body[:4].ljust(4, b"\0"), "big"), len(body), 0, 0],
                  np.int64)
    K.decode_tile(dec, kinds, part, probs, counts, buf, st, **scratch)
    K.count_tile(levels, kinds, part, probs, counts, np.zeros(1, np.uint8), st, **scratch)
    return body, dec, counts


@pytest.mark.parametrize("seed,t", [(1, 8), (2, 16), (3, 21), (4, 16)])
def test_context_coding_matches_the_slow_reference(seed, t):
    from tests._maps_helpers import NCTX, ref_decode_tile, ref_encode_tile
    assert NCTX == packfile.NCTX
    rng = np.random.default_rng(seed)
    nch = 4
    levels = structured_levels(rng, nch, t)
    kinds = np.array([2, 2, 1, 2], np.uint8) if seed % 2 else np.array([2, 2, 0, 2], np.uint8)
    levels[kinds == 1] = 15
    levels[kinds == 0] = 0
    part = np.array([1, 1, 1, 0], np.uint8)
    # Probabilities: the model rule on this tile's own counts, and plain random ones.
    for trial in range(2):
        if trial == 0:
            _, _, counts = kernel_code(levels, kinds, part, np.full(nch * NCTX, 32768, np.uint16))
            probs = packfile.PROB_LUT[packfile.model_from_counts(counts)]
        else:
            probs = rng.integers(1, 65536, nch * NCTX).astype(np.uint16)
        body, dec, counts = kernel_code(levels, kinds, part, probs)
        assert np.array_equal(dec, levels)
        ref = ref_encode_tile(levels, kinds, part, probs)
        assert body == ref
        assert np.array_equal(np.array(ref_decode_tile(body, kinds, part, probs, t), np.uint8), levels)
    # A trained model codes this tile in far fewer bytes than its raw levels.
    _, _, counts = kernel_code(levels, kinds, part, np.full(nch * NCTX, 32768, np.uint16))
    body, _, _ = kernel_code(levels, kinds, part, packfile.PROB_LUT[packfile.model_from_counts(counts)])
    assert len(body) < 0.5 * (kinds == 2).sum() * t * t


def test_probability_table_follows_the_spec():
    # FORMAT.md: P(b) = clamp(floor(65536 / (1 + exp((128 - b) / 12)) + 0.5), 1, 65535), P(0) = 32768.
    import math
    want = [32768] + [min(65535, max(1, math.floor(65536 / (1 + math.exp((128 - b) / 12)) + 0.5)))
                      for b in range(1, 256)]
    assert packfile.PROB_LUT.tolist() == want
    assert packfile.PROB_LUT.min() >= 1 and packfile.PROB_LUT.max() <= 65535
