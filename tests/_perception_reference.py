"""Plain-NumPy reference of the classical segmenter (slow, written from the formulas, no numba).

It follows segment.py's documented rules step by step with whole-array operations, using
features.py for the colour indices and gradient energy and OpenCV's connected components for
the sky flood fill, so the kernels can be checked against an independent implementation.
"""

import math

import cv2
import numpy as np

from tinyloc.classes import BUILDING, GRASS, NUM_CLASSES, ROAD, SIDEWALK, SKY, TREE
from tinyloc.perception.crown_model import load_crown_model
from tinyloc.perception.features import box_mean, exg_minus_exr, gradient_energy, hsv_saturation_value


def _lab_dist(x, c):
    """The facade rule's colour distance (Lab, lightness at half weight)."""
    x = np.asarray(x, float)
    return 0.5 * abs(x[0] - c[0]) + abs(x[1] - c[1]) + abs(x[2] - c[2])


def _ref_lab_dist(x, ref, l_weight):
    x = np.asarray(x, float)
    return abs(x[0] - ref[0]) * l_weight + abs(x[1] - ref[1]) + abs(x[2] - ref[2])


def _base_band_reference(lab, labels, exgr, ref, p, ground, hr, j, top):
    """Row below a facade's base band starting at row ``top`` of column j (the carry's colour stop), or None.

    Written from the rule in segment.py: the band is the run of pixels below the mixed pixel at ``top``
    that are ground, not green (ExG - ExR < green0), not yellowish (with soil_b > 0, b* at most soil_b
    above the robot's surface's) and unlike the robot's surface, and within wall_dist
    of the mean colour of its first two; at least two such pixels; it must stand on two ground pixels,
    the second unlike the band's colour; and its top's depth below the horizon must be at least
    (1 - wall_base) of its bottom's (boundaries at half rows) and at least 6 rows.
    """
    h = labels.shape[0]
    ok = [labels[i, j] in ground and exgr[i, j] < p.green0 and (p.soil_b <= 0 or lab[i, j, 2] - ref[2] <= p.soil_b)
          and _ref_lab_dist(lab[i, j], ref, p.ref_l_weight) >= p.wall_ground for i in range(h)]
    if top + 4 >= h or not (ok[top + 1] and ok[top + 2]):
        return None
    c = lab[top + 1:top + 3, j].astype(float).mean(axis=0)
    end = top + 3
    while end < h - 1 and ok[end] and _lab_dist(lab[end, j], c) <= p.wall_dist:
        end += 1
    if end >= h - 1 or labels[end, j] not in ground or labels[end + 1, j] not in ground:
        return None
    if _lab_dist(lab[end + 1, j], c) <= p.wall_dist:
        return None
    if (top - 0.5 - hr) < 6.0 or (top - 0.5 - hr) < (1 - p.wall_base) * (end - 0.5 - hr):
        return None
    return end


def _dark_gap_reference(lab, labels, ground, hr, c0, p, j, top):
    """Row below the dark gap under an object starting at row ``top`` of column j (the carry's colour stop),
    or None.

    Written from the rule in segment.py (``wall_dark``): after an optional mixed first pixel (ground, lighter
    than the limit), at least two ground pixels no lighter than wall_dark x the facade's lightness ``c0``;
    the two pixels below them ground and at least 10 (Lab L) lighter than the gap's mean; the gap's top at
    least 2 rows below the horizon and at least 0.2 of its bottom's depth (at most 0.8 of the camera's
    height tall; boundaries at half rows).
    """
    h = labels.shape[0]
    lim = p.wall_dark * c0
    start = top + 1 if (top + 1 < h and lab[top, j, 0] > lim and labels[top, j] in ground) else top
    end = start
    while end < h - 2 and labels[end, j] in ground and lab[end, j, 0] <= lim:
        end += 1
    if end - start < 2 or end >= h - 2:
        return None
    mean = float(lab[start:end, j, 0].astype(float).mean())
    if any(labels[q, j] not in ground or lab[q, j, 0] < mean + 10.0 for q in (end, end + 1)):
        return None
    depth = top - 0.5 - hr
    if depth < 2.0 or depth < 0.2 * (end - 0.5 - hr):
        return None
    return end


def _band_goes_on(lab, labels, hrow, bands, p, ground, end, step):
    """Whether the base band of column ``end`` shows on the ground past the wall's side: the first column in
    direction ``step`` whose horizon pixel is not building has the band's colour (within wall_dist of the
    mean of its first two pixels) on ground in at least half of the band's rows; None when no such column
    is seen (the wall reaches the image's edge)."""
    h, w = labels.shape
    _, top, bottom = bands[end]
    c = lab[top + 1:top + 3, end].astype(float).mean(axis=0)
    k = end + step
    for _ in range(w):
        if not 0 <= k < w:
            return None
        r = int(math.floor(hrow[k]))
        if not (0 <= r < h and labels[r, k] == BUILDING):
            break
        k += step
    else:
        return None
    if not 0 <= k < w:
        return None
    rows = range(top + 1, bottom)
    same = sum(1 for i in rows if labels[i, k] in ground and _lab_dist(lab[i, k], c) <= p.wall_dist)
    return 2 * same >= len(rows)


def crown_features_reference(bgr, g01, s, v, exgr, u, sky):
    """The crown model's feature planes (crown_model.FEATURES order) from their formulas, with OpenCV's
    Laplacian (ksize=1, replicated border) and area resize as the independent pieces; ``bgr`` is the
    full frame (the fine-texture raster is made from it at twice the segmentation size)."""
    h, w = g01.shape
    dx = np.zeros_like(g01)
    dy = np.zeros_like(g01)
    dx[:, 1:-1] = (g01[:, 2:] - g01[:, :-2]) * 0.5
    dy[1:-1] = (g01[2:] - g01[:-2]) * 0.5
    jxx, jyy, jxy, ajxy = (box_mean(a, 9) for a in (dx * dx, dy * dy, dx * dy, np.abs(dx * dy)))
    tr = jxx + jyy + 1e-6
    coh = np.sqrt((jxx - jyy) ** 2 + 4 * jxy ** 2) / tr
    axis = ajxy / tr
    vert = jxx / tr
    en = np.sqrt(tr)
    var9 = np.maximum(box_mean(g01 * g01, 9) - box_mean(g01, 9) ** 2, 0.0)
    big = cv2.resize(bgr, (2 * w, 2 * h), interpolation=cv2.INTER_AREA).astype(np.float64).sum(axis=2) / 765.0
    lap = np.abs(cv2.Laplacian(big, cv2.CV_64F, ksize=1, borderType=cv2.BORDER_REPLICATE))
    fine = box_mean(lap.reshape(h, 2, w, 2).mean(axis=(1, 3)), 5)
    coarse = box_mean(np.abs(cv2.Laplacian(g01, cv2.CV_64F, ksize=1, borderType=cv2.BORDER_REPLICATE)), 5)
    fr = fine / (fine + coarse + 1e-3)
    planes = [v, s, exgr, u, var9, coh, axis, fr, box_mean(exgr, 9), box_mean(s, 9), box_mean(v, 15), box_mean(s, 15),
              box_mean(s, 31), box_mean(coh, 15), box_mean(coh, 31), box_mean(axis, 15), box_mean(vert, 15),
              box_mean(fine, 15), box_mean(fr, 15), box_mean(fr, 31), np.log(en + 0.01), box_mean(en, 15),
              box_mean(1.0 - sky, 9)]
    return np.stack(planes)


def _sig(x):
    return 1.0 / (1.0 + np.exp(-np.clip(x, -60, 60)))


def segment_reference(bgr, p, hrow=None):
    """(probs (C, h, w), labels (h, w)) for one BGR frame with SegmentParams ``p``."""
    H, W = bgr.shape[:2]
    w = min(p.width, W)
    h = max(8, int(round(H * w / W)))
    small = bgr if (w, h) == (W, H) else cv2.resize(bgr, (w, h), interpolation=cv2.INTER_AREA)
    lab = cv2.cvtColor(small, cv2.COLOR_BGR2Lab).astype(np.float64)
    if hrow is None:
        hrow = np.full(w, p.horizon_frac * h - 0.5)
    s, v = hsv_saturation_value(small)
    exgr = exg_minus_exr(small)
    bstar = lab[..., 2] - 128.0
    gray = small.astype(np.float64).sum(axis=2) / 3.0
    tx, ty = gradient_energy(gray, p.tex_window)
    tex = tx + ty
    u = (hrow[None, :] - np.arange(h)[:, None]) / h
    bright = ((v > p.sky_v) & (s < p.sky_s)) | ((bstar < -p.sky_blue) & (v > p.sky_v2))
    cand = bright & (tex < p.sky_tex) & (u > -p.sky_below)
    if p.sky_ref_dist > 0:  # overcast skies: the top rows' colour, unless it goes on below the horizon
        rows = max(1, int(round(p.sky_ref_rows * h)))
        band = (tex[:rows] < p.sky_tex) & (u[:rows] > 0)
        if band.any():
            px = lab[:rows][band]
            srt = np.sort(px, axis=0)
            sref = srt[(len(srt) + 1) // 2 - 1]
            dist_s = 0.5 * np.abs(lab[..., 0] - sref[0]) + np.abs(lab[..., 1] - sref[1]) + np.abs(lab[..., 2] - sref[2])
            near = dist_s < p.sky_ref_dist
            r = np.floor(hrow).astype(int) + 1
            okc = (r >= 0) & (r + 3 <= h)
            hits = [np.sum(near[r[j]:r[j] + 3, j]) * 2 > 3 for j in range(w) if okc[j]]
            share_below = np.mean(hits) if hits else 1.0
            if (band.sum() >= p.sky_ref_share * rows * w and sref[1] - 128 < p.sky_ref_warm
                    and sref[2] - 128 < p.sky_ref_warm and share_below < p.sky_ref_below):
                add = near & (tex < p.sky_tex) & (u > -p.sky_below)
                cand = cand | add
                bright = bright | add
    n, comp = cv2.connectedComponents(cand.astype(np.uint8), connectivity=4)
    top = np.unique(comp[0][cand[0]])
    sky = np.isin(comp, top[top > 0])
    g01 = gray / 255.0
    brightmix = box_mean((bright & ~sky).astype(float), p.mix_window)
    var = np.maximum(box_mean(g01 * g01, p.mix_window) - box_mean(g01, p.mix_window) ** 2, 0.0)
    r0, r1, c0, c1 = int(h * 0.85), h, int(w * 0.35), max(int(w * 0.65), int(w * 0.35) + 1)
    patch = lab[r0:r1, c0:c1].reshape(-1, 3)
    srt = np.sort(patch, axis=0)
    ref = srt[(len(srt) + 1) // 2 - 1]  # lower median
    green = _sig((exgr - p.green0) / p.green_w)
    below = _sig((-u - p.ground_u0) / p.ground_w)
    smooth = _sig((p.smooth_tex - tex) / p.smooth_w)
    dist = np.abs(lab[..., 0] - ref[0]) * p.ref_l_weight + np.abs(lab[..., 1] - ref[1]) + np.abs(lab[..., 2] - ref[2])
    on = _sig((p.ref_dist - dist) / p.ref_w)
    # vegetation on the ground: green, or (soil rule) b* well above the robot's surface's
    gg = np.maximum(green, _sig((lab[..., 2] - ref[2] - p.soil_b) / p.soil_w)) if p.soil_b > 0 else green
    gg = np.where(below > 0, gg, green)
    robot_on = p.robot_on
    if p.surface_auto > 0:  # which paved surface is under the robot: the darker one is the road
        db = lab[..., 2] - ref[2]
        other = (u < p.surface_u) & (tex < p.smooth_tex) & (exgr < p.green0) & (dist > p.ref_dist)
        if p.soil_b > 0:
            other &= db <= p.soil_b
        if other.sum() > 0 and other.sum() >= p.surface_share * w * h:
            srt = np.sort(lab[..., 0][other])
            med = srt[(len(srt) + 1) // 2 - 1]
            # asphalt is the darkest paving: clearly darker paving in view means the patch is not asphalt
            dark_ok = p.surface_dark <= 0 or np.count_nonzero(srt <= ref[0] - p.surface_auto) < p.surface_dark * len(srt)
            if med >= ref[0] + p.surface_auto and dark_ok:
                robot_on = "road"
            elif med <= ref[0] - p.surface_auto:
                robot_on = "sidewalk"
    if p.surface_joints > 0:  # also on the road when the patch under the robot shows no paving joints
        gxr = np.zeros_like(g01)
        gyr = np.zeros_like(g01)
        gxr[:, 1:-1] = np.abs(g01[:, 2:] - g01[:, :-2]) * 0.5
        gyr[1:-1] = np.abs(g01[2:] - g01[:-2]) * 0.5
        if np.mean((gxr + gyr)[r0:r1, c0:c1] > 0.02) < p.surface_joints:
            robot_on = "road"
    model = load_crown_model(p.crown_model)
    if model is None:
        crown = _sig((brightmix - p.crown_bright) / 0.05) * _sig((var - p.crown_var) / p.crown_var_w)
    else:
        tf = crown_features_reference(bgr, g01, s, v, exgr, u, sky)
        if model.n_extra:  # the colour planes (and a context model's), tinyloc/perception/crown_features.py
            from test_perception_crown import colour_features_reference, context_planes_reference
            tf = np.concatenate([tf, colour_features_reference(small, sky, tf, lab8=True)])
        m = (~sky) & (u > p.crown_u_min)

        def crown_map(mdl, planes):
            pt = np.where(m, np.maximum(_sig(mdl.score(np.moveaxis(planes, 0, -1))), green), 0.0)
            num, den = box_mean(pt, p.crown_smooth), box_mean(m.astype(float), p.crown_smooth)
            return np.where(den > 1e-6, num / np.where(den > 1e-6, den, 1.0), 0.0)

        if model.first is not None:  # a context model: the first score's map, then its layout planes
            tf = np.concatenate([tf, context_planes_reference(crown_map(model.first, tf))])
        crown = crown_map(model, tf)
    here = below * (1 - gg) * (p.here_weight * on * (0.5 + 0.5 * smooth) + p.ground_floor)
    other = below * (1 - gg) * (1 - on) * smooth * p.other_weight
    sc = np.zeros((NUM_CLASSES, h, w))
    sc[ROAD], sc[SIDEWALK] = (here, other) if robot_on == "road" else (other, here)
    sc[SKY] = np.where(sky, 2.0, 0.0)
    sc[GRASS] = below * gg * p.grass_weight
    if model is None:
        sc[BUILDING] = (1 - below) * (1 - green) * p.building_weight * (1 - crown)
        sc[TREE] = green * p.tree_weight * (1 - below * p.tree_low) + (1 - below) * crown * p.crown_weight
    else:  # tree above the horizon where crown > crown_threshold
        odds = p.crown_threshold / (1 - p.crown_threshold)
        sc[BUILDING] = (1 - below) * p.building_weight * (1 - crown)
        sc[TREE] = (1 - below) * p.building_weight * crown / odds + below * green * p.tree_weight * (1 - p.tree_low)
    labels = sc.argmax(axis=0).astype(np.uint8)
    if p.ground_power != 1.0:  # ground probabilities re-split by their scores' power, same sum, labels kept
        gsum = sc[ROAD] + sc[SIDEWALK] + sc[GRASS]
        pw = sc[[ROAD, SIDEWALK, GRASS]] ** p.ground_power
        psum = pw.sum(axis=0)
        sc[[ROAD, SIDEWALK, GRASS]] = np.where(gsum > 0, pw * gsum / np.where(psum > 0, psum, 1.0), 0.0)
    tot = sc.sum(axis=0)
    probs = np.where(tot > 0, sc / np.where(tot > 0, tot, 1.0), 0.0)
    # facades carried down across the horizon
    gy = np.zeros_like(g01)
    gy[1:-1] = np.abs(g01[2:] - g01[:-2]) * 0.5
    ground = {ROAD, SIDEWALK, GRASS, 7, 8}
    bands = {}  # column -> (carry start, band top, band bottom)
    for j in range(w):
        r = int(math.floor(hrow[j]))
        if r < 3 or r >= h - 1:
            continue
        from_above = False
        if labels[r, j] != BUILDING:
            # wall_reach: the facade may start up to wall_reach rows higher, only ground pixels between
            starts = [k for k in range(r - 1, max(r - p.wall_reach, 3) - 1, -1)
                      if labels[k, j] == BUILDING and all(labels[q, j] in ground for q in range(k + 1, r + 1))]
            if not starts:
                continue
            r, from_above = starts[0], True
        if p.wall_median:  # the facade's colour where it meets the ground: the lowest three building pixels
            s = r
            while s + 1 < h and labels[s + 1, j] == BUILDING:
                s += 1
            c = np.median(lab[s - 2:s + 1, j], axis=0)
        else:
            c = lab[r - 2:r + 1, j].mean(axis=0)
        carry, foot, stop, by_colour = [], False, h, False
        for i in range(r + 1, h):
            if labels[i, j] == BUILDING:
                continue
            if labels[i, j] not in ground:
                foot, stop = True, i
                break
            if _lab_dist(lab[i, j], c) > p.wall_dist or gy[i, j] > p.wall_edge:
                foot, stop, by_colour = True, i, True
                break
            carry.append(i)
        # the first pixel like the robot's surface ends the carry, unless (wall_base) the colour carry past
        # it ends on a thin base band that stands on other ground
        on_ref = [i for i in carry if _ref_lab_dist(lab[i, j], ref, p.ref_l_weight) < p.wall_ground]
        # wall_dark: a colour stop that is the dark gap under an object carries on through the gap
        gap_end = _dark_gap_reference(lab, labels, ground, hrow[j], c[0], p, j, stop) \
            if p.wall_dark > 0 and by_colour and not on_ref else None
        if gap_end is not None:
            carry += list(range(stop, gap_end))
            by_colour = False
        band_end = _base_band_reference(lab, labels, exgr, ref, p, ground, hrow[j], j, stop) \
            if p.wall_base > 0 and by_colour else None
        if band_end is not None:
            bands[j] = (r, stop, band_end)
        if on_ref:
            carry, foot = [i for i in carry if i < on_ref[0]], False
        if from_above and not foot:  # started above the horizon: kept only down to a visible foot
            continue
        for i in carry:
            labels[i, j] = BUILDING
            probs[:, i, j] = 0.0
            probs[BUILDING, i, j] = 1.0
    # base bands, by runs of neighbouring columns: kept unless the band's colour goes on past the wall's side
    cols = sorted(bands)
    runs = [[k] for k in cols[:1]]
    for k in cols[1:]:
        if k == runs[-1][-1] + 1:
            runs[-1].append(k)
        else:
            runs.append([k])
    for run in runs:
        sides = (_band_goes_on(lab, labels, hrow, bands, p, ground, run[0], -1),
                 _band_goes_on(lab, labels, hrow, bands, p, ground, run[-1], 1))
        if True in sides or sides == (None, None):  # goes on beside the wall, or neither side seen
            continue
        for k in run:
            start, _, bottom = bands[k]
            for i in range(start + 1, bottom):
                if labels[i, k] != BUILDING:
                    labels[i, k] = BUILDING
                    probs[:, i, k] = 0.0
                    probs[BUILDING, i, k] = 1.0
    # sky seen through crowns: sky pixels whose window is mostly tree
    if model is not None and p.crown_sky_share > 0:
        share = box_mean((labels == TREE).astype(float), p.crown_sky_window)
        gap = (labels == SKY) & (share > p.crown_sky_share)
        probs[:, gap] = 0.0
        probs[TREE, gap] = 1.0
        labels[gap] = TREE
    # sky-gap model: remaining sky pixels near a crown whose gap score is high enough are tree
    gaps = load_crown_model(p.gap_model, gaps=True, base=model.features) if model is not None else None
    if gaps is not None:
        istree = (labels == TREE).astype(float)
        f = np.concatenate([tf, np.stack([box_mean(istree, 9), box_mean(istree, 15), tex, crown])])
        z = gaps.score(np.moveaxis(f, 0, -1))
        gap = (labels == SKY) & (z > math.log(p.gap_threshold / (1 - p.gap_threshold))) & (f[-3] >= p.gap_near)
        probs[:, gap] = 0.0
        probs[TREE, gap] = 1.0
        labels[gap] = TREE
    # poles (thin vertical lines crossing the horizon) and fences (building runs too low for a house)
    def runs(col_mask):
        i = h - 1
        while i >= 0:
            if col_mask[i]:
                i1 = i
                while i >= 0 and col_mask[i]:
                    i -= 1
                yield i + 1, i1
            else:
                i -= 1

    def put(i, j, k):
        probs[:, i, j] = 0.0
        probs[k, i, j] = 1.0
        labels[i, j] = k

    if p.pole_contrast > 0:
        g = g01
        dl = np.zeros_like(g)
        dr = np.zeros_like(g)
        dl[:, 2:-2] = g[:, 2:-2] - g[:, :-4]
        dr[:, 2:-2] = g[:, 2:-2] - g[:, 4:]
        c = p.pole_contrast
        mark = (((dl > c) & (dr > c)) | ((dl < -c) & (dr < -c))) & (labels != SKY)
        mark[:, :2] = False
        mark[:, -2:] = False
        min_run = max(2, int(p.pole_run * h + 0.5))
        for j in range(w):
            for i0, i1 in list(runs(mark[:, j])):
                if i1 - i0 + 1 >= min_run and i0 < hrow[j] < i1:
                    for q in range(i0, i1 + 1):
                        put(q, j, 5)
    if p.fence_top > 0:
        for j in range(w):
            for i0, i1 in list(runs(labels[:, j] == BUILDING)):
                above = labels[i0 - 1, j] if i0 > 0 else SKY
                if i1 > hrow[j] and hrow[j] - i0 < p.fence_top * h and above in (SKY, TREE):
                    for q in range(i0, i1 + 1):
                        put(q, j, 6)
    return probs, labels
