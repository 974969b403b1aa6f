"""Numba kernels of the perception stage: features, scores, flood fill, projection, scatter.

Kernels take prepared contiguous arrays and write into caller-owned buffers; they do
not validate, allocate or log (the wrappers in segment.py and overhead.py do that).
Their plain-NumPy references live in the tests (tests/_perception_reference.py).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from .._numba import JIT

# Feature planes written by seg_features (indices into feat[NF, h, w]).
F_V, F_S, F_EXGR, F_BSTAR, F_GRAY, F_GX, F_GY, F_U, F_BRIGHT, F_G2 = range(10)
NF = 10

# Parameter vector layout for seg_scores (filled by segment.SegmentParams.vector()).
(P_SKY_TEX, P_SKY_V, P_SKY_S, P_SKY_BLUE, P_SKY_V2, P_SKY_BELOW, P_GREEN0, P_GREEN_W, P_G_U0, P_G_W,
 P_T_SMOOTH, P_T_W, P_ROAD_W, P_SIDE_W, P_GRASS_W, P_BLD_W, P_TREE_W, P_MIX_W, P_GROUND_FLOOR, P_REF_L,
 P_REF_D, P_REF_W, P_MIX0, P_VAR0, P_VAR_W, P_TREE_LOW, P_ON_ROAD, P_WALL_DIST, P_WALL_EDGE, P_WALL_GROUND,
 P_POLE_CONTRAST, P_POLE_RUN, P_FENCE_TOP, P_CROWN_MODEL, P_CROWN_T, P_SOIL_B, P_SOIL_W, P_WALL_REACH,
 P_WALL_BASE, P_WALL_DARK, P_WALL_MEDIAN, P_GROUND_POWER) = range(42)
NP = 42

# A facade's base band is tested by the ratio of two depths below the horizon, each known to about half a
# raster row: its top must lie at least this many rows down (ratio to about +-0.5 / 6). On the tuning drives
# 11-17 (every 5th frame, bands within 20 m passing the ratio at wall_base 0.6) the bands with a shallower
# top were truly building in 95 of 961 cases, the deeper ones in 635 of 1723.
BAND_MIN_DEPTH = 6.0

# The dark gap under an object (wall_dark): the ground it stands on must be at least this much lighter
# (Lab L, 0..255) than the gap's mean, in the two rows below it; and the gap's top at least
# DARK_MIN_DEPTH rows below the horizon, at most DARK_MAX_SHARE of the camera's height tall by the
# depth ratio of extend_walls' docstring (a vehicle's underside and wheels, up to about 0.6 m under a
# camera at 0.8 m).
DARK_STEP = 10.0
# A paving joint under the robot (surface_joints): |dI/dx| + |dI/dy| above this (grey levels 0..1). On the
# tuning drives 11-20 (every 3rd frame) the patch under the robot had no pixel above it in 139 of the 151
# frames on the carriageway, and at least 3 % of its pixels above it in all 846 frames on the footway.
JOINT_EDGE = 0.02
DARK_MIN_DEPTH = 2.0
DARK_MAX_SHARE = 0.8

# Class indices (tinyloc.classes); repeated as literals because kernels cannot import the table.
BUILDING, ROAD, SIDEWALK, GRASS, TREE, POLE, FENCE, PARKING, WATER, SKY, DYNAMIC = range(11)


# Logistic function tabulated on [-SIG_SPAN, SIG_SPAN] (linear interpolation, error < 2e-6): the
# scores call it six times per pixel and the table is ~5x faster than math.exp.
SIG_SPAN = 16.0
SIG_STEPS = 64.0  # table entries per unit
SIG_LUT = 1.0 / (1.0 + np.exp(-np.linspace(-SIG_SPAN, SIG_SPAN, int(2 * SIG_SPAN * SIG_STEPS) + 1)))


@njit(**JIT)
def _sig(x):
    if x <= -SIG_SPAN:
        return 0.0
    if x >= SIG_SPAN:
        return 1.0
    f = (x + SIG_SPAN) * SIG_STEPS
    i = int(f)
    t = f - i
    return SIG_LUT[i] + t * (SIG_LUT[i + 1] - SIG_LUT[i])


@njit(**JIT)
def sig_exact(x):
    """The logistic function 1 / (1 + exp(-x)) (reference for the table)."""
    return 1.0 / (1.0 + math.exp(-x))


@njit(**JIT)
def seg_features(bgr, lab, hrow, feat):
    """Per-pixel colour features and central-difference gradients of a small BGR image.

    bgr, lab : (h, w, 3) uint8; hrow : (w,) float64 horizon row per column (pixel centres at integers);
    feat : (NF, h, w) float32 output (planes F_*; F_BRIGHT and F_G2 are filled by seg_scores' caller).
    """
    h, w = bgr.shape[0], bgr.shape[1]
    for i in range(h):
        for j in range(w):
            b = float(bgr[i, j, 0])
            g = float(bgr[i, j, 1])
            r = float(bgr[i, j, 2])
            tot = r + g + b
            mx = max(r, max(g, b))
            mn = min(r, min(g, b))
            feat[F_V, i, j] = mx / 255.0
            feat[F_S, i, j] = (mx - mn) / mx if mx > 0.0 else 0.0
            if tot > 0.0:
                rc, gc, bc = r / tot, g / tot, b / tot
            else:
                rc, gc, bc = 0.0, 0.0, 0.0
            exg = 2.0 * gc - rc - bc  # Woebbecke et al. 1995
            exr = 1.4 * rc - gc  # Meyer and Neto 2008
            feat[F_EXGR, i, j] = exg - exr
            feat[F_BSTAR, i, j] = float(lab[i, j, 2]) - 128.0
            gray = tot / 765.0
            feat[F_GRAY, i, j] = gray
            feat[F_G2, i, j] = gray * gray
            feat[F_U, i, j] = (hrow[j] - i) / h
    for i in range(h):
        for j in range(w):
            if 0 < j < w - 1:
                feat[F_GX, i, j] = abs(feat[F_GRAY, i, j + 1] - feat[F_GRAY, i, j - 1]) * 0.5
            else:
                feat[F_GX, i, j] = 0.0
            if 0 < i < h - 1:
                feat[F_GY, i, j] = abs(feat[F_GRAY, i + 1, j] - feat[F_GRAY, i - 1, j]) * 0.5
            else:
                feat[F_GY, i, j] = 0.0


@njit(**JIT)
def box_mean(src, r, tmp, dst):
    """Mean over a (2r+1)^2 window with edge pixels repeated (BORDER_REPLICATE); src, tmp, dst (h, w) float32."""
    h, w = src.shape
    k = 2 * r + 1
    for i in range(h):
        s = 0.0
        for d in range(-r, r + 1):
            s += src[i, min(max(d, 0), w - 1)]
        tmp[i, 0] = s
        for j in range(1, w):
            s += src[i, min(j + r, w - 1)] - src[i, max(j - r - 1, 0)]
            tmp[i, j] = s
    for j in range(w):
        s = 0.0
        for d in range(-r, r + 1):
            s += tmp[min(max(d, 0), h - 1), j]
        dst[0, j] = s / (k * k)
        for i in range(1, h):
            s += tmp[min(i + r, h - 1), j] - tmp[max(i - r - 1, 0), j]
            dst[i, j] = s / (k * k)


@njit(**JIT)
def flood_from_top(mask, out, queue):
    """4-connected flood fill of ``mask`` (uint8) seeded at every mask pixel of row 0; out uint8 0/1.

    queue : (h*w,) int32 scratch. Returns the number of pixels filled.
    """
    h, w = mask.shape
    for i in range(h):
        for j in range(w):
            out[i, j] = 0
    head = 0
    tail = 0
    for j in range(w):
        if mask[0, j]:
            out[0, j] = 1
            queue[tail] = j
            tail += 1
    while head < tail:
        p = queue[head]
        head += 1
        i = p // w
        j = p - i * w
        for di, dj in ((1, 0), (-1, 0), (0, 1), (0, -1)):
            ni = i + di
            nj = j + dj
            if 0 <= ni < h and 0 <= nj < w and mask[ni, nj] and not out[ni, nj]:
                out[ni, nj] = 1
                queue[tail] = ni * w + nj
                tail += 1
    return tail


@njit(**JIT)
def _hist_lower_median(hist, n, ref):
    """ref[c] = lower median of the n values counted in hist[c] (3 channels of 256 bins)."""
    half = (n + 1) // 2
    for c in range(3):
        acc = 0
        for v in range(256):
            acc += hist[c, v]
            if acc >= half:
                ref[c] = v
                break


@njit(**JIT)
def patch_median_lab(lab, r0, r1, c0, c1, hist, ref):
    """Lower median of each Lab channel over rows [r0, r1) x cols [c0, c1); hist (3, 256) int64 scratch."""
    for c in range(3):
        for v in range(256):
            hist[c, v] = 0
    n = 0
    for i in range(r0, r1):
        for j in range(c0, c1):
            n += 1
            for c in range(3):
                hist[c, lab[i, j, c]] += 1
    _hist_lower_median(hist, n, ref)


@njit(**JIT)
def patch_edge_share(feat, r0, r1, c0, c1, thr):
    """Share of the pixels of rows r0 .. r1 - 1, columns c0 .. c1 - 1 whose |dI/dx| + |dI/dy| (grey 0..1,
    central differences) exceeds ``thr``: the joints of paving slabs under the robot."""
    n = 0
    k = 0
    for i in range(r0, r1):
        for j in range(c0, c1):
            n += 1
            if feat[F_GX, i, j] + feat[F_GY, i, j] > thr:
                k += 1
    return k / n if n > 0 else 0.0


@njit(**JIT)
def other_paved_lightness(lab, feat, tex, ref, prm, u_max, hist):
    """Lower-median Lab lightness (8-bit L) of the paved-looking ground unlike the surface under the robot.

    Pixels counted: below ``u_max`` (image heights relative to the horizon, negative below), smoother
    than ``smooth_tex``, not vegetation (ExG - ExR under ``green0``, and with the soil rule on, b* not
    more than ``soil_b`` above the reference's), and further than ``ref_dist`` (the segmenter's colour
    distance) from ``ref``. hist (3, 256) int64 scratch (row 0 used). Returns (median L, count);
    (-1, 0) when no pixel qualifies.
    """
    h, w = tex.shape
    for v in range(256):
        hist[0, v] = 0
    refl, refd, tsm, green0, soil_b = prm[P_REF_L], prm[P_REF_D], prm[P_T_SMOOTH], prm[P_GREEN0], prm[P_SOIL_B]
    n = 0
    for i in range(h):
        for j in range(w):
            if feat[F_U, i, j] >= u_max or tex[i, j] >= tsm or feat[F_EXGR, i, j] >= green0:
                continue
            db = float(lab[i, j, 2]) - ref[2]
            if soil_b > 0.0 and db > soil_b:
                continue
            d = abs(float(lab[i, j, 0]) - ref[0]) * refl + abs(float(lab[i, j, 1]) - ref[1]) + abs(db)
            if d <= refd:
                continue
            hist[0, lab[i, j, 0]] += 1
            n += 1
    if n == 0:
        return -1.0, 0
    half = (n + 1) // 2
    acc = 0
    for v in range(256):
        acc += hist[0, v]
        if acc >= half:
            return float(v), n
    return 255.0, n


@njit(**JIT)
def sky_candidates(feat, tex, prm, bright, cand):
    """Bright-or-blue pixels (bright) and, of those, smooth ones near or above the horizon (cand); uint8 0/1."""
    h, w = tex.shape
    for i in range(h):
        for j in range(w):
            v = feat[F_V, i, j]
            b = (v > prm[P_SKY_V] and feat[F_S, i, j] < prm[P_SKY_S]) or \
                (feat[F_BSTAR, i, j] < -prm[P_SKY_BLUE] and v > prm[P_SKY_V2])
            bright[i, j] = 1 if b else 0
            cand[i, j] = 1 if (b and tex[i, j] < prm[P_SKY_TEX] and feat[F_U, i, j] > -prm[P_SKY_BELOW]) else 0


@njit(**JIT)
def seg_scores(feat, lab, tex, sky, brightmix, gmean, g2mean, crown_in, ref, prm, scores, labels):
    """Per-class scores, normalised to probabilities (sum 1 per pixel), and the arg-max label.

    feat (NF, h, w) f32; lab (h, w, 3) u8; tex, brightmix, gmean, g2mean (h, w) f32; sky (h, w) u8;
    crown_in (h, w) f32: the crown model's smoothed tree probability; when prm[P_CROWN_MODEL] > 0.5 it
    alone splits tree from building above the horizon (tree where crown_in > prm[P_CROWN_T]), instead
    of the vegetation index and the bright-mix crown rule;
    ref (3,) Lab of the surface under the robot; prm (NP,) f64; scores (C, h, w) f32; labels (h, w) u8.
    With prm[P_GROUND_POWER] = g != 1 the probabilities (not the labels) of road, sidewalk and grass keep
    their sum but are split in proportion to their scores to the power g: the soft vegetation step and the
    small weight of the other paved surface otherwise leave a clearly paved pixel only about half its class.
    Only the scored classes' planes (building, road, sidewalk, grass, tree, sky) are written; the
    caller keeps the other planes at zero. Ties go to the lower class index.
    """
    nc, h, w = scores.shape
    on_road = prm[P_ON_ROAD] > 0.5
    green0, igreen = prm[P_GREEN0], 1.0 / prm[P_GREEN_W]
    gu0, igw = prm[P_G_U0], 1.0 / prm[P_G_W]
    tsm, itw = prm[P_T_SMOOTH], 1.0 / prm[P_T_W]
    refl, refd, irefw = prm[P_REF_L], prm[P_REF_D], 1.0 / prm[P_REF_W]
    road_w, side_w, floor = prm[P_ROAD_W], prm[P_SIDE_W], prm[P_GROUND_FLOOR]
    mix0, var0, ivarw = prm[P_MIX0], prm[P_VAR0], 1.0 / prm[P_VAR_W]
    grass_w, bld_w, tree_w, mix_w, tree_low = prm[P_GRASS_W], prm[P_BLD_W], prm[P_TREE_W], prm[P_MIX_W], \
        prm[P_TREE_LOW]
    r0, r1, r2 = ref[0], ref[1], ref[2]
    soil_b, isoilw = prm[P_SOIL_B], 1.0 / prm[P_SOIL_W]
    use_model = prm[P_CROWN_MODEL] > 0.5
    codds = prm[P_CROWN_T] / (1.0 - prm[P_CROWN_T])  # tree wins where crown > crown_threshold
    gpow = prm[P_GROUND_POWER]
    for i in range(h):
        for j in range(w):
            u = feat[F_U, i, j]
            green = _sig((feat[F_EXGR, i, j] - green0) * igreen)
            below = _sig((-u - gu0) * igw)
            s_here = 0.0
            s_other = 0.0
            gg = green  # vegetation on the ground: green, or yellowish bare or dry ground (soil rule)
            if soil_b > 0.0 and below > 0.0:
                gg = max(green, _sig((float(lab[i, j, 2]) - r2 - soil_b) * isoilw))
            if below > 0.0:
                smooth = _sig((tsm - tex[i, j]) * itw)
                dist = abs(float(lab[i, j, 0]) - r0) * refl + abs(float(lab[i, j, 1]) - r1) + \
                    abs(float(lab[i, j, 2]) - r2)
                on = _sig((refd - dist) * irefw)
                s_here = below * (1.0 - gg) * (road_w * on * (0.5 + 0.5 * smooth) + floor)
                s_other = below * (1.0 - gg) * (1.0 - on) * smooth * side_w
            crown = 0.0
            if use_model:
                crown = crown_in[i, j]
            elif below < 1.0:
                var = g2mean[i, j] - gmean[i, j] * gmean[i, j]
                if var < 0.0:
                    var = 0.0
                crown = _sig((brightmix[i, j] - mix0) * 20.0) * _sig((var - var0) * ivarw)
            if on_road:
                s_road, s_side = s_here, s_other
            else:
                s_road, s_side = s_other, s_here
            s_sky = 2.0 if sky[i, j] else 0.0
            s_grass = below * gg * grass_w
            if use_model:
                # above the horizon the crown model alone splits tree from building (green is in it)
                s_bld = (1.0 - below) * bld_w * (1.0 - crown)
                s_tree = (1.0 - below) * bld_w * crown / codds + below * green * tree_w * (1.0 - tree_low)
            else:
                s_bld = (1.0 - below) * (1.0 - green) * bld_w * (1.0 - crown)
                s_tree = green * tree_w * (1.0 - below * tree_low) + (1.0 - below) * crown * mix_w
            best = BUILDING
            bv = s_bld
            if s_road > bv:
                best, bv = ROAD, s_road
            if s_side > bv:
                best, bv = SIDEWALK, s_side
            if s_grass > bv:
                best, bv = GRASS, s_grass
            if s_tree > bv:
                best, bv = TREE, s_tree
            if s_sky > bv:
                best, bv = SKY, s_sky
            labels[i, j] = best
            if gpow != 1.0:
                # the ground share re-split among the ground classes by their scores' power (labels unchanged)
                g = s_road + s_side + s_grass
                if g > 0.0:
                    pr, ps, pg = s_road ** gpow, s_side ** gpow, s_grass ** gpow
                    kg = g / (pr + ps + pg)
                    s_road, s_side, s_grass = pr * kg, ps * kg, pg * kg
            tot = s_bld + s_road + s_side + s_grass + s_tree + s_sky
            k = 1.0 / tot if tot > 0.0 else 0.0
            scores[BUILDING, i, j] = s_bld * k
            scores[ROAD, i, j] = s_road * k
            scores[SIDEWALK, i, j] = s_side * k
            scores[GRASS, i, j] = s_grass * k
            scores[TREE, i, j] = s_tree * k
            scores[SKY, i, j] = s_sky * k


@njit(**JIT)
def _set_class(probs, labels, i, j, k):
    for c in range(probs.shape[0]):
        probs[c, i, j] = 0.0
    probs[k, i, j] = 1.0
    labels[i, j] = k


@njit(**JIT)
def thin_and_low(feat, hrow, prm, probs, labels, mark):
    """Poles from thin vertical lines, fences from low walls.

    Pole: a pixel darker or brighter than both pixels two columns away by at least ``pole_contrast``
    (grey level 0..1, same sign both sides: a line at most 3 pixels wide); a vertical run of such
    pixels at least ``pole_run`` image heights long that crosses the horizon (it stands on the ground
    and rises above the camera) is a pole. Fence: a run of building that starts below the horizon,
    ends less than ``fence_top`` image heights above it and has sky or vegetation on top is too low
    for a house within range: a fence or wall. mark : (h, w) uint8 scratch.
    """
    nc, h, w = probs.shape
    con = prm[P_POLE_CONTRAST]
    min_run = max(2, int(prm[P_POLE_RUN] * h + 0.5))
    ftop = prm[P_FENCE_TOP] * h
    for i in range(h):
        for j in range(w):
            mark[i, j] = 0
            if con > 0.0 and 2 <= j < w - 2 and labels[i, j] != SKY:
                c = feat[F_GRAY, i, j]
                dl = c - feat[F_GRAY, i, j - 2]
                dr = c - feat[F_GRAY, i, j + 2]
                if (dl > con and dr > con) or (dl < -con and dr < -con):
                    mark[i, j] = 1
    for j in range(w):
        hr = hrow[j]
        i = h - 1
        while i >= 0:
            if mark[i, j]:
                i1 = i
                while i >= 0 and mark[i, j]:
                    i -= 1
                i0 = i + 1  # run is rows i0..i1
                if i1 - i0 + 1 >= min_run and i0 < hr < i1:
                    for q in range(i0, i1 + 1):
                        _set_class(probs, labels, q, j, POLE)
            else:
                i -= 1
        if ftop <= 0.0:
            continue
        i = h - 1
        while i >= 0:
            if labels[i, j] == BUILDING:
                i1 = i
                while i >= 0 and labels[i, j] == BUILDING:
                    i -= 1
                i0 = i + 1
                above = labels[i, j] if i >= 0 else SKY
                if i1 > hr and hr - i0 < ftop and (above == SKY or above == TREE):
                    for q in range(i0, i1 + 1):
                        _set_class(probs, labels, q, j, FENCE)
            else:
                i -= 1


@njit(**JIT)
def _ref_dist(lab, i, j, ref, refl):
    """Colour distance of pixel (i, j) to the surface under the robot (lightness weighted by refl)."""
    return abs(lab[i, j, 0] - ref[0]) * refl + abs(lab[i, j, 1] - ref[1]) + abs(lab[i, j, 2] - ref[2])


@njit(**JIT)
def _band_pixel(feat, lab, labels, is_ground, ref, refl, refd, green0, soil_b, i, j):
    """Pixel (i, j) may belong to a facade's base band: ground-labelled, neither green nor (soil_b > 0)
    yellowish like bare or dry ground, and unlike the robot's surface."""
    return labels[i, j] != BUILDING and is_ground[labels[i, j]] and feat[F_EXGR, i, j] < green0 \
        and (soil_b <= 0.0 or lab[i, j, 2] - ref[2] <= soil_b) and _ref_dist(lab, i, j, ref, refl) >= refd


@njit(**JIT)
def _base_band(feat, lab, labels, is_ground, ref, refl, refd, dmax, green0, soil_b, hr, base, j, e):
    """The row below a facade's base band that starts at row e of column j, or e (see extend_walls)."""
    h = labels.shape[0]
    if e + 4 >= h:
        return e
    for q in range(e + 1, e + 3):
        if not _band_pixel(feat, lab, labels, is_ground, ref, refl, refd, green0, soil_b, q, j):
            return e
    c0 = 0.5 * (float(lab[e + 1, j, 0]) + lab[e + 2, j, 0])
    c1 = 0.5 * (float(lab[e + 1, j, 1]) + lab[e + 2, j, 1])
    c2 = 0.5 * (float(lab[e + 1, j, 2]) + lab[e + 2, j, 2])
    b = e + 3
    while b < h - 1:
        if not _band_pixel(feat, lab, labels, is_ground, ref, refl, refd, green0, soil_b, b, j):
            break
        if 0.5 * abs(lab[b, j, 0] - c0) + abs(lab[b, j, 1] - c1) + abs(lab[b, j, 2] - c2) > dmax:
            break
        b += 1
    # the band stands on ground (this pixel and the next) of another colour (this one, or the next after a
    # mixed pixel)
    if b >= h - 1 or labels[b, j] == BUILDING or not is_ground[labels[b, j]] or labels[b + 1, j] == BUILDING \
            or not is_ground[labels[b + 1, j]]:
        return e
    if 0.5 * abs(lab[b + 1, j, 0] - c0) + abs(lab[b + 1, j, 1] - c1) + abs(lab[b + 1, j, 2] - c2) <= dmax:
        return e
    # thin enough to be a wall's base: top depth >= (1 - base) x bottom depth (boundaries at half rows),
    # read only where the depths are large enough to give that ratio to about +-0.08
    return b if _thin_band(e, b, hr, BAND_MIN_DEPTH, base) else e


@njit(**JIT)
def _dark_gap(lab, labels, is_ground, hr, c0, dark, j, e):
    """The row below the dark gap under an object that starts at row e of column j, or e (see extend_walls)."""
    h = labels.shape[0]
    lim = dark * c0
    # the first pixel may mix the object and the gap (boundaries fall inside raster pixels)
    b = e + 1 if (e + 1 < h and lab[e, j, 0] > lim and labels[e, j] != BUILDING and is_ground[labels[e, j]]) else e
    e1 = b
    s = 0.0
    while b < h - 2 and labels[b, j] != BUILDING and is_ground[labels[b, j]] and lab[b, j, 0] <= lim:
        s += lab[b, j, 0]
        b += 1
    n = b - e1
    if n < 2 or b >= h - 2:
        return e
    mean = s / n
    for q in range(b, b + 2):
        if labels[q, j] == BUILDING or not is_ground[labels[q, j]] or lab[q, j, 0] < mean + DARK_STEP:
            return e
    return b if _thin_band(e, b, hr, DARK_MIN_DEPTH, DARK_MAX_SHARE) else e


@njit(**JIT)
def _thin_band(e, b, hr, min_depth, share):
    """Rows e..b-1 below the horizon row hr are thin enough to be an object's base: the depth below the
    horizon at their top (boundaries at half rows) is at least ``min_depth`` rows and at least (1 - share) of
    the depth at their bottom."""
    top = e - 0.5 - hr
    return top >= min_depth and top >= (1.0 - share) * (b - 0.5 - hr)


@njit(**JIT)
def _median3(a, b, c):
    """The middle one of three values (as float)."""
    a, b, c = float(a), float(b), float(c)
    return max(min(a, b), min(max(a, b), c))


@njit(**JIT)
def extend_walls(feat, lab, hrow, ref, prm, is_ground, probs, labels, band):
    """Carry buildings down across the horizon to their foot.

    Everything nearer than the camera's height appears below the horizon, so the bottom of a facade
    first scores as ground. In each column whose pixel at the horizon is building, pixels below it
    that look like ground are relabelled building while their Lab colour stays within ``wall_dist``
    of the facade's (the mean of the three pixels above the horizon; with ``wall_median`` the per-channel
    median of the three building pixels directly above the first pixel that is not building, i.e. the
    facade's colour where it meets the ground, which a window sill at the horizon or one odd pixel does not
    move) and no horizontal edge stronger
    than ``wall_edge`` (|dI/dy|, 0..1) is crossed: the foot of a wall is such an edge. It also stops
    at a pixel that looks like the surface under the robot (within ``wall_ground`` of ``ref``).

    With ``wall_reach`` = k > 0 the facade may also start up to k rows above the horizon pixel when
    only ground-labelled pixels lie between: ground cannot stand above the horizon of a level camera,
    so those pixels are the facade's too (a facade coloured like paving is often called ground right
    up to the row above the horizon). The carry then starts at that building pixel, and is kept only
    if it ends at a visible foot (colour change, edge or a non-ground class), not at a pixel that looks
    like the robot's surface.

    With ``wall_base`` = b > 0 a carry stopped by a colour change or an edge may go on across the
    facade's base band (a plinth, a shop front's base, the contact shadow where wall meets ground): a
    run of at least two ground-labelled pixels of one colour (within ``wall_dist`` of the mean of its
    second and third pixel, the first being the mixed pixel of the boundary) that ends directly on
    the robot's own surface (that pixel or the next within ``wall_ground`` of ``ref``). It is taken
    as the wall's only when it is thin enough to be one: for a level camera at height H a horizontal
    band from height 0 to t on a vertical wall spans the rows whose depths below the horizon are in
    the ratio (H - t) / H, while a strip of ground in front of a distant facade may span any ratio; so
    the band's top must lie at least (1 - b) of the way from the horizon to its bottom (a band at most
    b H tall), and its top must lie at least BAND_MIN_DEPTH (6) rows below the horizon, where that
    ratio can be read. A band that fails the test leaves the foot where the carry stopped. A strip of
    ground in front of a wall passes both tests as easily as a plinth, but unlike a wall's base it
    goes on beside the wall: so a run of neighbouring columns with bands is dropped when, on either
    side, the first column past the wall (its horizon pixel not building) shows the band's colour on
    ground pixels in at least half of the band's rows, or when neither side can be seen (the wall
    reaches the image's edge both ways, as a facade faced from a few metres does: then nothing tells
    its base from a path in front of it). One side seen is enough: a facade along the street often
    fills one side of the picture and ends, or reaches the vanishing point, on the other.

    With ``wall_dark`` = q > 0 a carry stopped by a colour change goes on across the dark gap under an
    object (the unlit underside and wheels of a parked vehicle, the contact shadow at a wall's foot):
    at least two ground-labelled pixels, from the stop down, no lighter than q times the facade's
    lightness, standing on two ground pixels at least DARK_STEP lighter than the gap's mean, with the
    gap's top at least DARK_MIN_DEPTH rows below the horizon and the gap at most DARK_MAX_SHARE of the
    camera's height tall (the depth ratio above). Without it the gap scores as ground and both the
    object's foot and that ground land metres too far away.

    ``band`` (3, w) int32 is scratch: carry start, band top and band bottom row per column (-1: none).
    """
    nc, h, w = probs.shape
    dark = prm[P_WALL_DARK]
    dmax = prm[P_WALL_DIST]
    emax = prm[P_WALL_EDGE]
    refl = prm[P_REF_L]
    refd = prm[P_WALL_GROUND]
    reach = int(prm[P_WALL_REACH])
    base = prm[P_WALL_BASE]
    green0 = prm[P_GREEN0]
    soil_b = prm[P_SOIL_B]
    for j in range(w):
        band[0, j] = -1
        band[1, j] = -1
        band[2, j] = -1
        r = int(math.floor(hrow[j]))
        if r < 3 or r >= h - 1:
            continue
        moved = False
        if labels[r, j] != BUILDING:
            k = r
            while k > r - reach and k > 3 and is_ground[labels[k, j]]:
                k -= 1
            if k == r or labels[k, j] != BUILDING:
                continue
            r = k
            moved = True
        if prm[P_WALL_MEDIAN] > 0.5:
            # the facade's colour where it meets what scores as ground: the three building pixels directly
            # above the first non-building pixel below the start
            s = r
            while s + 1 < h and labels[s + 1, j] == BUILDING:
                s += 1
            c0 = _median3(lab[s - 2, j, 0], lab[s - 1, j, 0], lab[s, j, 0])
            c1 = _median3(lab[s - 2, j, 1], lab[s - 1, j, 1], lab[s, j, 1])
            c2 = _median3(lab[s - 2, j, 2], lab[s - 1, j, 2], lab[s, j, 2])
        else:
            c0 = 0.0
            c1 = 0.0
            c2 = 0.0
            for q in range(r - 2, r + 1):
                c0 += lab[q, j, 0]
                c1 += lab[q, j, 1]
                c2 += lab[q, j, 2]
            c0 /= 3.0
            c1 /= 3.0
            c2 /= 3.0
        e = h  # first row the facade does not continue into
        at_edge = False
        by_colour = False
        e_ref = h  # first row that looks like the robot's surface (the carry's stop without a base band)
        for i in range(r + 1, h):
            if labels[i, j] == BUILDING:
                continue
            if not is_ground[labels[i, j]]:
                e = i
                at_edge = True
                break
            d = 0.5 * abs(lab[i, j, 0] - c0) + abs(lab[i, j, 1] - c1) + abs(lab[i, j, 2] - c2)
            if d > dmax or feat[F_GY, i, j] > emax:
                e = i
                at_edge = True
                by_colour = True
                break
            if e_ref == h and _ref_dist(lab, i, j, ref, refl) < refd:
                e_ref = i
                if base <= 0.0:
                    break
        if dark > 0.0 and by_colour and e < e_ref:
            b = _dark_gap(lab, labels, is_ground, hrow[j], c0, dark, j, e)
            if b > e:
                e = b
                by_colour = False
        if base > 0.0 and by_colour:
            b = _base_band(feat, lab, labels, is_ground, ref, refl, refd, dmax, green0, soil_b, hrow[j], base, j, e)
            if b > e:  # carried across the band after the side check below; first the carry without it
                band[0, j] = r
                band[1, j] = e
                band[2, j] = b
        if e_ref < e:  # stopped by a pixel like the robot's surface before any foot
            e = e_ref
            at_edge = False
        # a facade found above the horizon is carried down only to a visible foot (a change of colour, an
        # edge or a non-ground class): stopped by ground-like colour, a facade coloured like the paving
        # may go on lower, and a foot placed too high puts the facade too far away
        if moved and not at_edge:
            continue
        _relabel_building(probs, labels, j, r + 1, e)
    if base <= 0.0:
        return
    j = 0
    while j < w:
        if band[2, j] < 0:
            j += 1
            continue
        j0 = j
        while j < w and band[2, j] >= 0:
            j += 1
        left = _band_beside(lab, labels, is_ground, hrow, band, dmax, j0, -1)
        right = _band_beside(lab, labels, is_ground, hrow, band, dmax, j - 1, 1)
        if left == 1 or right == 1 or (left < 0 and right < 0):
            continue
        for k in range(j0, j):
            _relabel_building(probs, labels, k, band[0, k] + 1, band[2, k])


@njit(**JIT)
def _relabel_building(probs, labels, j, i0, i1):
    """Rows i0 .. i1 - 1 of column j become building (probability 1)."""
    for i in range(i0, i1):
        if labels[i, j] == BUILDING:
            continue
        labels[i, j] = BUILDING
        for c in range(probs.shape[0]):
            probs[c, i, j] = 0.0
        probs[BUILDING, i, j] = 1.0


@njit(**JIT)
def _band_beside(lab, labels, is_ground, hrow, band, dmax, jj, step):
    """Whether the base band of column jj (the end of a run of band columns) goes on past the wall's side:
    1 yes, 0 no, -1 not seen (the wall, with or without a band, reaches the image's edge)."""
    h, w = labels.shape
    top, bot = band[1, jj], band[2, jj]
    c0 = 0.5 * (float(lab[top + 1, jj, 0]) + lab[top + 2, jj, 0])
    c1 = 0.5 * (float(lab[top + 1, jj, 1]) + lab[top + 2, jj, 1])
    c2 = 0.5 * (float(lab[top + 1, jj, 2]) + lab[top + 2, jj, 2])
    k = jj + step
    n = 0
    while 0 <= k < w and n < w:
        r = int(math.floor(hrow[k]))
        if r < 0 or r >= h or labels[r, k] != BUILDING:
            break
        k += step
        n += 1
    if k < 0 or k >= w or n >= w:
        return -1
    same = 0
    for i in range(top + 1, bot):
        if labels[i, k] != BUILDING and is_ground[labels[i, k]] and \
                0.5 * abs(lab[i, k, 0] - c0) + abs(lab[i, k, 1] - c1) + abs(lab[i, k, 2] - c2) <= dmax:
            same += 1
    return 1 if 2 * same >= bot - top - 1 else 0


@njit(**JIT)
def horizon_rows(rays, level, out):
    """Horizon row per column from base-frame pixel rays (h, w, 3) and level_from_base (3, 3); out (w,) f64.

    Pixel centres at integer rows. -1: whole column below the horizon; h: whole column above it.
    """
    h, w = rays.shape[0], rays.shape[1]
    for j in range(w):
        prev = 0.0
        out[j] = float(h)
        for i in range(h):
            z = level[2, 0] * rays[i, j, 0] + level[2, 1] * rays[i, j, 1] + level[2, 2] * rays[i, j, 2]
            if z <= 0.0:
                if i == 0:
                    out[j] = -1.0
                else:
                    out[j] = (i - 1) + prev / (prev - z)
                break
            prev = z


@njit(**JIT)
def cells_to_pixels(cells, m, off, fx, fy, cx, cy, dist, xlim, ylim, u_out, v_out):
    """Project level-frame ground points (N, 3) to pixels: optical = m @ p + off, then OpenCV distortion.

    Points behind the camera or outside the undistorted field of view (|x/z| > xlim, |y/z| > ylim,
    where the distortion polynomial stops being monotonic) give NaN.
    """
    k1, k2, p1, p2, k3 = dist[0], dist[1], dist[2], dist[3], dist[4]
    for n in range(cells.shape[0]):
        px, py, pz = cells[n, 0], cells[n, 1], cells[n, 2]
        x = m[0, 0] * px + m[0, 1] * py + m[0, 2] * pz + off[0]
        y = m[1, 0] * px + m[1, 1] * py + m[1, 2] * pz + off[1]
        z = m[2, 0] * px + m[2, 1] * py + m[2, 2] * pz + off[2]
        if z <= 1e-6:
            u_out[n] = np.nan
            v_out[n] = np.nan
            continue
        xn = x / z
        yn = y / z
        if abs(xn) > xlim or abs(yn) > ylim:
            u_out[n] = np.nan
            v_out[n] = np.nan
            continue
        r2 = xn * xn + yn * yn
        rad = 1.0 + r2 * (k1 + r2 * (k2 + r2 * k3))
        xd = xn * rad + 2.0 * p1 * xn * yn + p2 * (r2 + 2.0 * xn * xn)
        yd = yn * rad + p1 * (r2 + 2.0 * yn * yn) + 2.0 * p2 * xn * yn
        u_out[n] = fx * xd + cx
        v_out[n] = fy * yd + cy


@njit(**JIT)
def ground_gather(probs, labels, pu, pv, cell_range, max_range, is_ground, to_map, hrow, evidence, free, visible):
    """Fill ground-class evidence, free space and visibility of each BEV cell from the pixel it maps to.

    probs (C, h, w) f32; labels (h, w) u8; pu, pv (H*W,) f64 pixel of each cell centre (NaN: not in view);
    cell_range (H*W,) f64 metres; is_ground (C,) u8; to_map (C,) int64 map channel or -1;
    hrow (w,) f64 horizon rows; evidence (M, H, W), free, visible (H, W) f32 (cleared by the caller).
    Bilinear sampling of the probabilities; the nearest pixel's label decides whether ground is seen.
    """
    nc, h, w = probs.shape
    gh, gw = free.shape
    for n in range(gh * gw):
        u = pu[n]
        v = pv[n]
        if not (u >= 0.0 and v >= 0.0 and u <= w - 1.0 and v <= h - 1.0):
            continue
        if cell_range[n] > max_range:
            continue
        iu = int(u + 0.5)
        iv = int(v + 0.5)
        if iv <= hrow[iu]:
            continue
        if not is_ground[labels[iv, iu]]:
            continue
        r = n // gw
        c = n - r * gw
        j0 = min(int(u), w - 2)
        i0 = min(int(v), h - 2)
        fu = u - j0
        fv = v - i0
        w00 = (1.0 - fu) * (1.0 - fv)
        w01 = fu * (1.0 - fv)
        w10 = (1.0 - fu) * fv
        w11 = fu * fv
        fr = 0.0
        for k in range(nc):
            p = w00 * probs[k, i0, j0] + w01 * probs[k, i0, j0 + 1] + w10 * probs[k, i0 + 1, j0] + \
                w11 * probs[k, i0 + 1, j0 + 1]
            if is_ground[k]:
                fr += p
                m = to_map[k]
                if m >= 0:
                    evidence[m, r, c] = p
        free[r, c] = min(fr, 1.0)
        visible[r, c] = 1.0


@njit(**JIT)
def _foot_ray(probs, rays, level, j, i, k, out3):
    """Levelled ray (out3) through the foot of class k between rows i (object) and i + 1 (ground), column j."""
    pa = probs[k, i, j]
    pb = probs[k, i + 1, j]
    t = 0.5
    if pa > pb:
        t = (pa - 0.5) / (pa - pb)
        t = min(max(t, 0.0), 1.0)
    dx = rays[i, j, 0] + t * (rays[i + 1, j, 0] - rays[i, j, 0])
    dy = rays[i, j, 1] + t * (rays[i + 1, j, 1] - rays[i, j, 1])
    dz = rays[i, j, 2] + t * (rays[i + 1, j, 2] - rays[i, j, 2])
    out3[0] = level[0, 0] * dx + level[0, 1] * dy + level[0, 2] * dz
    out3[1] = level[1, 0] * dx + level[1, 1] * dy + level[1, 2] * dz
    out3[2] = level[2, 0] * dx + level[2, 1] * dy + level[2, 2] * dz


@njit(**JIT)
def _height_at(rays, level, cam, i, j, dh):
    """Height above the ground (m) where the levelled ray of pixel (i, j) is ``dh`` metres away horizontally."""
    lx = level[0, 0] * rays[i, j, 0] + level[0, 1] * rays[i, j, 1] + level[0, 2] * rays[i, j, 2]
    ly = level[1, 0] * rays[i, j, 0] + level[1, 1] * rays[i, j, 1] + level[1, 2] * rays[i, j, 2]
    lz = level[2, 0] * rays[i, j, 0] + level[2, 1] * rays[i, j, 1] + level[2, 2] * rays[i, j, 2]
    hn = math.sqrt(lx * lx + ly * ly)
    if hn < 1e-12:
        return 1e9 if lz > 0.0 else -1e9
    return cam[2] + lz * dh / hn


@njit(**JIT)
def _write_along(gx, gy, ux, uy, d0, depth_m, m, val, res_m, origin_row, origin_col, evidence, free, visible):
    """Write class evidence (map channel m; -1: none) on the ray from (gx, gy) + d0 to + d0 + depth_m (half-cell steps)."""
    gh, gw = visible.shape
    nstep = int(depth_m / (0.5 * res_m)) + 1
    for q in range(nstep):
        d = d0 + q * 0.5 * res_m
        cc = int(math.floor(origin_col + (gx + ux * d) / res_m))
        rr = int(math.floor(origin_row - (gy + uy * d) / res_m))
        if 0 <= rr < gh and 0 <= cc < gw:
            visible[rr, cc] = 1.0
            free[rr, cc] = 0.0
            if m >= 0 and evidence[m, rr, cc] < val:
                evidence[m, rr, cc] = val


@njit(**JIT)
def _stacked(labels, lab, rays, level, cam, j, i, ii, topi, dh, min_h, share, dist, base_m, chroma):
    """True when the base of the building run (rows ii+1..i of column j, foot range dh) is another object.

    The base is the run's pixels 0.2 .. ``base_m`` metres above the ground at range ``dh``; the upper part
    is every building pixel of rows topi..i at least ``min_h`` up. Needs 2 base and 3 upper pixels. An
    upper pixel matches the base when within ``dist`` (0.5 |dL| + |da| + |db|) and, with ``chroma`` > 0,
    its hue difference |da| + |db| is at most ``chroma`` too.
    """
    c0 = 0.0
    c1 = 0.0
    c2 = 0.0
    nb = 0
    for q in range(ii + 1, i + 1):
        z = _height_at(rays, level, cam, q, j, dh)
        if 0.2 <= z <= base_m:
            c0 += lab[q, j, 0]
            c1 += lab[q, j, 1]
            c2 += lab[q, j, 2]
            nb += 1
    if nb < 2:
        return False
    c0 /= nb
    c1 /= nb
    c2 /= nb
    nu = 0
    near = 0
    for q in range(topi, i + 1):
        if labels[q, j] != BUILDING or _height_at(rays, level, cam, q, j, dh) < min_h:
            continue
        nu += 1
        dc = abs(lab[q, j, 1] - c1) + abs(lab[q, j, 2] - c2)
        if 0.5 * abs(lab[q, j, 0] - c0) + dc <= dist and (chroma <= 0.0 or dc <= chroma):
            near += 1
    return nu >= 3 and near < share * nu


@njit(**JIT)
def vertical_contacts(labels, probs, rays, level, cam, hrow, is_vertical, is_ground, to_map, min_run, max_range,
                      depth_m, start_m, geom, res_m, origin_row, origin_col, ray3, evidence, free, visible, lab):
    # depth_m, start_m: (256,) float64, metres of evidence behind the foot and where it starts, per class
    # geom: (min_building_height_m, min_building_width_m, fx of the segmentation raster (px), thin_class,
    #        low_class (-1: not placed), stack_share (0: off), stack_dist (Lab), stack_base_m,
    #        trunk_width_m (0: off), trunk_at_top (1: a narrow run leaving the picture's top is a trunk too),
    #        low_on_road_class, low_on_road (1: on), stack_chroma (Lab |da| + |db|, 0: off))
    # lab: (h, w, 3) uint8 Lab of the segmentation raster (read only when stack_share > 0)
    """Deposit vertical classes at their ground contacts, column by column.

    Scanning each image column up from the bottom row to the horizon, every place where a ground pixel
    is directly below a run of at least ``min_run`` pixels of one vertical class is that object's foot
    on visible ground (objects higher up the column stand further away). An object whose bottom rests
    on another object (a house behind a hedge) or on the image's bottom edge has no visible foot and is
    not placed. The foot is refined to where the class probability crosses 0.5 between the two rows;
    the levelled ray through it meets the ground at the object's range. The class evidence (the run's
    mean probability) is written from ``start_m[k]`` to ``start_m[k] + depth_m[k]`` further along the
    ray, where free space is cleared (an object stands there).

    Buildings are checked against their size: the run's top (the highest building pixel above the foot,
    gaps of up to 2 pixels of other non-sky classes bridged) must stand at least ``geom[0]`` metres
    above the ground at the foot's range, unless it reaches the image's top edge, and the run of
    building pixels across the horizon row (or the run's top or foot, when the run lies wholly below or
    above it) at least ``geom[1]`` metres wide at the foot's range. A building too low (a
    vehicle, a fence, a hedge) is placed as class ``geom[4]`` (-1: not placed); one too narrow but tall
    enough (a trunk, a pole) as class ``geom[3]``, each with that class's depth.

    Two further checks of a building run that is tall enough (each off at 0):

    - a separate object in front (``geom[5]`` = stack_share > 0): the run's base, the pixels from 0.2 m
      to ``geom[7]`` metres above the ground at the foot's range, has a mean Lab colour; when fewer than
      ``stack_share`` of the run's building pixels at least ``geom[0]`` metres up lie within ``geom[6]``
      of it (distance 0.5 |dL| + |da| + |db|), the base is another object (a car, a bus, a garden wall)
      standing in front of the facade: the foot is that object's and is placed as class ``geom[4]``;
      the facade above has no visible foot and is not placed; with ``geom[12]`` = stack_chroma > 0 an
      upper pixel matches the base only when its |da| + |db| to it is at most that too (a wooden fence
      as light as the grey facade behind it differs in hue only);
    - a trunk (``geom[8]`` = trunk_width_m > 0): a run narrower than that across the horizon row whose
      top ends under a tree crown (the first pixel above the bridged top is tree), or with ``geom[9]`` > 0
      leaves the picture at the top below ``geom[0]`` metres (its height unverified), is placed as class
      ``geom[3]``.

    A building too low that stands on road (the ground pixel under its foot labelled road or parking) is
    placed as class ``geom[10]`` instead of ``geom[4]`` when ``geom[11]`` > 0 (a vehicle: walls, fences
    and hedges stand beside the carriageway, not on it).

    Returns the number of feet placed.
    """
    nc, h, w = probs.shape
    min_h, min_w, fx, thin, low = geom[0], geom[1], geom[2], int(geom[3]), int(geom[4])
    st_share, st_dist, st_base, tr_w, tr_top = geom[5], geom[6], geom[7], geom[8], geom[9]
    checks = min_h > 0.0 or min_w > 0.0 or st_share > 0.0 or tr_w > 0.0
    count = 0
    for j in range(w):
        top = int(math.floor(hrow[j])) + 1
        if top < 0:
            top = 0
        i = h - 2
        while i >= top:
            k = labels[i, j]
            if is_vertical[k] and is_ground[labels[i + 1, j]]:
                run = 0
                psum = 0.0
                ii = i
                while ii >= 0 and labels[ii, j] == k:
                    if run < min_run:
                        psum += probs[k, ii, j]
                    run += 1
                    ii -= 1
                if run >= min_run:
                    _foot_ray(probs, rays, level, j, i, k, ray3)
                    lx, ly, lz = ray3[0], ray3[1], ray3[2]
                    if lz < -1e-9:
                        s = -cam[2] / lz
                        gx = cam[0] + s * lx
                        gy = cam[1] + s * ly
                        hn = math.sqrt(lx * lx + ly * ly)
                        if gx * gx + gy * gy <= max_range * max_range:
                            kk = k
                            if k == BUILDING and checks:
                                # top of the building: bridge short gaps of non-sky classes
                                q = ii
                                topi = ii + 1
                                gap = 0
                                while q >= 0:
                                    lq = labels[q, j]
                                    if lq == BUILDING:
                                        topi = q
                                        gap = 0
                                    elif lq == SKY:
                                        break
                                    else:
                                        gap += 1
                                        if gap > 2:
                                            break
                                    q -= 1
                                dh = s * hn
                                top_h = _height_at(rays, level, cam, topi, j, dh)
                                tall = topi == 0 or top_h >= min_h
                                # (the upper part starts at min_h: without a height check above the base, no check)
                                if tall and st_share > 0.0 and min_h > st_base and \
                                        _stacked(labels, lab, rays, level, cam, j, i, ii, topi, dh, min_h, st_share,
                                                 st_dist, st_base, geom[12]):
                                    tall = False
                                # width where the run crosses the horizon (the foot row wanders
                                # between columns on an oblique or ragged foot)
                                wr = min(max(int(math.floor(hrow[j])), topi), i)
                                a = j
                                while a > 0 and labels[wr, a - 1] == BUILDING:
                                    a -= 1
                                b = j
                                while b < w - 1 and labels[wr, b + 1] == BUILDING:
                                    b += 1
                                wide = (b - a + 1) * dh / fx >= min_w
                                if not tall:
                                    kk = low
                                    if geom[11] > 0.0 and (labels[i + 1, j] == ROAD or labels[i + 1, j] == PARKING):
                                        kk = int(geom[10])
                                elif not wide:
                                    kk = thin
                                elif tr_w > 0.0 and (b - a + 1) * dh / fx < tr_w and \
                                        ((topi > 0 and labels[topi - 1, j] == TREE) or
                                         (topi == 0 and tr_top > 0.0 and top_h < min_h)):
                                    kk = thin
                            if kk >= 0:
                                ux = lx / hn if hn > 1e-12 else 0.0  # a ray straight down: foot only
                                uy = ly / hn if hn > 1e-12 else 0.0
                                _write_along(gx, gy, ux, uy, start_m[kk], depth_m[kk], to_map[kk], psum / min_run,
                                             res_m, origin_row, origin_col, evidence, free, visible)
                                count += 1
                i = ii
            else:
                i -= 1
    return count


@njit(**JIT)
def frame_stats(small):
    """(mean HSV value 0..1, share of pixels at >= 250 in every channel) of a small BGR uint8 image."""
    h, w = small.shape[0], small.shape[1]
    acc = 0.0
    sat = 0
    for i in range(h):
        for j in range(w):
            b = small[i, j, 0]
            g = small[i, j, 1]
            r = small[i, j, 2]
            acc += max(r, max(g, b))
            if min(r, min(g, b)) >= 250:
                sat += 1
    n = h * w
    return acc / (255.0 * n), sat / n


# --- crown model: texture features and the linear tree-vs-building score --------------------------------
# Feature planes of tfeat[NT, h, w], in the order of the model's weight vector (crown_model.py names them).
(T_V, T_S, T_EXGR, T_U, T_VAR9, T_COH9, T_AXIS9, T_FR, T_EXGR9, T_S9, T_V15, T_S15, T_S31, T_COH15, T_COH31,
 T_AXIS15, T_VERT15, T_FINE15, T_FR15, T_FR31, T_LOGEN9, T_EN15, T_NONSKY9) = range(23)
NT = 23


@njit(**JIT)
def gray_mean(bgr, out):
    """Grey level (B + G + R) / 765 (0..1) of a BGR uint8 image; out (h, w) float32."""
    h, w = bgr.shape[0], bgr.shape[1]
    for i in range(h):
        for j in range(w):
            out[i, j] = (float(bgr[i, j, 0]) + float(bgr[i, j, 1]) + float(bgr[i, j, 2])) / 765.0


@njit(**JIT)
def abs_laplacian(g, out):
    """|4 c - n - s - e - w| of a float32 image, edge pixels repeated beyond the border (OpenCV's 3x3
    Laplacian with ksize=1 and BORDER_REPLICATE)."""
    h, w = g.shape
    for i in range(h):
        iu = max(i - 1, 0)
        idn = min(i + 1, h - 1)
        for j in range(w):
            jl = max(j - 1, 0)
            jr = min(j + 1, w - 1)
            out[i, j] = abs(4.0 * g[i, j] - g[iu, j] - g[idn, j] - g[i, jl] - g[i, jr])


@njit(**JIT)
def pool2(src, dst):
    """dst[i, j] = mean of the 2 x 2 block src[2i:2i+2, 2j:2j+2]; src (2h, 2w), dst (h, w) float32."""
    h, w = dst.shape
    for i in range(h):
        for j in range(w):
            dst[i, j] = 0.25 * (src[2 * i, 2 * j] + src[2 * i, 2 * j + 1] + src[2 * i + 1, 2 * j] +
                                src[2 * i + 1, 2 * j + 1])


@njit(**JIT)
def gradient_products(g, dx2, dy2, dxy, adxy):
    """Signed central differences dx, dy of g (0 on the border rows/columns) and their products
    dx^2, dy^2, dx dy, |dx dy| (the structure tensor's entries before averaging)."""
    h, w = g.shape
    for i in range(h):
        for j in range(w):
            dx = (g[i, j + 1] - g[i, j - 1]) * 0.5 if 0 < j < w - 1 else 0.0
            dy = (g[i + 1, j] - g[i - 1, j]) * 0.5 if 0 < i < h - 1 else 0.0
            dx2[i, j] = dx * dx
            dy2[i, j] = dy * dy
            dxy[i, j] = dx * dy
            adxy[i, j] = abs(dx * dy)


@njit(**JIT)
def tensor_shape(jxx, jyy, jxy, ajxy, coh, axis, vert, logen, en):
    """Orientation structure of window-averaged gradient products (tr = jxx + jyy + 1e-6):
    coherence sqrt((jxx - jyy)^2 + 4 jxy^2) / tr (1: one orientation, 0: isotropic), axis share
    mean|dx dy| / tr (0 for horizontal and vertical edges, 1/pi for isotropic texture, 1/2 diagonal),
    vertical-edge share jxx / tr, energy en = sqrt(tr) and log(en + 0.01)."""
    h, w = jxx.shape
    for i in range(h):
        for j in range(w):
            a = jxx[i, j]
            b = jyy[i, j]
            c = jxy[i, j]
            tr = a + b + 1e-6
            coh[i, j] = math.sqrt((a - b) * (a - b) + 4.0 * c * c) / tr
            axis[i, j] = ajxy[i, j] / tr
            vert[i, j] = a / tr
            e = math.sqrt(tr)
            en[i, j] = e
            logen[i, j] = math.log(e + 0.01)


@njit(**JIT)
def fine_ratio(fine, coarse, out):
    """fine / (fine + coarse + 1e-3): the share of texture energy finer than the segmentation raster."""
    h, w = fine.shape
    for i in range(h):
        for j in range(w):
            out[i, j] = fine[i, j] / (fine[i, j] + coarse[i, j] + 1e-3)


@njit(**JIT)
def crown_prob(tfeat, wts, bias, feat, sky, green0, igreen, u_min, p_out, m_out):
    """Tree probability of each pixel from the linear crown model, and the mask it applies to.

    p = sig(bias + sum_k wts[k] tfeat[k]) raised to the vegetation score sig((ExG-ExR - green0) / w)
    where that is larger (green is tree whatever its texture); only pixels that are not sky and lie
    above ``u_min`` (image heights relative to the horizon) take part (m_out = 1), others get p = 0.
    """
    nt, h, w = tfeat.shape
    for i in range(h):
        for j in range(w):
            if sky[i, j] or feat[F_U, i, j] <= u_min:
                p_out[i, j] = 0.0
                m_out[i, j] = 0.0
                continue
            z = bias
            for k in range(nt):
                z += wts[k] * tfeat[k, i, j]
            p = _sig(z)
            g = _sig((feat[F_EXGR, i, j] - green0) * igreen)
            p_out[i, j] = max(p, g)
            m_out[i, j] = 1.0


@njit(**JIT)
def masked_ratio(num, den, out):
    """out = num / den where den > 1e-6, else 0 (a masked box mean from two box means)."""
    h, w = num.shape
    for i in range(h):
        for j in range(w):
            d = den[i, j]
            out[i, j] = num[i, j] / d if d > 1e-6 else 0.0


@njit(**JIT)
def class_indicator(labels, k, out):
    """out = 1.0 where labels == k, else 0.0 (float32)."""
    h, w = labels.shape
    for i in range(h):
        for j in range(w):
            out[i, j] = 1.0 if labels[i, j] == k else 0.0


@njit(**JIT)
def sky_in_crowns(tree_share, share, probs, labels):
    """Sky pixels whose window holds more than ``share`` tree pixels are the gaps of a crown: tree.

    The sky seen through a bare or open crown belongs to the tree in a map-maker's eyes (and in hand
    labels); tree_share is the window mean of the tree indicator. Returns the number relabelled.
    """
    h, w = labels.shape
    n = 0
    for i in range(h):
        for j in range(w):
            if labels[i, j] == SKY and tree_share[i, j] > share:
                _set_class(probs, labels, i, j, TREE)
                n += 1
    return n


@njit(**JIT)
def sky_gaps(tfeat, extra, wts, bias, zmin, near, probs, labels):
    """Sky pixels near a crown whose sky-gap score z = bias + sum_k wts[k] f_k exceeds ``zmin`` become tree.

    f = the crown features (tfeat, NT planes) followed by the ``extra`` planes (tree share 9 x 9 and
    15 x 15, gradient energy, smoothed crown probability). Near a crown: the 15 x 15 tree share is at
    least ``near`` (a gap lies within a crown; open sky far from trees is never relabelled, whatever its
    colour). Returns the number relabelled.
    """
    nt, h, w = tfeat.shape
    ne = extra.shape[0]
    n = 0
    for i in range(h):
        for j in range(w):
            if labels[i, j] != SKY or extra[1, i, j] < near:
                continue
            z = bias
            for k in range(nt):
                z += wts[k] * tfeat[k, i, j]
            for k in range(ne):
                z += wts[nt + k] * extra[k, i, j]
            if z > zmin:
                _set_class(probs, labels, i, j, TREE)
                n += 1
    return n


@njit(**JIT)
def sky_reference(lab, tex, feat, rows, tex_max, hist, ref):
    """Lower-median Lab of the smooth pixels above the horizon in the top ``rows`` rows (the frame's sky
    colour when the top of the picture is sky); hist (3, 256) int64 scratch. Returns the pixel count."""
    h, w = tex.shape
    for c in range(3):
        for v in range(256):
            hist[c, v] = 0
    n = 0
    for i in range(min(rows, h)):
        for j in range(w):
            if tex[i, j] < tex_max and feat[F_U, i, j] > 0.0:
                n += 1
                for c in range(3):
                    hist[c, lab[i, j, c]] += 1
    if n == 0:
        return 0
    _hist_lower_median(hist, n, ref)
    return n


@njit(**JIT)
def _near_ref(lab, i, j, ref, dist_max):
    d = 0.5 * abs(float(lab[i, j, 0]) - ref[0]) + abs(float(lab[i, j, 1]) - ref[1]) + \
        abs(float(lab[i, j, 2]) - ref[2])
    return d < dist_max


@njit(**JIT)
def sky_colour_below_horizon(lab, hrow, ref, dist_max, depth):
    """Share of columns whose ``depth`` pixels just below the horizon are mostly (> half) of the sky
    colour ``ref``: a sky ends at the horizon, a near facade of that colour goes on below it."""
    h, w = lab.shape[0], lab.shape[1]
    cols = 0
    hit = 0
    for j in range(w):
        r = int(math.floor(hrow[j])) + 1
        if r < 0 or r + depth > h:
            continue
        cols += 1
        k = 0
        for i in range(r, r + depth):
            if _near_ref(lab, i, j, ref, dist_max):
                k += 1
        if 2 * k > depth:
            hit += 1
    return hit / cols if cols > 0 else 1.0


@njit(**JIT)
def sky_like_reference(feat, lab, tex, ref, dist_max, tex_max, below, bright, cand):
    """Add to the sky candidates the smooth pixels near or above the horizon within ``dist_max`` (Lab,
    L* weighted 0.5) of the frame's sky colour ``ref``; they also count as bright (uint8 0/1 planes)."""
    h, w = tex.shape
    for i in range(h):
        for j in range(w):
            if cand[i, j] or tex[i, j] >= tex_max or feat[F_U, i, j] <= -below:
                continue
            if _near_ref(lab, i, j, ref, dist_max):
                cand[i, j] = 1
                bright[i, j] = 1
