"""Numba kernels of the correlator. They take prepared contiguous arrays and output buffers only:
no validation, no allocation, no logging (the wrapper in correlator.py does that)."""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .._numba import JIT


@njit(**JIT)
def bev_features(evidence, free, visible, weights, out):
    """out[f] = sum_k weights[f, k] * channel_k over evidence classes, free, visible."""
    F = out.shape[0]
    C, h, w = evidence.shape
    for f in range(F):
        for r in range(h):
            for c in range(w):
                acc = weights[f, C] * free[r, c] + weights[f, C + 1] * visible[r, c]
                for k in range(C):
                    acc += weights[f, k] * evidence[k, r, c]
                out[f, r, c] = acc


@njit(**JIT)
def downsample2(src, out):
    """2x2 block mean: out[f, r, c] = mean of src[f, 2r:2r+2, 2c:2c+2]."""
    F, h, w = out.shape
    for f in range(F):
        for r in range(h):
            for c in range(w):
                out[f, r, c] = 0.25 * (src[f, 2 * r, 2 * c] + src[f, 2 * r, 2 * c + 1]
                                       + src[f, 2 * r + 1, 2 * c] + src[f, 2 * r + 1, 2 * c + 1])


@njit(**JIT)
def _row_span(rr0, cc0, sin_t, cos_t, h, w, nv):
    """Canvas columns v0..v1 of one canvas row whose sample may fall inside the grid (a line
    through a rectangle: rr = rr0 + sin_t v, cc = cc0 + cos_t v, inside for -1 < rr < h,
    -1 < cc < w), widened by one column each side; the exact test stays per sample."""
    vlo = 0.0
    vhi = nv - 1.0
    for k in range(2):
        a0 = rr0 if k == 0 else cc0
        sl = sin_t if k == 0 else cos_t
        top = h if k == 0 else w
        if abs(sl) < 1e-12:
            if a0 <= -1.0 or a0 >= top:
                vhi = -1.0
        else:
            t1 = (-1.0 - a0) / sl
            t2 = (top - a0) / sl
            vlo = max(vlo, min(t1, t2))
            vhi = min(vhi, max(t1, t2))
    if vhi < vlo:
        return 0, -1
    return max(0, int(math.floor(vlo)) - 1), min(nv - 1, int(math.ceil(vhi)) + 1)


@njit(**JIT)
def rotate_into(feat, cos_t, sin_t, origin_row, origin_col, lo_u, lo_v, out):
    """Rotate bird's-eye features by +yaw about the robot origin into a map-oriented canvas.

    ``out[f, u, v]`` is the bilinear sample of ``feat[f]`` at the body point whose
    map offset from the robot cell is (du, dv) = (u + lo_u, v + lo_v) cells
    (du along map rows, i.e. south; dv along map columns, i.e. east). Each canvas row
    samples only the columns whose body point can fall inside the grid (the rest is 0).
    """
    # the support rectangle of a whole grid: one sampling loop serves both (rotate_support)
    rotate_support(feat, cos_t, sin_t, origin_row, origin_col, lo_u, lo_v, 0, feat.shape[1] - 1, 0,
                   feat.shape[2] - 1, out)


@njit(**JIT)
def readout_patch(buf, r0, c0, inv_temp, out_slice):
    """Copy a tempered (Ho, Wo) block of a cyclic correlation buffer starting at (r0, c0)."""
    Ho, Wo = out_slice.shape
    for i in range(Ho):
        for j in range(Wo):
            out_slice[i, j] = buf[r0 + i, c0 + j] * inv_temp


@njit(**JIT)
def nms_profile(best, best_a, A, k, rc, rh, work, out_i, out_j, out_a, out_v):
    """Greedy non-maximum suppression on a heading-max profile; returns the number of modes found.

    A cell is suppressed by an earlier mode if it lies within ``rc`` cells (each axis)
    and its own best heading within ``rh`` steps (circularly) of the mode's heading.
    """
    H, W = best.shape
    for i in range(H):
        for j in range(W):
            work[i, j] = best[i, j]
    n = 0
    while n < k:
        bv = -np.inf
        bi = -1
        bj = -1
        for i in range(H):
            for j in range(W):
                if work[i, j] > bv:
                    bv = work[i, j]
                    bi = i
                    bj = j
        if bi < 0:
            break
        ba = best_a[bi, bj]
        out_i[n], out_j[n], out_a[n], out_v[n] = bi, bj, ba, bv
        n += 1
        for i in range(max(0, bi - rc), min(H, bi + rc + 1)):
            for j in range(max(0, bj - rc), min(W, bj + rc + 1)):
                d = abs(best_a[i, j] - ba) % A
                if min(d, A - d) <= rh:
                    work[i, j] = -np.inf
    return n


@njit(**JIT)
def nms_volume(vol, k, rc, rh, work, out_t, out_i, out_j, out_v):
    """Greedy non-maximum suppression in (heading, row, col) of a small volume; returns the count."""
    T, H, W = vol.shape
    for t in range(T):
        for i in range(H):
            for j in range(W):
                work[t, i, j] = vol[t, i, j]
    n = 0
    while n < k:
        bv = -np.inf
        bt = -1
        bi = -1
        bj = -1
        for t in range(T):
            for i in range(H):
                for j in range(W):
                    if work[t, i, j] > bv:
                        bv = work[t, i, j]
                        bt = t
                        bi = i
                        bj = j
        if bt < 0:
            break
        out_t[n], out_i[n], out_j[n], out_v[n] = bt, bi, bj, bv
        n += 1
        for t in range(max(0, bt - rh), min(T, bt + rh + 1)):
            for i in range(max(0, bi - rc), min(H, bi + rc + 1)):
                for j in range(max(0, bj - rc), min(W, bj + rc + 1)):
                    work[t, i, j] = -np.inf
    return n


@njit(**JIT)
def transpose_rows(src, dst):
    """dst[f, k, r] = src[f, r, k] for r < src.shape[1] (the rest of dst is left as is)."""
    F, R, Kh = src.shape
    for f in range(F):
        for r0 in range(0, R, 16):
            r1 = min(R, r0 + 16)
            for k in range(Kh):
                for r in range(r0, r1):
                    dst[f, k, r] = src[f, r, k]


@njit(**JIT)
def gather_rows_t(QT, r0, L, N, out):
    """out[l, k] = QT[k, (r0 + l) mod N]: the needed rows of a transposed spectrum, made contiguous."""
    Kh = QT.shape[0]
    for l0 in range(0, L, 16):
        l1 = min(L, l0 + 16)
        for k in range(Kh):
            for l in range(l0, l1):
                out[l, k] = QT[k, (r0 + l) % N]


# The frequency-domain products are sums of a few products per bin; letting LLVM
# reassociate them (fastmath) vectorizes the loop (about 2x measured) and changes
# results only at float32 rounding, far inside the exactness tolerance (tests).
_FAST = dict(JIT, fastmath=True)


@njit(**_FAST)
def spectra_mac4(G4, T, P4):
    """P4[q] = sum_f G4[q, f] * conj(T[f]) for the four quarter turns (complex64).

    Layout (4, F, K, N) / (F, K, N) / (4, K, N): spectra stored transposed
    (column frequency outer) so the inner loop runs over contiguous memory.
    """
    Q4, F, Kh, N = G4.shape
    for k in range(Kh):
        for q in range(Q4):
            for n in range(N):
                P4[q, k, n] = 0.0
        for f in range(F):
            for q in range(Q4):
                for n in range(N):
                    P4[q, k, n] += G4[q, f, k, n] * np.conj(T[f, k, n])


@njit(**_FAST)
def spectra_mac1(G, T, P):
    """P = sum_f G[f] * conj(T[f]) (complex64), layout (F, K, N) -> (K, N)."""
    F, Kh, N = G.shape
    for k in range(Kh):
        for n in range(N):
            P[k, n] = 0.0
        for f in range(F):
            for n in range(N):
                P[k, n] += G[f, k, n] * np.conj(T[f, k, n])


@njit(**JIT)
def readout_tiled(buf, quarter, su, sv, inv_temp, a, best, best_a, head_max, head_arg, vol, write_vol, modtab):
    """Read one heading's correlation into the reduced forms (and the volume), in 32 x 32 tiles.

    Window cell (i, j) sits at cyclic index rho^quarter(i, j) + (su, sv), where
    rho(i, j) = (j, -i) is the exact quarter turn of the map about index 0; tiles keep
    both the buffer and the outputs in cache.

    ``buf`` holds rows in gathered order: buffer row l is cyclic row (r0 + l) mod N, where the
    caller chose r0 so that row index l = i (quarters 0, 2 read rows +-i) or l = j (quarters 1, 3).
    ``modtab[m + N]`` is ``m mod N`` (a table instead of an integer division per cell).
    """
    N = buf.shape[1]
    H, W = best.shape
    hm = -np.inf
    harg = 0
    for i0 in range(0, H, 32):
        for j0 in range(0, W, 32):
            for i in range(i0, min(H, i0 + 32)):
                for j in range(j0, min(W, j0 + 32)):
                    if quarter == 0:
                        l = i
                        pc = j + sv
                    elif quarter == 1:
                        l = j
                        pc = -i + sv
                    elif quarter == 2:
                        l = H - 1 - i
                        pc = -j + sv
                    else:
                        l = W - 1 - j
                        pc = i + sv
                    v = buf[l, modtab[pc + N]] * inv_temp
                    if write_vol:
                        vol[a, i, j] = v
                    if v > best[i, j]:
                        best[i, j] = v
                        best_a[i, j] = a
                    if v > hm:
                        hm = v
                        harg = i * W + j
    head_max[a] = hm
    head_arg[a] = harg


@njit(**JIT)
def merge_best(best, best_a, other, other_a):
    """Per-cell max of two heading-max profiles (lanes of a threaded search)."""
    H, W = best.shape
    for i in range(H):
        for j in range(W):
            if other[i, j] > best[i, j]:
                best[i, j] = other[i, j]
                best_a[i, j] = other_a[i, j]


@njit(**JIT)
def features_hwf(feat, colmin, colmax, out):
    """out[r, c, f] = feat[f, r, c] (zero-padded lanes); colmin/colmax[r]: columns of row r with any
    nonzero feature (colmin = w, colmax = -1 for an empty row)."""
    F, h, w = feat.shape
    FP = out.shape[2]
    for r in range(h):
        lo = w
        hi = -1
        for c in range(w):
            nz = False
            for f in range(F):
                v = feat[f, r, c]
                out[r, c, f] = v
                if v != 0.0:
                    nz = True
            for f in range(F, FP):
                out[r, c, f] = 0.0
            if nz:
                lo = min(lo, c)
                hi = max(hi, c)
        colmin[r] = lo
        colmax[r] = hi


@njit(**JIT)
def map_hwf(G, out):
    """out[i, j, f] = G[f, i, j], zero-padded lanes."""
    F, H, W = G.shape
    FP = out.shape[2]
    for i in range(H):
        for j in range(W):
            for f in range(F):
                out[i, j, f] = G[f, i, j]
            for f in range(F, FP):
                out[i, j, f] = 0.0


@njit(**JIT)
def rotate_compact_rows(feat_hwf, colmin, colmax, cos_t, sin_t, origin_row, origin_col, lo_u, lo_v, nu, nv, uv,
                        vals):
    """:func:`rotate_into` and a compaction in one pass (same samples, same arithmetic).

    Lists the map offsets (du, dv) = (u + lo_u, v + lo_v), u < nu, v < nv, whose rotated sample
    is nonzero in any feature; returns their number. Each canvas row visits only the columns
    whose sample falls inside the grid (a line through a rectangle), and samples whose four taps
    lie where the grid is empty (``colmin``/``colmax`` per grid row) are skipped: they are zero.
    ``vals`` needs one spare row past the last nonzero sample.
    """
    h, w, FP = feat_hwf.shape
    n = 0
    for u in range(nu):
        dy = -(u + lo_u) * 1.0
        # rr(v) = rr0 + sin_t * v, cc(v) = cc0 + cos_t * v (v = canvas column)
        rr0 = origin_row - (-sin_t * (lo_v * 1.0) + cos_t * dy) - 0.5
        cc0 = origin_col + (cos_t * (lo_v * 1.0) + sin_t * dy) - 0.5
        v0, v1 = _row_span(rr0, cc0, sin_t, cos_t, h, w, nv)
        for v in range(v0, v1 + 1):
            dx = (v + lo_v) * 1.0
            xf = cos_t * dx + sin_t * dy
            yl = -sin_t * dx + cos_t * dy
            rr = origin_row - yl - 0.5
            cc = origin_col + xf - 0.5
            if rr <= -1.0 or cc <= -1.0 or rr >= h or cc >= w:
                continue
            r0 = int(math.floor(rr))
            c0 = int(math.floor(cc))
            empty = True
            for r in (r0, r0 + 1):
                if r >= 0 and r < h and c0 + 1 >= colmin[r] and c0 <= colmax[r]:
                    empty = False
            if empty:
                continue
            fr = rr - r0
            fc = cc - c0
            w00 = (1.0 - fr) * (1.0 - fc)
            w01 = (1.0 - fr) * fc
            w10 = fr * (1.0 - fc)
            w11 = fr * fc
            nz = False
            if r0 >= 0 and r0 + 1 < h and c0 >= 0 and c0 + 1 < w:
                for f in range(FP):
                    acc = 0.0
                    acc += w00 * feat_hwf[r0, c0, f]
                    acc += w01 * feat_hwf[r0, c0 + 1, f]
                    acc += w10 * feat_hwf[r0 + 1, c0, f]
                    acc += w11 * feat_hwf[r0 + 1, c0 + 1, f]
                    vals[n, f] = acc
            else:
                ok_r0 = r0 >= 0
                ok_r1 = r0 + 1 < h
                ok_c0 = c0 >= 0
                ok_c1 = c0 + 1 < w
                for f in range(FP):
                    acc = 0.0
                    if ok_r0 and ok_c0:
                        acc += w00 * feat_hwf[r0, c0, f]
                    if ok_r0 and ok_c1:
                        acc += w01 * feat_hwf[r0, c0 + 1, f]
                    if ok_r1 and ok_c0:
                        acc += w10 * feat_hwf[r0 + 1, c0, f]
                    if ok_r1 and ok_c1:
                        acc += w11 * feat_hwf[r0 + 1, c0 + 1, f]
                    vals[n, f] = acc
            for f in range(FP):
                if vals[n, f] != 0.0:
                    nz = True
            if nz:
                uv[n, 0] = u + lo_u
                uv[n, 1] = v + lo_v
                n += 1
    return n


@njit(**JIT)
def ensure_base(b, fr, uv_pool, vals_pool, count, bnd, valid):
    """Rotate and compact the grid of base heading ``b`` into its pool slot, once per frame.

    ``fr`` = (feat_hwf, colmin, colmax, cos_b, sin_b, box, origin_row, origin_col), the frame's
    grid and the base headings' geometry; ``box[b]`` = (lo_u, hi_u, lo_v, hi_v) of the heading's
    offsets; ``bnd[b]`` gets the bounds actually occupied (umin, umax, vmin, vmax).
    """
    if valid[b]:
        return
    feat_hwf, colmin, colmax, cos_b, sin_b, box, origin_row, origin_col = fr
    lu, hu, lv, hv = box[b, 0], box[b, 1], box[b, 2], box[b, 3]
    n = rotate_compact_rows(feat_hwf, colmin, colmax, cos_b[b], sin_b[b], origin_row, origin_col, lu, lv,
                            hu - lu + 1, hv - lv + 1, uv_pool[b], vals_pool[b])
    count[b] = n
    umin = 1 << 30
    vmin = 1 << 30
    umax = -(1 << 30)
    vmax = -(1 << 30)
    for k in range(n):
        du = np.int64(uv_pool[b, k, 0])
        dv = np.int64(uv_pool[b, k, 1])
        umin = min(umin, du)
        umax = max(umax, du)
        vmin = min(vmin, dv)
        vmax = max(vmax, dv)
    bnd[b, 0], bnd[b, 1], bnd[b, 2], bnd[b, 3] = umin, umax, vmin, vmax
    valid[b] = True


@njit(**JIT)
def pose_score(uv, vals, n, quarter, bnd, G, i, j, acc8):
    """Exact (untempered) score of the robot at window cell (i, j) for a base grid turned by ``quarter``.

    ``G`` is the map features (H, W, FP), zero outside the window. Returns -inf for a cell
    outside the window (not a pose of this window). ``acc8`` (FP,) float64 is scratch: one
    accumulator per lane, summed at the end.
    """
    FP = vals.shape[1]
    H, W = G.shape[0], G.shape[1]
    if i < 0 or i >= H or j < 0 or j >= W:
        return -np.inf
    # (du, dv) -> (m00 du + m01 dv, m10 du + m11 dv): the quarter turn without a branch per entry.
    m00, m01, m10, m11 = 1, 0, 0, 1
    if quarter == 1:
        m00, m01, m10, m11 = 0, -1, 1, 0
    elif quarter == 2:
        m00, m01, m10, m11 = -1, 0, 0, -1
    elif quarter == 3:
        m00, m01, m10, m11 = 0, 1, -1, 0
    u0 = m00 * bnd[0] + m01 * bnd[2]
    u1 = m00 * bnd[1] + m01 * bnd[3]
    v0 = m10 * bnd[0] + m11 * bnd[2]
    v1 = m10 * bnd[1] + m11 * bnd[3]
    umin, umax = min(u0, u1), max(u0, u1)
    vmin, vmax = min(v0, v1), max(v0, v1)
    for f in range(FP):
        acc8[f] = 0.0
    if FP == 8 and n > 0 and i + umin >= 0 and i + umax < H and j + vmin >= 0 and j + vmax < W:
        # Eight scalar accumulators stay in registers (the SLP vectorizer packs them).
        s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
        for k in range(n):
            du0 = np.int64(uv[k, 0])
            dv0 = np.int64(uv[k, 1])
            gi = i + m00 * du0 + m01 * dv0
            gj = j + m10 * du0 + m11 * dv0
            s0 += vals[k, 0] * G[gi, gj, 0]
            s1 += vals[k, 1] * G[gi, gj, 1]
            s2 += vals[k, 2] * G[gi, gj, 2]
            s3 += vals[k, 3] * G[gi, gj, 3]
            s4 += vals[k, 4] * G[gi, gj, 4]
            s5 += vals[k, 5] * G[gi, gj, 5]
            s6 += vals[k, 6] * G[gi, gj, 6]
            s7 += vals[k, 7] * G[gi, gj, 7]
        acc8[0], acc8[1], acc8[2], acc8[3] = s0, s1, s2, s3
        acc8[4], acc8[5], acc8[6], acc8[7] = s4, s5, s6, s7
    elif n > 0 and i + umin >= 0 and i + umax < H and j + vmin >= 0 and j + vmax < W:
        for k in range(n):
            du0 = np.int64(uv[k, 0])
            dv0 = np.int64(uv[k, 1])
            gi = i + m00 * du0 + m01 * dv0
            gj = j + m10 * du0 + m11 * dv0
            for f in range(FP):
                acc8[f] += vals[k, f] * G[gi, gj, f]
    else:
        for k in range(n):
            du0 = np.int64(uv[k, 0])
            dv0 = np.int64(uv[k, 1])
            gi = i + m00 * du0 + m01 * dv0
            gj = j + m10 * du0 + m11 * dv0
            if gi >= 0 and gi < H and gj >= 0 and gj < W:
                for f in range(FP):
                    acc8[f] += vals[k, f] * G[gi, gj, f]
    acc = 0.0
    for f in range(FP):
        acc += acc8[f]
    return acc


@njit(**JIT)
def _cached_score(a, i, j, a_c, i_c, j_c, cache, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8):
    """Score of pose (a, i, j) through a cube cache centred on (a_c, i_c, j_c) (NaN = not yet scored)."""
    Q = A // 4
    RH = (cache.shape[0] - 1) // 2
    R = (cache.shape[1] - 1) // 2
    da = (a - a_c + A + A // 2) % A - A // 2
    di = i - i_c
    dj = j - j_c
    inside = abs(da) <= RH and abs(di) <= R and abs(dj) <= R
    if inside:
        v = cache[da + RH, di + R, dj + R]
        if v == v:
            return v
    aa = a % A
    b = aa % Q
    ensure_base(b, fr, uv_pool, vals_pool, count, bnd, valid)
    v = pose_score(uv_pool[b], vals_pool[b], count[b], aa // Q, bnd[b], G, i, j, acc8)
    if inside:
        cache[da + RH, di + R, dj + R] = v
    return v


@njit(**JIT)
def climb_poses(starts, max_steps, rh, A, fr, uv_pool, vals_pool, count, bnd, valid, G, cache, acc8, out_cell,
                out_nb):
    """Hill-climb exact scores from each start (a, i, j) to a local maximum.

    A step moves to the best pose of the neighbourhood (headings a - 1 .. a + 1) x (3 x 3
    cells) if it beats the centre; when none does, the headings a - rh .. a + rh are looked
    at too (the exact score has ripples of a heading step or so in heading: bilinear sampling
    of a turned grid). At most ``max_steps`` steps (0: no move).
    ``out_cell[m]`` = final (a, i, j); ``out_nb[m]`` = untempered scores at the final cell:
    centre, row -1, row +1, col -1, col +1, heading -1, heading +1 (for sub-step parabolas).
    ``cache`` (2 RH + 1, 2 R + 1, 2 R + 1) float64 is scratch, reset per start.
    """
    for m in range(starts.shape[0]):
        a_c = starts[m, 0] % A
        i_c = starts[m, 1]
        j_c = starts[m, 2]
        for x in range(cache.shape[0]):
            for y in range(cache.shape[1]):
                for z in range(cache.shape[2]):
                    cache[x, y, z] = np.nan
        a, i, j = a_c, i_c, j_c
        cur = _cached_score(a, i, j, a_c, i_c, j_c, cache, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8)
        for _step in range(max_steps):
            ba, bi, bj, bv = a, i, j, cur
            # The 3 x 3 x 3 neighbourhood first; the wider headings only once that is a local maximum.
            for wide in range(2):
                t_lo, t_hi = (-1, 1) if wide == 0 else (-rh, rh)
                for t in range(t_lo, t_hi + 1):
                    if wide == 1 and abs(t) <= 1:
                        continue
                    for di in range(-1, 2):
                        for dj in range(-1, 2):
                            if t == 0 and di == 0 and dj == 0:
                                continue
                            v = _cached_score((a + t + A) % A, i + di, j + dj, a_c, i_c, j_c, cache, A, fr,
                                              uv_pool, vals_pool, count, bnd, valid, G, acc8)
                            if v > bv:
                                ba, bi, bj, bv = (a + t + A) % A, i + di, j + dj, v
                if bv > cur or rh <= 1:
                    break
            if bv <= cur:
                break
            a, i, j, cur = ba, bi, bj, bv
        out_cell[m, 0], out_cell[m, 1], out_cell[m, 2] = a, i, j
        out_nb[m, 0] = cur
        k = 1
        for da, di, dj in ((0, -1, 0), (0, 1, 0), (0, 0, -1), (0, 0, 1), (-1, 0, 0), (1, 0, 0)):
            out_nb[m, k] = _cached_score((a + da + A) % A, i + di, j + dj, a_c, i_c, j_c, cache, A, fr, uv_pool,
                                         vals_pool, count, bnd, valid, G, acc8)
            k += 1


@njit(**JIT)
def best_under(cands, hs, s, nh, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8, out_cell, out_score):
    """Best exact full-resolution pose under each coarse hypothesis (a, i, j).

    Scores the s x s cells (s i .. s i + s - 1, s j .. s j + s - 1) at the headings
    hs a - nh .. hs a + nh; ``out_cell[m]``, ``out_score[m]`` get the best (untempered).
    """
    Q = A // 4
    H, W = G.shape[0], G.shape[1]
    for m in range(cands.shape[0]):
        bv = -np.inf
        ba, bi, bj = (hs * cands[m, 0]) % A, s * cands[m, 1], s * cands[m, 2]
        for tt in range(2 * nh + 1):
            t = (tt + 1) // 2 if tt % 2 else -(tt // 2)  # 0, +1, -1, +2, -2: ties go to the centre heading
            aa = (hs * cands[m, 0] + t + A) % A
            b = aa % Q
            ensure_base(b, fr, uv_pool, vals_pool, count, bnd, valid)
            for di in range(s):
                for dj in range(s):
                    i = s * cands[m, 1] + di
                    j = s * cands[m, 2] + dj
                    if i >= H or j >= W:
                        continue
                    v = pose_score(uv_pool[b], vals_pool[b], count[b], aa // Q, bnd[b], G, i, j, acc8)
                    if v > bv:
                        ba, bi, bj, bv = aa, i, j, v
        out_cell[m, 0], out_cell[m, 1], out_cell[m, 2] = ba, bi, bj
        out_score[m] = bv


@njit(**JIT)
def readout_native(buf, L, M, c0, inv_temp, a, nat, nat_a, head_max, head_arg):
    """Read one heading's correlation into the per-quarter maxima, in the buffer's own orientation.

    ``nat[l, m]`` vs ``buf[l, (c0 + m) mod N]`` for l < L, m < M: rows and columns run along
    contiguous memory (no transposed reads); :func:`merge_native` turns the four quarters
    into window orientation once per search. ``head_arg[a]`` gets the flat (l * M + m) of the
    heading's max (converted by the caller's quarter).
    """
    N = buf.shape[1]
    s = c0 % N
    m1 = min(M, N - s)
    hm = -np.inf
    harg = 0
    for l in range(L):
        # Two loops, before and after the cyclic wrap, rather than one with a wrap test per cell: the
        # single loop was measured 35 % slower (float32 256 x 256, 400 interleaved calls, load 0.7).
        for m in range(m1):
            v = buf[l, s + m] * inv_temp
            if v > nat[l, m]:
                nat[l, m] = v
                nat_a[l, m] = a
            if v > hm:
                hm = v
                harg = l * M + m
        for m in range(m1, M):
            v = buf[l, m - m1] * inv_temp
            if v > nat[l, m]:
                nat[l, m] = v
                nat_a[l, m] = a
            if v > hm:
                hm = v
                harg = l * M + m
    head_max[a] = hm
    head_arg[a] = harg


@njit(**JIT)
def merge_native(nat, nat_a, head_arg, q, first, step, best, best_a):
    """Per-cell max over the four quarters' maxima (window orientation), and heading argmax cells.

    Quarter k holds window cell (i, j) at (l, m) = (i, j), (j, H-1-i), (H-1-i, W-1-j), (W-1-j, i)
    for k = 0..3; ties go to the lower quarter. ``head_arg`` of this lane's headings k q + t
    (t = first, first + step, ...) are turned from (l * M + m) into flat window cells i * W + j.
    """
    H, W = best.shape
    for i in range(H):
        for j in range(W):
            bv = nat[0, i, j]
            ba = nat_a[0, i, j]
            v = nat[1, j, H - 1 - i]
            if v > bv:
                bv = v
                ba = nat_a[1, j, H - 1 - i]
            v = nat[2, H - 1 - i, W - 1 - j]
            if v > bv:
                bv = v
                ba = nat_a[2, H - 1 - i, W - 1 - j]
            v = nat[3, W - 1 - j, i]
            if v > bv:
                bv = v
                ba = nat_a[3, W - 1 - j, i]
            best[i, j] = bv
            best_a[i, j] = ba
    for k in range(4):
        M = W if k % 2 == 0 else H
        for t in range(first, q, step):
            a = k * q + t
            l = head_arg[a] // M
            m = head_arg[a] % M
            if k == 0:
                i, j = l, m
            elif k == 1:
                i, j = H - 1 - m, l
            elif k == 2:
                i, j = H - 1 - l, W - 1 - m
            else:
                i, j = m, W - 1 - l
            head_arg[a] = i * W + j



# ---- tracking engine over the frame's support (``_SupportPatchEngine``) ---------------------------------------


@njit(**JIT)
def feature_support(feat, act):
    """Bounding box of the cells where any feature is nonzero, and the features that are.

    ``act[:n]`` gets the indices of the features with any nonzero cell. Returns
    (n, r_lo, r_hi, c_lo, c_hi); n = 0 (and an empty box) when every feature is zero.
    """
    F, h, w = feat.shape
    r_lo, r_hi, c_lo, c_hi = h, -1, w, -1
    n = 0
    for f in range(F):
        seen = False
        for r in range(h):
            for c in range(w):
                if feat[f, r, c] != 0.0:
                    seen = True
                    r_lo = min(r_lo, r)
                    r_hi = max(r_hi, r)
                    c_lo = min(c_lo, c)
                    c_hi = max(c_hi, c)
        if seen:
            act[n] = f
            n += 1
    return n, r_lo, r_hi, c_lo, c_hi


@njit(**JIT)
def gather_features(feat, act, n, out):
    """out[k] = feat[act[k]] for k < n (the frame's nonzero features, packed)."""
    F, h, w = feat.shape
    for k in range(n):
        f = act[k]
        for r in range(h):
            for c in range(w):
                out[k, r, c] = feat[f, r, c]


@njit(**JIT)
def support_bounds(r_lo, r_hi, c_lo, c_hi, origin_row, origin_col, cos_tab, sin_tab, a0, A, out):
    """Integer offset box (lo_u, hi_u, lo_v, hi_v) of headings (a0 + t) mod A, t < out.shape[0], for a grid whose
    nonzero cells lie in rows r_lo..r_hi, columns c_lo..c_hi (``template_bounds`` of that rectangle: a bilinear
    sample is nonzero only for body points strictly inside the rectangle grown by half a cell).

    Returns the union (LU, HU, LV, HV) of the boxes."""
    x0 = c_lo - 0.5 - origin_col
    x1 = c_hi + 1.5 - origin_col
    y0 = origin_row - r_hi - 1.5
    y1 = origin_row - r_lo + 0.5
    LU, HU, LV, HV = 1 << 30, -(1 << 30), 1 << 30, -(1 << 30)
    for t in range(out.shape[0]):
        a = (a0 + t) % A
        c = cos_tab[a]
        s = sin_tab[a]
        umin, umax, vmin, vmax = np.inf, -np.inf, np.inf, -np.inf
        for k in range(4):
            xf = x0 if k < 2 else x1
            yl = y0 if k % 2 == 0 else y1
            dv = c * xf - s * yl
            du = -(s * xf + c * yl)
            umin = min(umin, du)
            umax = max(umax, du)
            vmin = min(vmin, dv)
            vmax = max(vmax, dv)
        lu, hu = int(math.floor(umin)), int(math.ceil(umax))
        lv, hv = int(math.floor(vmin)), int(math.ceil(vmax))
        out[t, 0], out[t, 1], out[t, 2], out[t, 3] = lu, hu, lv, hv
        LU, HU = min(LU, lu), max(HU, hu)
        LV, HV = min(LV, lv), max(HV, hv)
    return LU, HU, LV, HV


@njit(**JIT)
def fill_patch(G, act, r0, c0, patch):
    """patch[k, r, c] = G[act[k], r0 + r, c0 + c] inside the window, 0 outside (every entry written)."""
    n, Nr, Nc = patch.shape
    H, W = G.shape[1], G.shape[2]
    for k in range(n):
        f = act[k]
        for r in range(Nr):
            i = r0 + r
            for c in range(Nc):
                j = c0 + c
                if i >= 0 and i < H and j >= 0 and j < W:
                    patch[k, r, c] = G[f, i, j]
                else:
                    patch[k, r, c] = 0.0


@njit(**JIT)
def rotate_support(feat, cos_t, sin_t, origin_row, origin_col, lo_u, lo_v, r_lo, r_hi, c_lo, c_hi, out):
    """:func:`rotate_into` for a grid whose nonzero cells all lie in rows r_lo..r_hi, columns c_lo..c_hi.

    Canvas (u, v) is the map offset (u + lo_u, v + lo_v); every entry of ``out`` (F, SU, NV) is
    written. Only the canvas columns whose sample can fall inside the support rectangle are
    sampled (the rest are 0, as are the samples themselves there): same samples, same
    arithmetic as :func:`rotate_into`.
    """
    F, SU, NV = out.shape
    h, w = feat.shape[1], feat.shape[2]
    hs, ws = r_hi - r_lo + 1, c_hi - c_lo + 1
    for u in range(SU):
        dy = -(u + lo_u) * 1.0
        rr0 = origin_row - (-sin_t * (lo_v * 1.0) + cos_t * dy) - 0.5
        cc0 = origin_col + (cos_t * (lo_v * 1.0) + sin_t * dy) - 0.5
        v0, v1 = _row_span(rr0 - r_lo, cc0 - c_lo, sin_t, cos_t, hs, ws, NV)
        for f in range(F):
            for v in range(0, min(v0, NV)):
                out[f, u, v] = 0.0
            for v in range(max(v1 + 1, 0), NV):
                out[f, u, v] = 0.0
        for v in range(v0, v1 + 1):
            dx = (v + lo_v) * 1.0
            xf = cos_t * dx + sin_t * dy
            yl = -sin_t * dx + cos_t * dy
            rr = origin_row - yl - 0.5
            cc = origin_col + xf - 0.5
            if rr <= -1.0 or cc <= -1.0 or rr >= h or cc >= w:
                for f in range(F):
                    out[f, u, v] = 0.0
                continue
            r0 = int(math.floor(rr))
            c0 = int(math.floor(cc))
            fr = rr - r0
            fc = cc - c0
            w00 = (1.0 - fr) * (1.0 - fc)
            w01 = (1.0 - fr) * fc
            w10 = fr * (1.0 - fc)
            w11 = fr * fc
            ok_r0 = r0 >= 0
            ok_r1 = r0 + 1 < h
            ok_c0 = c0 >= 0
            ok_c1 = c0 + 1 < w
            for f in range(F):
                acc = 0.0
                if ok_r0 and ok_c0:
                    acc += w00 * feat[f, r0, c0]
                if ok_r0 and ok_c1:
                    acc += w01 * feat[f, r0, c0 + 1]
                if ok_r1 and ok_c0:
                    acc += w10 * feat[f, r0 + 1, c0]
                if ok_r1 and ok_c1:
                    acc += w11 * feat[f, r0 + 1, c0 + 1]
                out[f, u, v] = acc


# ---- single-precision spectra in OpenCV's packed layout (``fft="opencv"``) -------------------------------------
# ``cv2.dft`` of a real (Nr, Nc) float32 array, both sides even, gives its spectrum packed in the same shape
# ("CCS" in OpenCV's documentation): columns 1 .. Nc - 2 hold (re, im) pairs of column frequencies
# 1 .. Nc/2 - 1 for every row frequency; columns 0 and Nc - 1 hold the real column frequencies 0 and Nc/2,
# whose row spectra are packed the same way down the column (row 0 and row Nr - 1 real, (re, im) pairs between).


@njit(**_FAST)
def _ccs_mac_cols(Gf, Tf, P, first, c):
    """P[:, c] (+)= Gf[:, c] * conj(Tf[:, c]) for an edge column c (0 or Nc - 1) packed down the rows."""
    Nr = P.shape[0]
    if first:
        P[0, c] = Gf[0, c] * Tf[0, c]
        P[Nr - 1, c] = Gf[Nr - 1, c] * Tf[Nr - 1, c]
    else:
        P[0, c] += Gf[0, c] * Tf[0, c]
        P[Nr - 1, c] += Gf[Nr - 1, c] * Tf[Nr - 1, c]
    for r in range(1, Nr - 1, 2):
        gr, gi = Gf[r, c], Gf[r + 1, c]
        tr, ti = Tf[r, c], Tf[r + 1, c]
        if first:
            P[r, c] = gr * tr + gi * ti
            P[r + 1, c] = gi * tr - gr * ti
        else:
            P[r, c] += gr * tr + gi * ti
            P[r + 1, c] += gi * tr - gr * ti


@njit(**_FAST)
def mac_ccs(G, T, n, P):
    """P = sum_{k < n} G[k] * conj(T[k]), spectra packed as ``cv2.dft`` gives them (float32, even sides).

    G, T: (>= n, Nr, Nc); P: (Nr, Nc). The inverse ``cv2.idft(P, flags=DFT_REAL_OUTPUT)`` is then
    Nr * Nc times the cyclic correlation sum_y t(y) g(x + y).
    """
    Nr, Nc = P.shape
    h = (Nc - 2) // 2
    for r in range(Nr):
        for c in range(Nc):
            P[r, c] = 0.0
    for k in range(n):
        _ccs_mac_cols(G[k], T[k], P, False, 0)
        _ccs_mac_cols(G[k], T[k], P, False, Nc - 1)
        for r in range(Nr):
            g = G[k, r, 1:Nc - 1]
            t = T[k, r, 1:Nc - 1]
            p = P[r, 1:Nc - 1]
            # (re, im) pairs: one pass over the row, products of the pair written together
            for q in range(h):
                gr = g[2 * q]
                gi = g[2 * q + 1]
                tr = t[2 * q]
                ti = t[2 * q + 1]
                p[2 * q] += gr * tr + gi * ti
                p[2 * q + 1] += gi * tr - gr * ti


@njit(**JIT)
def readout_native_rows(buf, r0, L, M, c0, inv_temp, a, nat, nat_a, head_max, head_arg):
    """:func:`readout_native` for a full cyclic correlation (N, N): buffer row (r0 + l) mod N is row l."""
    N = buf.shape[0]
    Nc = buf.shape[1]
    s = c0 % Nc
    m1 = min(M, Nc - s)
    hm = -np.inf
    harg = 0
    for l in range(L):
        row = buf[(r0 + l) % N]
        for m in range(m1):
            v = row[s + m] * inv_temp
            if v > nat[l, m]:
                nat[l, m] = v
                nat_a[l, m] = a
            if v > hm:
                hm = v
                harg = l * M + m
        for m in range(m1, M):
            v = row[m - m1] * inv_temp
            if v > nat[l, m]:
                nat[l, m] = v
                nat_a[l, m] = a
            if v > hm:
                hm = v
                harg = l * M + m
    head_max[a] = hm
    head_arg[a] = harg


@njit(**JIT)
def support_cells(feat):
    """Number of grid cells where any feature is nonzero (the cost of one exact direct sum scales with it)."""
    F, h, w = feat.shape
    n = 0
    for r in range(h):
        for c in range(w):
            for f in range(F):
                if feat[f, r, c] != 0.0:
                    n += 1
                    break
    return n


@njit(**JIT)
def _walk_score(a, i, j, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8):
    Q = A // 4
    b = a % Q
    ensure_base(b, fr, uv_pool, vals_pool, count, bnd, valid)
    return pose_score(uv_pool[b], vals_pool[b], count[b], a // Q, bnd[b], G, i, j, acc8)


@njit(**JIT)
def _heap_push(heap, n, key):
    heap[n] = key
    k = n
    while k > 0:
        up = (k - 1) // 2
        if heap[up] <= heap[k]:
            break
        heap[up], heap[k] = heap[k], heap[up]
        k = up
    return n + 1


@njit(**JIT)
def _heap_pop(heap, n):
    top = heap[0]
    n -= 1
    heap[0] = heap[n]
    k = 0
    while True:
        l = 2 * k + 1
        if l >= n:
            break
        c = l
        if l + 1 < n and heap[l + 1] < heap[l]:
            c = l + 1
        if heap[k] <= heap[c]:
            break
        heap[k], heap[c] = heap[c], heap[k]
        k = c
    return top, n


@njit(**JIT)
def walk_plateau(a0, i0, j0, tol_frac, budget, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8, keys,
                 vals, queue, reset=True):
    """Best pose of the near-best plateau around (a0, i0, j0): the tie rule shared by both full searches.

    Explores the 3 x 3 x 3 neighbourhoods of poses whose exact score is within ``tol_frac * |best|``
    of the best score met so far (the running best moves up as better poses are met, so this also
    climbs), lowest flat index a * H * W + i * W + j first, so that on a long plateau the walk heads
    for its low end. Returns (a, i, j, score, evaluations): the highest exact score met; among exactly
    equal scores, the lowest flat index, so two walks that reach the same end of a plateau end on the
    same pose wherever they start. At most ``budget`` poses are scored. ``keys`` (power-of-two size,
    int64) and ``vals`` (float64) are an open-addressing table of the poses scored; ``queue`` (int64,
    >= budget) is the heap of poses to expand. ``reset`` False keeps the table of the previous walk of the
    same frame (its scores are valid; the caller checks whether the start was already met).
    """
    H, W = G.shape[0], G.shape[1]
    HW = H * W
    mask = keys.shape[0] - 1
    if reset:
        for k in range(keys.shape[0]):
            keys[k] = -1
    a0 = a0 % A
    key0 = a0 * HW + i0 * W + j0
    s0 = _walk_score(a0, i0, j0, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8)
    h = (key0 * 2654435761) & mask
    keys[h] = key0
    vals[h] = s0
    n_eval = 1
    best_key = key0
    best = s0
    nq = _heap_push(queue, 0, key0)
    while nq > 0:
        key, nq = _heap_pop(queue, nq)
        h = (key * 2654435761) & mask
        while keys[h] != key:
            h = (h + 1) & mask
        if vals[h] < best - tol_frac * abs(best):
            continue  # left the band when the best moved up
        a = key // HW
        i = (key % HW) // W
        j = key % W
        for da in range(-1, 2):
            for di in range(-1, 2):
                for dj in range(-1, 2):
                    if da == 0 and di == 0 and dj == 0:
                        continue
                    ii = i + di
                    jj = j + dj
                    if ii < 0 or ii >= H or jj < 0 or jj >= W:
                        continue
                    aa = (a + da + A) % A
                    nk = aa * HW + ii * W + jj
                    h = (nk * 2654435761) & mask
                    seen = False
                    while keys[h] != -1:
                        if keys[h] == nk:
                            seen = True
                            break
                        h = (h + 1) & mask
                    if seen or n_eval >= budget or n_eval * 2 > keys.shape[0]:
                        continue
                    v = _walk_score(aa, ii, jj, A, fr, uv_pool, vals_pool, count, bnd, valid, G, acc8)
                    n_eval += 1
                    keys[h] = nk
                    vals[h] = v
                    if v > best or (v == best and nk < best_key):
                        best = v
                        best_key = nk
                    if v >= best - tol_frac * abs(best) and nq < queue.shape[0]:
                        nq = _heap_push(queue, nq, nk)
    return best_key // HW, (best_key % HW) // W, best_key % W, best, n_eval


@njit(**JIT)
def order_by_score(score, cells, n, W, HW, tie_key, order):
    """order[:n] = indices of score[:n] from the highest (a stable insertion sort: n is a few hundred at most).

    Equal scores keep their input order (``tie_key`` False) or go lowest flat index a * HW + i * W + j first
    (``tie_key`` True, ``cells[k]`` = (a, i, j)): the ranking rule of the searches' modes.
    """
    for k in range(n):
        order[k] = k
    for k in range(1, n):
        x = order[k]
        sx = score[x]
        kx = cells[x, 0] * HW + cells[x, 1] * W + cells[x, 2]
        m = k - 1
        while m >= 0:
            y = order[m]
            sy = score[y]
            if sy > sx:
                break
            if sy == sx:
                if not tie_key:
                    break
                if cells[y, 0] * HW + cells[y, 1] * W + cells[y, 2] <= kx:
                    break
            order[m + 1] = y
            m -= 1
        order[m + 1] = x


@njit(**JIT)
def take_rows(src, idx, n, dst):
    """dst[k] = src[idx[k]] for k < n."""
    for k in range(n):
        for c in range(src.shape[1]):
            dst[k, c] = src[idx[k], c]


@njit(**JIT)
def table_has(keys, key):
    """True if ``key`` is in the open-addressing table of :func:`walk_plateau`."""
    mask = keys.shape[0] - 1
    h = (key * 2654435761) & mask
    while keys[h] != -1:
        if keys[h] == key:
            return True
        h = (h + 1) & mask
    return False
