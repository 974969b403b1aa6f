"""Helpers for the map tests: GeoJSON builders in ENU metres, and slow, obviously-right references."""

from __future__ import annotations

import json
import math

import numpy as np

from tinyloc.geo import LocalFrame

# An invented test site origin (open plains; named after nothing).
ORIGIN = (44.43210, -101.23450, 0.0)
FRAME = LocalFrame(*ORIGIN)


def lonlat(xy):
    """ENU (x, y) metres -> [lon, lat] list(s) at the test origin."""
    a = np.asarray(xy, dtype=float).reshape(-1, 2)
    lat, lon = FRAME.to_latlon(a[:, 0], a[:, 1])
    return [[float(o), float(t)] for o, t in zip(np.atleast_1d(lon), np.atleast_1d(lat))]


def polygon(rings, **props):
    """Feature from ENU rings (each an open list of (x, y)); closes rings as RFC 7946 asks."""
    coords = []
    for r in rings:
        ll = lonlat(r)
        coords.append(ll + [ll[0]])
    return {"type": "Feature", "properties": props, "geometry": {"type": "Polygon", "coordinates": coords}}


def line(xy, **props):
    return {"type": "Feature", "properties": props, "geometry": {"type": "LineString", "coordinates": lonlat(xy)}}


def point(xy, **props):
    return {"type": "Feature", "properties": props, "geometry": {"type": "Point", "coordinates": lonlat(xy)[0]}}


def collection(features, origin=ORIGIN):
    d = {"type": "FeatureCollection", "features": list(features)}
    if origin is not None:
        d["origin"] = {"lat": origin[0], "lon": origin[1], "h": origin[2]}
    return d


def write_json(path, doc):
    path.write_text(json.dumps(doc))
    return path


def star_polygon(rng, centre, r_min, r_max, n):
    """A simple (non-self-intersecting) polygon: n vertices at sorted angles, random radii, CCW."""
    ang = np.sort(rng.uniform(0, 2 * np.pi, n))
    rad = rng.uniform(r_min, r_max, n)
    return np.stack([centre[0] + rad * np.cos(ang), centre[1] + rad * np.sin(ang)], axis=1)


def shoelace(xy) -> float:
    """Signed area (shoelace formula, the surveyor's formula) of an open ring; CCW positive."""
    x, y = np.asarray(xy, float).T
    return 0.5 * float(np.dot(x, np.roll(y, -1)) - np.dot(np.roll(x, -1), y))


def _clip(poly, edge, keep):
    out = []
    n = len(poly)
    for i in range(n):
        p, q = poly[i], poly[(i + 1) % n]
        pin, qin = keep(p), keep(q)
        if pin:
            out.append(p)
        if pin != qin:
            out.append(edge(p, q))
    return out


def clip_to_box(poly, x0, y0, x1, y1):
    """Sutherland-Hodgman clip of a polygon (list of (x, y)) against an axis-aligned box."""
    def cut_x(xc):
        return lambda p, q: (xc, p[1] + (q[1] - p[1]) * (xc - p[0]) / (q[0] - p[0]))

    def cut_y(yc):
        return lambda p, q: (p[0] + (q[0] - p[0]) * (yc - p[1]) / (q[1] - p[1]), yc)

    poly = [tuple(p) for p in poly]
    for edge, keep in ((cut_x(x0), lambda p: p[0] >= x0), (cut_x(x1), lambda p: p[0] <= x1),
                       (cut_y(y0), lambda p: p[1] >= y0), (cut_y(y1), lambda p: p[1] <= y1)):
        if not poly:
            return []
        poly = _clip(poly, edge, keep)
    return poly


def ref_coverage(rings_cells, rows, cols):
    """Exact cell coverage of a polygon with holes given in (col, row) cell coordinates.

    Slow and obviously right: clip every ring against every cell square and take
    the shoelace area of the piece (exterior minus holes).
    """
    out = np.zeros((rows, cols))
    ext = np.asarray(rings_cells[0])
    c0, r0 = np.floor(ext.min(axis=0)).astype(int)
    c1, r1 = np.ceil(ext.max(axis=0)).astype(int)
    for r in range(max(r0, 0), min(r1, rows)):
        for c in range(max(c0, 0), min(c1, cols)):
            a = 0.0
            for k, ring in enumerate(rings_cells):
                piece = clip_to_box(ring, c, r, c + 1, r + 1)
                if len(piece) >= 3:
                    a += (1 if k == 0 else -1) * abs(shoelace(piece))
            out[r, c] = a
    return out


def ref_capsule_coverage(p0, p1, half_w, rows, cols, sub=16):
    """Supersampled coverage of a capsule (segment p0-p1 buffered by half_w), cell coordinates (col, row)."""
    out = np.zeros((rows, cols))
    s = (np.arange(sub) + 0.5) / sub
    for r in range(rows):
        for c in range(cols):
            px, py = np.meshgrid(c + s, r + s)
            d = _seg_dist(px, py, p0, p1)
            out[r, c] = np.mean(d <= half_w)
    return out


def _seg_dist(px, py, p0, p1):
    dx, dy = p1[0] - p0[0], p1[1] - p0[1]
    ll = dx * dx + dy * dy
    t = np.zeros_like(px) if ll == 0 else np.clip(((px - p0[0]) * dx + (py - p0[1]) * dy) / ll, 0, 1)
    return np.hypot(p0[0] + t * dx - px, p0[1] + t * dy - py)


def brute_self_intersects(xy) -> bool:
    """O(n^2) reference: do two non-adjacent edges of the open ring touch or cross?"""
    n = len(xy)

    def orient(a, b, c):
        v = (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])
        return int(v > 0) - int(v < 0)

    def on(a, b, p):
        return min(a[0], b[0]) <= p[0] <= max(a[0], b[0]) and min(a[1], b[1]) <= p[1] <= max(a[1], b[1])

    for i in range(n):
        a, b = xy[i], xy[(i + 1) % n]
        for j in range(i + 1, n):
            if j == i or j == (i + 1) % n or i == (j + 1) % n:
                continue
            c, d = xy[j], xy[(j + 1) % n]
            o1, o2, o3, o4 = orient(a, b, c), orient(a, b, d), orient(c, d, a), orient(c, d, b)
            if o1 != o2 and o3 != o4:
                return True
            if (o1 == 0 and on(a, b, c)) or (o2 == 0 and on(a, b, d)) or (o3 == 0 and on(c, d, a)) \
                    or (o4 == 0 and on(c, d, b)):
                return True
    return False


def circle(centre, radius, n=64):
    a = np.linspace(0, 2 * math.pi, n, endpoint=False)
    return np.stack([centre[0] + radius * np.cos(a), centre[1] + radius * np.sin(a)], axis=1)


# ------------------------------------------------------------------ context coding, slow reference
# Written from maps_packed/FORMAT.md ("Coding 1"), without the kernels' scratch planes: plain Python
# integers and lists, one decision at a time.

NCTX = 5452


def _q(v):
    return 0 if v == 0 else (2 if v == 15 else 1)


def _walk_ref(levels, kinds, part, decide):
    """Walk a tile in the order of the specification; ``decide(ctx, bit_or_None) -> bit``.

    ``levels`` is a list of channels, each a list of rows of ints (read when encoding, filled when
    decoding); ``kinds`` 0 absent, 1 full, 2 stored; ``part`` partition flags.
    """
    nch, t = len(levels), len(levels[0])
    encoding = decide.encoding

    def lv(c, i, j):
        return levels[c][i][j] if 0 <= i < t and 0 <= j < t else 0

    for c in range(nch):
        if kinds[c] != 2:
            continue
        base = c * NCTX
        state = {}
        for i in range(t):
            for j in range(t):
                bi, bj = i // 8, j // 8
                if i % 8 == 0 and j % 8 == 0:
                    i1, j1 = min(i + 8, t), min(j + 8, t)
                    cells = [levels[c][y][x] for y in range(i, i1) for x in range(j, j1)] if encoding else None
                    north = [levels[c][i - 1][x] for x in range(j, j1)] if i > 0 else [0]
                    e = 0 if all(v == 0 for v in north) else (1 if all(v == 15 for v in north) else 2)
                    s = state.get((bi, bj - 1), 0)
                    w = (e * 3 + _q(lv(c, i, j - 1))) * 3 + s
                    want = None
                    if encoding:
                        want = 0 if all(v == 0 for v in cells) else (1 if all(v == 15 for v in cells) else 2)
                    if decide(base + 5398 + 2 * w, None if want is None else int(want == 2)):
                        st = 2
                    elif decide(base + 5398 + 2 * w + 1, None if want is None else int(want == 1)):
                        st = 1
                    else:
                        st = 0
                    state[(bi, bj)] = st
                    if not encoding and st != 2:
                        for y in range(i, i1):
                            for x in range(j, j1):
                                levels[c][y][x] = 15 if st == 1 else 0
                if state[(bi, bj)] != 2:
                    continue
                rest = 15
                if part[c]:
                    used = sum(15 if kinds[d] == 1 else (levels[d][i][j] if kinds[d] == 2 else 0)
                               for d in range(c) if part[d])
                    rest = max(0, 15 - used)
                rs = 0 if rest == 0 else (2 if rest == 15 else 1)
                a, b, nw, ne = lv(c, i, j - 1), lv(c, i - 1, j), lv(c, i - 1, j - 1), lv(c, i - 1, j + 1)
                z = ((((((_q(a) * 3 + _q(b)) * 3 + _q(nw)) * 3 + _q(ne)) * 3 + _q(lv(c, i, j - 2))) * 3
                      + _q(lv(c, i - 2, j))) * 3 + rs)
                v = levels[c][i][j] if encoding else None
                pred = next((x for x in (a, b, nw, ne) if 0 < x < 15), 0)
                if not decide(base + 2 * z, None if v is None else int(v > 0)):
                    v = 0
                elif decide(base + 2 * z + 1, None if v is None else int(v == 15)):
                    v = 15
                elif rs == 1 and decide(base + 4374 + 16 * pred + rest, None if v is None else int(v == rest)):
                    v = rest
                else:
                    node = 1
                    for sbit in (3, 2, 1, 0):
                        node = 2 * node + decide(base + 4630 + 16 * (3 * pred + rs) + node,
                                                 None if v is None else (v >> sbit) & 1)
                    v = node - 16
                levels[c][i][j] = v


def ref_encode_tile(levels, kinds, part, probs) -> bytes:
    """Slow reference encoder: the carry-propagating range coder of the specification, tinyloc's end of
    stream (the value with the most trailing zero bits, trailing zero bytes dropped, first byte omitted)."""
    out = bytearray()
    low, rng, cache, csize = 0, 0xFFFFFFFF, 0, 1

    def shift_low():
        nonlocal low, cache, csize
        if low < 0xFF000000 or low > 0xFFFFFFFF:
            carry = low >> 32
            temp = cache
            while True:
                out.append((temp + carry) & 0xFF)
                temp = 0xFF
                csize -= 1
                if csize == 0:
                    break
            cache = (low >> 24) & 0xFF
        csize += 1
        low = (low & 0x00FFFFFF) << 8

    def decide(ctx, bit):
        nonlocal low, rng
        bound = (rng >> 16) * int(probs[ctx])
        if bit:
            rng = bound
        else:
            low += bound
            rng -= bound
        while rng < 1 << 24:
            rng <<= 8
            shift_low()
        return bit

    decide.encoding = True
    _walk_ref([[list(map(int, row)) for row in ch] for ch in levels], list(kinds), list(part), decide)
    top = low + rng
    for k in range(32, -1, -1):
        m = (1 << k) - 1
        v = (low + m) & ~m
        if v < top:
            low = v
            break
    for _ in range(5):
        shift_low()
    body = bytes(out[1:])
    return body.rstrip(b"\0")


def ref_decode_tile(body: bytes, kinds, part, probs, tile: int):
    """Slow reference decoder; returns levels as (C, tile, tile) nested lists (stored channels decoded,
    full ones 15, absent 0)."""
    nch = len(kinds)
    levels = [[[15 if kinds[c] == 1 else 0] * tile for _ in range(tile)] for c in range(nch)]
    pos = 4
    code = int.from_bytes(body[:4].ljust(4, b"\0"), "big")
    rng = 0xFFFFFFFF

    def decide(ctx, _):
        nonlocal code, rng, pos
        bound = (rng >> 16) * int(probs[ctx])
        if code < bound:
            rng, bit = bound, 1
        else:
            code -= bound
            rng -= bound
            bit = 0
        while rng < 1 << 24:
            rng <<= 8
            code = ((code << 8) | (body[pos] if pos < len(body) else 0)) & 0xFFFFFFFF
            pos += 1
        return bit

    decide.encoding = False
    _walk_ref(levels, list(kinds), list(part), decide)
    return levels
