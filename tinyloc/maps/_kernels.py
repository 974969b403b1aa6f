"""Numba kernels of the map compiler: exact polygon coverage, line strokes, point disks, ring checks.

Kernels take prepared contiguous arrays and output buffers only; they never
validate, allocate or log (the wrappers in :mod:`tinyloc.maps.raster` and
:mod:`tinyloc.maps.geojson` do that).

Coordinates are continuous cell coordinates: x = column, y = row (row 0 at the
north edge), cell (r, c) spans [c, c+1) x [r, r+1).
"""

from __future__ import annotations

import math

from numba import njit

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
