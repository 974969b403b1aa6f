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
def rotate_into(feat, cos_t, sin_t, origin_row, origin_col, lo_u, lo_v, out):
    """Rotate bird's-eye features by +yaw about the robot origin into a map-oriented canvas.

    ``out[f, u, v]`` is the bilinear sample of ``feat[f]`` at the body point whose
    map offset from the robot cell is (du, dv) = (u + lo_u, v + lo_v) cells
    (du along map rows, i.e. south; dv along map columns, i.e. east).
    """
    F, h, w = feat.shape
    SU, SV = out.shape[1], out.shape[2]
    for u in range(SU):
        dy = -(u + lo_u) * 1.0  # north offset (cells)
        for v in range(SV):
            dx = (v + lo_v) * 1.0  # east offset (cells)
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
def sparse_scores(uv, vals, n, G, rows, cols, out):
    """Exact scores at robot cells from a compacted rotated grid: sum_n sum_f vals[n, f] G[i + du, j + dv, f].

    ``G`` is the map features in (H, W, F) layout, so the F values of a cell are adjacent.
    Cells whose whole footprint lies inside the window are scored four at a time
    (four independent accumulators hide the add latency; each cell keeps the same
    order of additions as the one-cell loop, so the scores are the same to the bit).
    """
    F = vals.shape[1]
    H, W = G.shape[0], G.shape[1]
    umin = 1 << 30
    vmin = 1 << 30
    umax = -(1 << 30)
    vmax = -(1 << 30)
    for k in range(n):
        du = np.int64(uv[k, 0])
        dv = np.int64(uv[k, 1])
        umin = min(umin, du)
        umax = max(umax, du)
        vmin = min(vmin, dv)
        vmax = max(vmax, dv)
    M = rows.shape[0]
    m = 0
    while m < M:
        if m + 4 <= M:
            inside = True
            for q in range(4):
                i = rows[m + q]
                j = cols[m + q]
                if i + umin < 0 or i + umax >= H or j + vmin < 0 or j + vmax >= W:
                    inside = False
            if inside:
                i0, j0 = rows[m], cols[m]
                i1, j1 = rows[m + 1], cols[m + 1]
                i2, j2 = rows[m + 2], cols[m + 2]
                i3, j3 = rows[m + 3], cols[m + 3]
                a0 = 0.0
                a1 = 0.0
                a2 = 0.0
                a3 = 0.0
                for k in range(n):
                    du = np.int64(uv[k, 0])
                    dv = np.int64(uv[k, 1])
                    for f in range(F):
                        w = vals[k, f]
                        a0 += w * G[i0 + du, j0 + dv, f]
                        a1 += w * G[i1 + du, j1 + dv, f]
                        a2 += w * G[i2 + du, j2 + dv, f]
                        a3 += w * G[i3 + du, j3 + dv, f]
                out[m] = a0
                out[m + 1] = a1
                out[m + 2] = a2
                out[m + 3] = a3
                m += 4
                continue
        i = rows[m]
        j = cols[m]
        acc = 0.0
        for k in range(n):
            gi = i + uv[k, 0]
            gj = j + uv[k, 1]
            if gi >= 0 and gi < H and gj >= 0 and gj < W:
                for f in range(F):
                    acc += vals[k, f] * G[gi, gj, f]
        out[m] = acc
        m += 1


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
def rotate_compact(feat_hwf, cos_t, sin_t, origin_row, origin_col, lo_u, lo_v, nu, nv, uv, vals):
    """:func:`rotate_into` and a compaction in one pass, from cell-major features (h, w, F).

    Lists the map offsets (du, dv) = (u + lo_u, v + lo_v), u < nu, v < nv, whose rotated
    sample is nonzero in any feature; returns their number.
    """
    h, w, F = feat_hwf.shape
    n = 0
    for u in range(nu):
        dy = -(u + lo_u) * 1.0
        for v in range(nv):
            dx = (v + lo_v) * 1.0
            xf = cos_t * dx + sin_t * dy
            yl = -sin_t * dx + cos_t * dy
            rr = origin_row - yl - 0.5
            cc = origin_col + xf - 0.5
            if rr <= -1.0 or cc <= -1.0 or rr >= h or cc >= w:
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
            nz = False
            for f in range(F):
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
                if acc != 0.0:
                    nz = True
            if nz:
                uv[n, 0] = u + lo_u
                uv[n, 1] = v + lo_v
                n += 1
    return n
