"""Numba kernels of the maps stage: exact polygon coverage, line strokes, point disks, ring checks, and
the context coder of packed-map tiles (count, encode, decode).

Kernels take prepared contiguous arrays and output buffers only; they never
validate, allocate or log (the wrappers in :mod:`tinyloc.maps.raster`,
:mod:`tinyloc.maps.geojson` and :mod:`tinyloc.maps.packfile` do that).

Coordinates are continuous cell coordinates: x = column, y = row (row 0 at the
north edge), cell (r, c) spans [c, c+1) x [r, r+1).
"""

from __future__ import annotations

import math

from numba import njit
import numpy as np

from .._numba import JIT


@njit(**JIT)
def _ramp(u, x0, x1):
    """Mean over a segment's row slice of max(0, u - x(y)), x uniform on [x0, x1] (cells)."""
    if u <= x0:
        return 0.0
    if u >= x1:
        return u - 0.5 * (x0 + x1)
    return (u - x0) * (u - x0) / (2.0 * (x1 - x0))


@njit(**JIT)
def _slice(acc, r, xa, xb, d):
    """Add one row slice of an edge (x from xa to xb, both in [0, W]) with signed height d."""
    if xa > xb:
        xa, xb = xb, xa
    wmax = acc.shape[1] - 1
    k0 = int(math.floor(xa))
    k1 = int(math.floor(xb)) + 1
    if k1 > wmax:
        k1 = wmax
    prev = 0.0
    if xb - xa < 1e-12:
        # Vertical within the slice: cell k0 holds the part right of x, the rest is full.
        f = (k0 + 1.0) - xa
        acc[r, k0] += d * f
        if k0 + 1 <= wmax:
            acc[r, k0 + 1] += d * (1.0 - f)
        return
    for k in range(k0, k1 + 1):
        cov = _ramp(k + 1.0, xa, xb) - _ramp(float(k), xa, xb)
        acc[r, k] += d * (cov - prev)
        prev = cov


@njit(**JIT)
def _edge_rows(acc, row0, xa, ya, xb, yb, sgn):
    """Accumulate an edge already clipped to x in [0, W] (global row coordinates, ya < yb)."""
    h = acc.shape[0]
    ta = ya - row0
    tb = yb - row0
    if tb <= 0.0 or ta >= h:
        return
    dxdy = (xb - xa) / (yb - ya)
    r_first = int(math.floor(max(ta, 0.0)))
    r_last = int(math.ceil(min(tb, float(h))))
    for r in range(r_first, r_last):
        top = max(ta, float(r))
        bot = min(tb, r + 1.0)
        if bot <= top:
            continue
        x_top = xa + (top - ta) * dxdy
        x_bot = xa + (bot - ta) * dxdy
        _slice(acc, r, x_top, x_bot, sgn * (bot - top))


@njit(**JIT)
def accumulate_edges(edges, row0, width, acc):
    """Add the signed-area contributions of polygon edges to a band accumulator.

    Parameters
    ----------
    edges : (N, 4) float64
        Edges (x0, y0, x1, y1) in global cell coordinates. A ring oriented
        counter-clockwise on the north-up map adds +1 inside, clockwise -1.
    row0 : int
        Global row of the band's first row.
    width : int
        Number of map columns W; x is clipped to [0, W] (exact: an edge adds
        only to cells on its east side).
    acc : (H, W + 2) float64
        Accumulator; its running sum along a row is the covered fraction.
    """
    wf = float(width)
    for k in range(edges.shape[0]):
        x0 = edges[k, 0]
        y0 = edges[k, 1]
        x1 = edges[k, 2]
        y1 = edges[k, 3]
        if y0 == y1:
            continue
        sgn = 1.0
        if y0 > y1:
            x0, y0, x1, y1 = x1, y1, x0, y0
            sgn = -1.0
        # Split at the crossings of x = 0 and x = W so each piece is either inside,
        # left (becomes vertical at 0) or right (vertical at W, touches the guard only).
        # Pieces: [y0, sa], [sa, sb], [sb, y1] with y0 <= sa <= sb <= y1 (empty when equal).
        sa = y1
        sb = y1
        if (x0 < 0.0) != (x1 < 0.0) and x0 != x1:
            sa = y0 + (0.0 - x0) * (y1 - y0) / (x1 - x0)
        if (x0 > wf) != (x1 > wf) and x0 != x1:
            sb = y0 + (wf - x0) * (y1 - y0) / (x1 - x0)
        if sa > sb:
            sa, sb = sb, sa
        for i in range(3):
            if i == 0:
                ya, yb = y0, sa
            elif i == 1:
                ya, yb = sa, sb
            else:
                ya, yb = sb, y1
            if yb <= ya:
                continue
            xa = x0 + (ya - y0) * (x1 - x0) / (y1 - y0)
            xb = x0 + (yb - y0) * (x1 - x0) / (y1 - y0)
            xa = min(max(xa, 0.0), wf)
            xb = min(max(xb, 0.0), wf)
            _edge_rows(acc, row0, xa, ya, xb, yb, sgn)


@njit(**JIT)
def integrate_rows(acc, cov):
    """Running sum of each accumulator row, clamped to [0, 1], merged into ``cov`` by maximum.

    ``acc`` is (H, W + 2) float64 and is zeroed on the way; ``cov`` is (H, W) float32.
    """
    h, w = cov.shape
    for r in range(h):
        s = 0.0
        for c in range(w):
            s += acc[r, c]
            v = s
            if v > 1.0:
                v = 1.0
            elif v < 0.0:
                v = 0.0
            if v > cov[r, c]:
                cov[r, c] = v
        for c in range(acc.shape[1]):
            acc[r, c] = 0.0


@njit(**JIT)
def stroke_segments(segs, half_w, row0, cov):
    """Anti-aliased strokes of line segments with round caps, merged into ``cov`` by maximum.

    Coverage of a cell is ``clamp(hw + 0.5 - d, 0, 1)`` with ``d`` the distance
    (cells) from the cell centre to the segment: a box-filtered edge, exact in
    the mean across a straight stroke at least one cell wide.

    Parameters
    ----------
    segs : (N, 4) float64
        Segments (x0, y0, x1, y1), global cell coordinates.
    half_w : (N,) float64
        Half widths (cells).
    row0 : int
        Global row of the band's first row.
    cov : (H, W) float32
        Band coverage.
    """
    h, w = cov.shape
    for k in range(segs.shape[0]):
        x0 = segs[k, 0]
        y0 = segs[k, 1] - row0
        x1 = segs[k, 2]
        y1 = segs[k, 3] - row0
        hw = half_w[k]
        reach = hw + 0.5
        r_lo = max(int(math.floor(min(y0, y1) - reach)), 0)
        r_hi = min(int(math.ceil(max(y0, y1) + reach)), h)
        c_lo = max(int(math.floor(min(x0, x1) - reach)), 0)
        c_hi = min(int(math.ceil(max(x0, x1) + reach)), w)
        dx = x1 - x0
        dy = y1 - y0
        ll = dx * dx + dy * dy
        for r in range(r_lo, r_hi):
            py = r + 0.5
            for c in range(c_lo, c_hi):
                px = c + 0.5
                t = 0.0
                if ll > 0.0:
                    t = ((px - x0) * dx + (py - y0) * dy) / ll
                    t = min(max(t, 0.0), 1.0)
                qx = x0 + t * dx - px
                qy = y0 + t * dy - py
                v = reach - math.sqrt(qx * qx + qy * qy)
                if v > 1.0:
                    v = 1.0
                if v > cov[r, c]:
                    cov[r, c] = v


@njit(**JIT)
def stamp_disks(centres, radius, row0, sub, cov):
    """Disks (points with a radius) by ``sub`` x ``sub`` supersampling, merged into ``cov`` by maximum.

    centres : (N, 2) float64 (x, y) global cell coordinates; radius : (N,) cells.
    """
    h, w = cov.shape
    inv = 1.0 / sub
    area = 1.0 / (sub * sub)
    for k in range(centres.shape[0]):
        cx = centres[k, 0]
        cy = centres[k, 1] - row0
        rad = radius[k]
        r2 = rad * rad
        r_lo = max(int(math.floor(cy - rad)), 0)
        r_hi = min(int(math.floor(cy + rad)) + 1, h)
        c_lo = max(int(math.floor(cx - rad)), 0)
        c_hi = min(int(math.floor(cx + rad)) + 1, w)
        for r in range(r_lo, r_hi):
            for c in range(c_lo, c_hi):
                n = 0
                for i in range(sub):
                    sy = r + (i + 0.5) * inv - cy
                    for j in range(sub):
                        sx = c + (j + 0.5) * inv - cx
                        if sx * sx + sy * sy <= r2:
                            n += 1
                v = n * area
                if v > cov[r, c]:
                    cov[r, c] = v


@njit(**JIT)
def _orient(ax, ay, bx, by, cx, cy):
    v = (bx - ax) * (cy - ay) - (by - ay) * (cx - ax)
    if v > 0.0:
        return 1
    if v < 0.0:
        return -1
    return 0


@njit(**JIT)
def _on_seg(ax, ay, bx, by, px, py):
    return min(ax, bx) <= px <= max(ax, bx) and min(ay, by) <= py <= max(ay, by)


@njit(**JIT)
def _seg_hit(ax, ay, bx, by, cx, cy, dx, dy):
    o1 = _orient(ax, ay, bx, by, cx, cy)
    o2 = _orient(ax, ay, bx, by, dx, dy)
    o3 = _orient(cx, cy, dx, dy, ax, ay)
    o4 = _orient(cx, cy, dx, dy, bx, by)
    if o1 != o2 and o3 != o4:
        return True
    if o1 == 0 and _on_seg(ax, ay, bx, by, cx, cy):
        return True
    if o2 == 0 and _on_seg(ax, ay, bx, by, dx, dy):
        return True
    if o3 == 0 and _on_seg(cx, cy, dx, dy, ax, ay):
        return True
    if o4 == 0 and _on_seg(cx, cy, dx, dy, bx, by):
        return True
    return False


@njit(**JIT)
def ring_self_hit(xy, order):
    """First pair of non-adjacent edges of a closed ring that touch or cross, else (-1, -1).

    xy : (N, 2) float64 ring vertices without the closing repeat (edge i runs
    from vertex i to vertex (i+1) % N). order : edge indices sorted by min x
    (a sweep: only edges whose x ranges overlap are compared).
    """
    n = xy.shape[0]
    for a in range(n):
        i = order[a]
        ax = xy[i, 0]
        ay = xy[i, 1]
        bx = xy[(i + 1) % n, 0]
        by = xy[(i + 1) % n, 1]
        imax = max(ax, bx)
        for b in range(a + 1, n):
            j = order[b]
            cx = xy[j, 0]
            cy = xy[j, 1]
            dx = xy[(j + 1) % n, 0]
            dy = xy[(j + 1) % n, 1]
            if min(cx, dx) > imax:
                break
            if j == i or j == (i + 1) % n or i == (j + 1) % n:
                continue
            if max(cy, dy) < min(ay, by) or min(cy, dy) > max(ay, by):
                continue
            if _seg_hit(ax, ay, bx, by, cx, cy, dx, dy):
                return min(i, j), max(i, j)
    return -1, -1


# ---------------------------------------------------------------------------------------------------------
# Context coding of 16-level coverage tiles (packed map format 2; maps_packed/FORMAT.md, "Context coding").
#
# One walk over a tile serves three modes: 0 counts each binary decision per context (the writer's first
# pass, which builds the map's probability model), 1 encodes, 2 decodes. The coder is a binary range coder
# with 16-bit probabilities of the bit being 1, carry propagation through a cached byte, the always-zero
# first byte omitted, and input past the end of a stream read as zero bytes. The state lives in ``st``
# (int64[9], prepared by the wrapper): low, range, cache, cache_size, pos, code, n_in, first, overflow.

NCTX = 5452           # contexts per channel: 2 * 2187 zero/full, 256 "equals the rest", 48 * 16 value tree,
CTX_REST = 4374       # 2 * 27 block states
CTX_TREE = 4630
CTX_BLOCK = 5398
BLOCK = 8             # cells per side of the blocks whose state (empty, full, mixed) is coded first


@njit(inline="always", **JIT)
def _q3(v):
    """Neighbour state: 0 empty, 1 partial, 2 full (level 15)."""
    if v == 0:
        return 0
    if v == 15:
        return 2
    return 1


@njit(inline="always", **JIT)
def _put(st, buf, b):
    if st[7] == 1:
        st[7] = 0  # the first byte out of the coder is always 0: not stored
        return
    pos = st[4]
    if pos < buf.shape[0]:
        buf[pos] = b
        st[4] = pos + 1
    else:
        st[8] = 1


@njit(inline="always", **JIT)
def _shift_low(st, buf):
    low = st[0]
    if low < 0xFF000000 or low > 0xFFFFFFFF:
        carry = low >> 32
        temp = st[2]
        while True:
            _put(st, buf, (temp + carry) & 0xFF)
            temp = 0xFF
            st[3] -= 1
            if st[3] == 0:
                break
        st[2] = (low >> 24) & 0xFF
    st[3] += 1
    st[0] = (low & 0x00FFFFFF) << 8


@njit(inline="always", **JIT)
def _bit(mode, st, buf, probs, counts, ctx, bit):
    """Count, encode or decode one binary decision in context ``ctx``; returns the bit."""
    if mode == 0:
        counts[ctx, bit] += 1
        return bit
    rng = st[1]
    bound = (rng >> 16) * np.int64(probs[ctx])
    if mode == 1:
        if bit == 1:
            rng = bound
        else:
            st[0] += bound
            rng -= bound
        while rng < 16777216:
            rng <<= 8
            _shift_low(st, buf)
        st[1] = rng
        return bit
    code = st[5]
    if code < bound:
        rng = bound
        bit = 1
    else:
        code -= bound
        rng -= bound
        bit = 0
    while rng < 16777216:
        rng <<= 8
        pos = st[4]
        byte = 0
        if pos < st[6]:
            byte = np.int64(buf[pos])
        st[4] = pos + 1
        code = ((code << 8) | byte) & 0xFFFFFFFF
    st[1] = rng
    st[5] = code
    return bit


@njit(inline="always", **JIT)
def _walk(mode, vals, kind, part, probs, counts, buf, st, blk, taken, qp):
    """Count (mode 0), encode (1) or decode (2) the coded channels of one tile.

    Channels are coded one after the other in channel order, each in row-major order of its cells; a
    block's state is coded when the walk reaches the block's first cell.

    Parameters
    ----------
    vals : (C, T, T) uint8
        Coverage levels 0..15; read in modes 0 and 1, written (coded channels only, which must be 0
        on entry) in mode 2.
    kind : (C,) uint8
        0 channel absent from the tile, 1 full, 2 coded.
    part : (C,) uint8
        1 for channels of the ground partition (their coverage sums to at most a cell).
    probs : (C * NCTX,) uint16
        Probability (x 65536) that a decision is 1, per context; values 1..65535 (modes 1, 2).
    counts : (C * NCTX, 2) int64
        Decision counts per context and bit (mode 0).
    buf : uint8
        Output bytes (mode 1) or the stream (mode 2, its length in ``st[6]``).
    st : (9,) int64
        Coder state, initialised by the wrapper.
    blk : (C, nb, nb) uint8, nb = ceil(T / BLOCK)
        Scratch: block states (0 empty, 1 full, 2 mixed).
    taken : (T, T) int64
        Scratch: levels of the partition channels already walked, summed per cell (zeroed here).
    qp : (T + 2, T + 4) uint8
        Scratch: neighbour states of the walked cells of the current channel, with a border of 2 that
        stays 0 (cells outside the tile count as empty); zeroed here.
    """
    nch = vals.shape[0]
    t = vals.shape[1]
    nb = (t + BLOCK - 1) // BLOCK
    for i in range(t):
        for j in range(t):
            taken[i, j] = 0
    for i in range(t + 2):
        for j in range(t + 4):
            qp[i, j] = 0
    for c in range(nch):
        k = kind[c]
        if k == 1 and part[c] == 1:
            for i in range(t):
                for j in range(t):
                    taken[i, j] += 15
        if k != 2:
            continue
        base = c * NCTX
        for i in range(t):
            bi = i // BLOCK
            for j0 in range(0, t, BLOCK):
                bj = j0 // BLOCK
                if i % BLOCK == 0:
                    _block_state(mode, vals, c, i, j0, probs, counts, buf, st, blk, qp)
                if blk[c, bi, bj] != 2:
                    continue
                for j in range(j0, min(j0 + BLOCK, t)):
                    v = 0
                    if mode != 2:
                        v = np.int64(vals[c, i, j])
                    rest = 15
                    if part[c] == 1:
                        rest = 15 - taken[i, j]
                        if rest < 0:
                            rest = 0
                    rs = 1
                    if rest == 0:
                        rs = 0
                    elif rest == 15:
                        rs = 2
                    # qp[i + 2, j + 2] is cell (i, j): west, north, north-west, north-east, 2 west, 2 north.
                    z = (((((np.int64(qp[i + 2, j + 1]) * 3 + qp[i + 1, j + 2]) * 3 + qp[i + 1, j + 1]) * 3
                           + qp[i + 1, j + 3]) * 3 + qp[i + 2, j]) * 3 + qp[i, j + 2]) * 3 + rs
                    if _bit(mode, st, buf, probs, counts, base + 2 * z, 1 if v != 0 else 0) == 0:
                        v = 0
                    elif _bit(mode, st, buf, probs, counts, base + 2 * z + 1, 1 if v == 15 else 0) == 1:
                        v = 15
                    else:
                        a = np.int64(vals[c, i, j - 1]) if j > 0 else 0
                        b = np.int64(vals[c, i - 1, j]) if i > 0 else 0
                        nw = np.int64(vals[c, i - 1, j - 1]) if (i > 0 and j > 0) else 0
                        ne = np.int64(vals[c, i - 1, j + 1]) if (i > 0 and j + 1 < t) else 0
                        pred = 0
                        if 0 < a < 15:
                            pred = a
                        elif 0 < b < 15:
                            pred = b
                        elif 0 < nw < 15:
                            pred = nw
                        elif 0 < ne < 15:
                            pred = ne
                        same = 0
                        if rs == 1:
                            same = _bit(mode, st, buf, probs, counts, base + CTX_REST + pred * 16 + rest,
                                        1 if v == rest else 0)
                        if same == 1:
                            v = rest
                        else:
                            node = 1
                            tb = base + CTX_TREE + (pred * 3 + rs) * 16
                            for s in range(3, -1, -1):
                                bit = _bit(mode, st, buf, probs, counts, tb + node, (v >> s) & 1)
                                node = node * 2 + bit
                            v = node - 16
                    if mode == 2:
                        vals[c, i, j] = v
                    qp[i + 2, j + 2] = _q3(v)
        # Only blocks that are not empty hold anything: add them to the partition's sum, and clear their
        # neighbour states for the next channel.
        for bi in range(nb):
            for bj in range(nb):
                if blk[c, bi, bj] == 0:
                    continue
                for i in range(bi * BLOCK, min(bi * BLOCK + BLOCK, t)):
                    for j in range(bj * BLOCK, min(bj * BLOCK + BLOCK, t)):
                        if part[c] == 1:
                            taken[i, j] += vals[c, i, j]
                        qp[i + 2, j + 2] = 0


@njit(**JIT)
def count_tile(vals, kind, part, probs, counts, buf, st, blk, taken, qp):
    """Add one tile's decisions to ``counts`` (arguments as :func:`_walk`; ``probs``, ``buf``, ``st`` unused)."""
    _walk(0, vals, kind, part, probs, counts, buf, st, blk, taken, qp)


@njit(**JIT)
def encode_tile(vals, kind, part, probs, counts, buf, st, blk, taken, qp):
    """Encode one tile into ``buf`` (arguments as :func:`_walk`; end the stream with :func:`finish_stream`)."""
    _walk(1, vals, kind, part, probs, counts, buf, st, blk, taken, qp)


@njit(**JIT)
def decode_tile(vals, kind, part, probs, counts, buf, st, blk, taken, qp):
    """Decode one tile from ``buf`` into ``vals`` (arguments as :func:`_walk`)."""
    _walk(2, vals, kind, part, probs, counts, buf, st, blk, taken, qp)


@njit(inline="always", **JIT)
def _row_state(vals, c, i, j0, j1):
    """0 when cells (i, j0..j1-1) of channel c are all empty, 1 when all full, else 2."""
    lo = 15
    hi = 0
    for j in range(j0, j1):
        x = vals[c, i, j]
        if x < lo:
            lo = x
        if x > hi:
            hi = x
    if lo == 15:
        return 1
    if hi == 0:
        return 0
    return 2


@njit(**JIT)
def _block_state(mode, vals, c, i0, j0, probs, counts, buf, st, blk, qp):
    """Code the state (0 empty, 1 full, 2 mixed) of the block whose first cell is (i0, j0), when the walk
    reaches that cell; a uniform block is filled at once (mode 2), so later contexts see its cells."""
    t = vals.shape[1]
    i1 = min(i0 + BLOCK, t)
    j1 = min(j0 + BLOCK, t)
    bi = i0 // BLOCK
    bj = j0 // BLOCK
    state = 0
    if mode != 2:
        lo = 3
        hi = 0
        for i in range(i0, i1):
            r = _row_state(vals, c, i, j0, j1)
            if r == 2:
                lo = 0
                hi = 3
                break
            if r < lo:
                lo = r
            if r > hi:
                hi = r
        state = lo if lo == hi else 2
    # Context: the decoded row north of the block, the cell west of its first cell, the block to the west.
    en = _row_state(vals, c, i0 - 1, j0, j1) if i0 > 0 else 0
    qw = _q3(np.int64(vals[c, i0, j0 - 1])) if j0 > 0 else 0
    sw = np.int64(blk[c, bi, bj - 1]) if bj > 0 else 0
    ctx = c * NCTX + CTX_BLOCK + ((en * 3 + qw) * 3 + sw) * 2
    if _bit(mode, st, buf, probs, counts, ctx, 1 if state == 2 else 0) == 1:
        state = 2
    elif _bit(mode, st, buf, probs, counts, ctx + 1, 1 if state == 1 else 0) == 1:
        state = 1
    else:
        state = 0
    blk[c, bi, bj] = state
    if state == 1:
        for i in range(i0, i1):
            for j in range(j0, j1):
                qp[i + 2, j + 2] = 2
    if mode == 2 and state == 1:  # (the wrapper hands coded channels over as zeros)
        for i in range(i0, i1):
            for j in range(j0, j1):
                vals[c, i, j] = 15


@njit(**JIT)
def finish_stream(st, buf):
    """End an encoded stream: pick the value in [low, low + range) with the most trailing zero bits, emit
    it, and drop trailing zero bytes (a decoder reads zeros past the end). Returns the stream length, or -1
    when ``buf`` was too small."""
    low = st[0]
    top = low + st[1]
    for k in range(32, -1, -1):
        m = (np.int64(1) << k) - 1
        v = (low + m) & ~m
        if v < top:
            st[0] = v
            break
    for _ in range(5):
        _shift_low(st, buf)
    if st[8] == 1:
        return -1
    n = st[4]
    while n > 0 and buf[n - 1] == 0:
        n -= 1
    return n
