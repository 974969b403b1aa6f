"""numba kernels of the grid Bayes filter.

The belief is ``bel[A, H, W]`` float32: heading layer a, window row i, window column j.
Layer a holds poses whose continuous global cell coordinates are
``(row0 + i + 0.5 + dr[a], col0 + j + 0.5 + dc[a])`` and whose yaw is
``(a + hoff) * dyaw``. Kernels take prepared contiguous arrays and scalars and
write into caller-owned buffers; they never validate, allocate or log.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .._numba import JIT


@njit(**JIT)
def shift_roll(src, dst, kr, kc, kh, fill, active):
    """dst[(a + kh) % A, i, j] = src[a, i - kr[a], j - kc[a]]; cells shifted in from outside get ``fill``.

    Inactive layers (``active[a] == 0``) are uniform at ``lsum[a] / (H W)``; their cells are not
    stored (the array content is stale) and are skipped by every kernel.
    """
    A, H, W = src.shape
    for a in range(A):
        ad = (a + kh) % A
        if ad < 0:
            ad += A
        if active[a] == 0:
            continue
        r = kr[a]
        c = kc[a]
        for i in range(H):
            si = i - r
            if si < 0 or si >= H:
                for j in range(W):
                    dst[ad, i, j] = fill
                continue
            for j in range(W):
                sj = j - c
                if sj < 0 or sj >= W:
                    dst[ad, i, j] = fill
                else:
                    dst[ad, i, j] = src[a, si, sj]


@njit(**JIT)
def blur3_space(src, dst, tmp2, wr, wc, fill, active):
    """Separable 3-tap diffusion [w, 1-2w, w] along rows (weight wr) then columns (wc) of active layers.

    Mass that would come from outside the window is ``fill`` per cell; mass that leaves is lost.
    ``tmp2`` is an (H, W) float32 scratch. Inactive layers are skipped.
    """
    A, H, W = src.shape
    cr = 1.0 - 2.0 * wr
    cc = 1.0 - 2.0 * wc
    for a in range(A):
        if active[a] == 0:
            continue
        for i in range(H):
            for j in range(W):
                up = src[a, i - 1, j] if i > 0 else fill
                dn = src[a, i + 1, j] if i < H - 1 else fill
                tmp2[i, j] = cr * src[a, i, j] + wr * (up + dn)
        for i in range(H):
            for j in range(W):
                lf = tmp2[i, j - 1] if j > 0 else fill
                rt = tmp2[i, j + 1] if j < W - 1 else fill
                dst[a, i, j] = cc * tmp2[i, j] + wc * (lf + rt)


@njit(**JIT)
def blur3_heading(src, dst, wh, active, lsum):
    """Circular 3-tap diffusion [w, 1-2w, w] along the heading axis of the active layers.

    An inactive neighbour contributes its uniform level; what active layers lose to inactive ones is
    not carried over (those sit at the edge of the active band and hold negligible mass).
    """
    A, H, W = src.shape
    ch = 1.0 - 2.0 * wh
    n = H * W
    for a in range(A):
        if active[a] == 0:
            continue
        am = a - 1 if a > 0 else A - 1
        ap = a + 1 if a < A - 1 else 0
        um = lsum[am] / n
        up = lsum[ap] / n
        for i in range(H):
            for j in range(W):
                vm = src[am, i, j] if active[am] else um
                vp = src[ap, i, j] if active[ap] else up
                dst[a, i, j] = ch * src[a, i, j] + wh * (vm + vp)


@njit(**JIT)
def _lin_index(u, n):
    """Clamp a continuous sample index to [0, n-1]; returns (i0, frac, inside) for linear interpolation."""
    if u < -0.5 or u > n - 0.5:
        return 0, 0.0, False
    if u < 0.0:
        u = 0.0
    if u > n - 1.0:
        u = n - 1.0
    i0 = int(math.floor(u))
    if i0 > n - 2:
        i0 = n - 2
    if i0 < 0:
        i0 = 0
    f = u - i0
    if n == 1:
        f = 0.0
    return i0, f, True


@njit(**JIT)
def sample_update(bel, dr, dc, hoff, dyaw, vol, vrow, vcol, vscale, vyaw0, vdyaw, vcirc, lmax, lout, weight, clip,
                  active, lsum):
    """Multiply the belief by exp(weight * (L - lmax)) where L is the volume sampled at each cell's pose.

    Sampling is bilinear in space and linear in heading; samples up to half a cell beyond the
    volume's edge take the edge value. ``vrow``/``vcol`` = ``row0 - vol_row0`` (global cells);
    volume cell u is centred ``vscale * (u + 0.5)`` cells after the volume's origin, so belief cell
    i samples volume index ``(vrow + i + 0.5 + dr[a]) / vscale - 0.5``. ``vcirc`` says the
    volume's headings wrap around the full circle. Outside the volume L = ``lout``.
    Inactive layers are multiplied by the outside value only (they are not evaluated; their
    mass in ``lsum`` is scaled).
    Writes each layer's new sum to ``lsum`` and returns the total (the predictive likelihood when
    ``bel`` summed to 1).
    """
    A, H, W = bel.shape
    VA, VH, VW = vol.shape
    eout = math.exp(max(-clip, weight * (lout - lmax)))
    total = 0.0
    for a in range(A):
        la = 0.0
        if active[a] == 0:
            lsum[a] *= eout
            total += lsum[a]
            continue
        yaw = (a + hoff) * dyaw
        u = (yaw - vyaw0) / vdyaw
        if vcirc:
            u = u % VA
            a0 = int(math.floor(u))
            fa = u - a0
            a0 = a0 % VA
            a1 = (a0 + 1) % VA
            head_ok = True
        else:
            # headings of a partial volume may run past 2 pi: bring u into [-0.5, span - 0.5)
            span = 2.0 * math.pi / vdyaw
            u = u - span * math.floor((u + 0.5) / span)
            a0, fa, head_ok = _lin_index(u, VA)
            a1 = a0 + 1 if VA > 1 else a0
        if not head_ok:
            for i in range(H):
                for j in range(W):
                    v = bel[a, i, j] * eout
                    bel[a, i, j] = v
                    la += v
            lsum[a] = la
            total += la
            continue
        ga = 1.0 - fa
        inv = 1.0 / vscale
        for i in range(H):
            i0, fr, rin = _lin_index((vrow + 0.5 + dr[a] + i) * inv - 0.5, VH)
            i1 = i0 + 1 if VH > 1 else i0
            for j in range(W):
                j0, fc, cin = _lin_index((vcol + 0.5 + dc[a] + j) * inv - 0.5, VW)
                if rin and cin:
                    j1 = j0 + 1 if VW > 1 else j0
                    l00 = ga * vol[a0, i0, j0] + fa * vol[a1, i0, j0]
                    l01 = ga * vol[a0, i0, j1] + fa * vol[a1, i0, j1]
                    l10 = ga * vol[a0, i1, j0] + fa * vol[a1, i1, j0]
                    l11 = ga * vol[a0, i1, j1] + fa * vol[a1, i1, j1]
                    L = (1.0 - fr) * ((1.0 - fc) * l00 + fc * l01) + fr * ((1.0 - fc) * l10 + fc * l11)
                    e = math.exp(max(-clip, weight * (L - lmax)))
                else:
                    e = eout
                v = bel[a, i, j] * e
                bel[a, i, j] = v
                la += v
        lsum[a] = la
        total += la
    return total


@njit(**JIT)
def xy_robust_update(bel, dr, dc, row0, col0, frow, fcol, sigma_cells, nu, weight, active):
    """Multiply active layers by a 2D Student-t likelihood of the fix at (frow, fcol) (global cell coords).

    log p = -(nu + 2) / 2 * log(1 + r^2 / (nu sigma^2)), tempered by ``weight``; returns the new sum
    of the active layers.
    """
    A, H, W = bel.shape
    s2 = nu * sigma_cells * sigma_cells
    ex = -0.5 * (nu + 2.0) * weight
    total = 0.0
    for a in range(A):
        if active[a] == 0:
            continue
        rbase = row0 + 0.5 + dr[a] - frow
        cbase = col0 + 0.5 + dc[a] - fcol
        for i in range(H):
            dy = rbase + i
            for j in range(W):
                dx = cbase + j
                f = (1.0 + (dx * dx + dy * dy) / s2) ** ex
                v = bel[a, i, j] * f
                bel[a, i, j] = v
                total += v
    return total


@njit(**JIT)
def scale_add(bel, active, lsum, scale, add):
    """bel = bel * scale + add on active layers, the same on the masses of inactive ones.

    Writes every layer's new mass to ``lsum``; returns the total.
    """
    A, H, W = bel.shape
    total = 0.0
    for a in range(A):
        if active[a] == 0:
            lsum[a] = lsum[a] * scale + add * H * W
            total += lsum[a]
            continue
        la = 0.0
        for i in range(H):
            for j in range(W):
                v = bel[a, i, j] * scale + add
                bel[a, i, j] = v
                la += v
        lsum[a] = la
        total += la
    return total


@njit(**JIT)
def layer_sums(bel, out):
    """out[a] = sum of layer a (float64)."""
    A, H, W = bel.shape
    for a in range(A):
        s = 0.0
        for i in range(H):
            for j in range(W):
                s += bel[a, i, j]
        out[a] = s


@njit(**JIT)
def marginal_xy(bel, active, out_sum, out_best, out_bestv):
    """Per window cell, over active layers: the summed mass and the index of the heaviest heading."""
    A, H, W = bel.shape
    for i in range(H):
        for j in range(W):
            out_sum[i, j] = 0.0
            out_best[i, j] = 0
            out_bestv[i, j] = -1.0
    for a in range(A):
        if active[a] == 0:
            continue
        for i in range(H):
            for j in range(W):
                v = bel[a, i, j]
                out_sum[i, j] += v
                if v > out_bestv[i, j]:
                    out_bestv[i, j] = v
                    out_best[i, j] = a


@njit(**JIT)
def argmax3(bel, active):
    """Flat index of the largest belief cell among active layers."""
    A, H, W = bel.shape
    best = -1.0
    bi = 0
    for a in range(A):
        if active[a] == 0:
            continue
        k = a * H * W
        for i in range(H):
            for j in range(W):
                v = bel[a, i, j]
                if v > best:
                    best = v
                    bi = k
                k += 1
    return bi


@njit(**JIT)
def moments_about(bel, dr, dc, hoff, dyaw, row_ref, col_ref, yaw_ref, lo, acc, active):
    """Second moments of the belief about a reference pose, in cells and radians.

    Cells below ``lo`` are skipped (they hold the uniform floor, not evidence).
    acc[0] = mass, acc[1:4] = sums of (drow, dcol, dyaw), acc[4:10] = sums of
    (drow^2, dcol^2, dyaw^2, drow*dcol, drow*dyaw, dcol*dyaw); rows/cols are
    relative to the window (``row_ref``/``col_ref`` in window coordinates).
    """
    A, H, W = bel.shape
    for k in range(10):
        acc[k] = 0.0
    two_pi = 2.0 * math.pi
    for a in range(A):
        if active[a] == 0:
            continue
        da = (a + hoff) * dyaw - yaw_ref
        da = (da + math.pi) % two_pi
        if da <= 0.0:
            da += two_pi
        da -= math.pi
        rb = 0.5 + dr[a] - row_ref
        cb = 0.5 + dc[a] - col_ref
        for i in range(H):
            ddr = rb + i
            for j in range(W):
                v = bel[a, i, j]
                if v <= lo:
                    continue
                ddc = cb + j
                acc[0] += v
                acc[1] += v * ddr
                acc[2] += v * ddc
                acc[3] += v * da
                acc[4] += v * ddr * ddr
                acc[5] += v * ddc * ddc
                acc[6] += v * da * da
                acc[7] += v * ddr * ddc
                acc[8] += v * ddr * da
                acc[9] += v * ddc * da


@njit(**JIT)
def local_mean(bel, dr, dc, hoff, dyaw, a0, i0, j0, rad_cells, rad_layers, acc):
    """Weighted mean pose in a box around cell (a0, i0, j0): acc = (mass, row, col, dyaw from layer a0).

    Rows/cols are window coordinates of the pose (cell centre + layer offset).
    """
    A, H, W = bel.shape
    for k in range(4):
        acc[k] = 0.0
    for da in range(-rad_layers, rad_layers + 1):
        a = (a0 + da) % A
        for i in range(max(0, i0 - rad_cells), min(H, i0 + rad_cells + 1)):
            for j in range(max(0, j0 - rad_cells), min(W, j0 + rad_cells + 1)):
                v = bel[a, i, j]
                acc[0] += v
                acc[1] += v * (i + 0.5 + dr[a])
                acc[2] += v * (j + 0.5 + dc[a])
                acc[3] += v * (da * dyaw)


@njit(**JIT)
def box_mass(m2, i0, j0, rad):
    """Sum of a 2D array in the square of half-size ``rad`` around (i0, j0)."""
    H, W = m2.shape
    s = 0.0
    for i in range(max(0, i0 - rad), min(H, i0 + rad + 1)):
        for j in range(max(0, j0 - rad), min(W, j0 + rad + 1)):
            s += m2[i, j]
    return s


@njit(**JIT)
def suppress_box(m2, i0, j0, rad):
    """Set the square of half-size ``rad`` around (i0, j0) to -1 (non-maximum suppression)."""
    H, W = m2.shape
    for i in range(max(0, i0 - rad), min(H, i0 + rad + 1)):
        for j in range(max(0, j0 - rad), min(W, j0 + rad + 1)):
            m2[i, j] = -1.0


@njit(**JIT)
def max_over_heading(vol, out):
    """out[i, j] = max over a of vol[a, i, j]."""
    A, H, W = vol.shape
    for i in range(H):
        for j in range(W):
            out[i, j] = vol[0, i, j]
    for a in range(1, A):
        for i in range(H):
            for j in range(W):
                v = vol[a, i, j]
                if v > out[i, j]:
                    out[i, j] = v


@njit(**JIT)
def flatten_layers(bel, active, lsum):
    """Store the uniform level ``lsum[a] / (H W)`` in the cells of every inactive layer."""
    A, H, W = bel.shape
    n = H * W
    for a in range(A):
        if active[a] == 0:
            v = lsum[a] / n
            for i in range(H):
                for j in range(W):
                    bel[a, i, j] = v


@njit(**JIT)
def cue_accumulate(cue, fi0, fj0, di_u, di_v, dj_u, dj_v, offs, lam, weight, acc, tmp):
    """Sample a surface on a grid of (along, left) offsets and fold it into a decaying sum.

    ``cue[H, W]`` is sampled bilinearly (edges held, like ``scipy.ndimage.map_coordinates`` with
    ``mode="nearest"``) at continuous index ``(fi0 + di_u u + di_v v, fj0 + dj_u u + dj_v v)`` for
    ``u = offs[p]`` (along) and ``v = offs[q]`` (left), into ``tmp[p, q]``; then
    ``acc = lam acc + weight (tmp - max tmp)``. Returns the sampled range ``max - min`` (0: flat).
    """
    H, W = cue.shape
    n = offs.shape[0]
    hi = -np.inf
    lo = np.inf
    for p in range(n):
        u = offs[p]
        for q in range(n):
            v = offs[q]
            fi = fi0 + di_u * u + di_v * v
            fj = fj0 + dj_u * u + dj_v * v
            fi = min(max(fi, 0.0), H - 1.0)
            fj = min(max(fj, 0.0), W - 1.0)
            i0 = min(int(math.floor(fi)), H - 2) if H > 1 else 0
            j0 = min(int(math.floor(fj)), W - 2) if W > 1 else 0
            ti = fi - i0
            tj = fj - j0
            i1 = min(i0 + 1, H - 1)
            j1 = min(j0 + 1, W - 1)
            s = ((1.0 - ti) * ((1.0 - tj) * cue[i0, j0] + tj * cue[i0, j1])
                 + ti * ((1.0 - tj) * cue[i1, j0] + tj * cue[i1, j1]))
            tmp[p, q] = s
            if s > hi:
                hi = s
            if s < lo:
                lo = s
    for p in range(n):
        for q in range(n):
            acc[p, q] = lam * acc[p, q] + weight * (tmp[p, q] - hi)
    return hi - lo
