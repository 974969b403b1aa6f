"""Numba kernels of the synthetic camera: tile culling and the per-pixel ray caster.

Kernels take prepared contiguous arrays and write into caller-owned buffers;
they never validate, allocate large arrays or log (the wrapper in
:mod:`tinyloc.sim.render` does that). Column layouts of the object arrays are
those of :mod:`tinyloc.sim.world`. Colours are linear RGB; the kernel tone-maps
through a caller-supplied lookup table into BGR uint8.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from .._numba import JIT, PJIT

# object kinds in the per-frame object list
OBJ_BOX, OBJ_CYL, OBJ_SPH = 0, 1, 2
HIT_SKY, HIT_GROUND = -2, -1

# ground material indices (must match world.GROUND_MATERIALS)
(G_ROUGH, G_ASPHALT, G_MARKING, G_PAVING, G_CURB, G_GRASS, G_GRAVEL, G_LOT, G_LOTLINE, G_WATER, G_BED,
 G_CROSS) = range(12)
# box materials (must match world.BM_*)
BM_PLASTER, BM_BRICK, BM_GLASS, BM_WALL, BM_FENCE_SLAT, BM_FENCE_MESH, BM_CAR, BM_CABIN, BM_HEDGE, BM_ROOF = range(10)
SKY_CLASS, NEAR_T = 9, 0.05


@njit(**JIT)
def _hash3(ix, iy, iz):
    h = (ix * 374761393 + iy * 668265263 + iz * 2246822519) & 0xFFFFFFFF
    h = ((h ^ (h >> 13)) * 1274126177) & 0xFFFFFFFF
    h = h ^ (h >> 16)
    return h * (1.0 / 4294967296.0)


@njit(**JIT)
def _vnoise2(x, y, seed):
    """Value noise in [0, 1) with smooth interpolation, unit lattice."""
    fx, fy = math.floor(x), math.floor(y)
    ix, iy = np.int64(fx), np.int64(fy)
    tx, ty = x - fx, y - fy
    tx = tx * tx * (3.0 - 2.0 * tx)
    ty = ty * ty * (3.0 - 2.0 * ty)
    a = _hash3(ix, iy, seed)
    b = _hash3(ix + 1, iy, seed)
    c = _hash3(ix, iy + 1, seed)
    d = _hash3(ix + 1, iy + 1, seed)
    return (a + (b - a) * tx) * (1.0 - ty) + (c + (d - c) * tx) * ty


@njit(**JIT)
def _vnoise3(x, y, z, seed):
    fx, fy, fz = math.floor(x), math.floor(y), math.floor(z)
    ix, iy, iz = np.int64(fx), np.int64(fy), np.int64(fz)
    tx, ty, tz = x - fx, y - fy, z - fz
    tx = tx * tx * (3.0 - 2.0 * tx)
    ty = ty * ty * (3.0 - 2.0 * ty)
    tz = tz * tz * (3.0 - 2.0 * tz)
    s = np.int64(seed)
    v0 = (_hash3(ix, iy, iz + s) * (1 - tx) + _hash3(ix + 1, iy, iz + s) * tx) * (1 - ty) + \
         (_hash3(ix, iy + 1, iz + s) * (1 - tx) + _hash3(ix + 1, iy + 1, iz + s) * tx) * ty
    v1 = (_hash3(ix, iy, iz + 1 + s) * (1 - tx) + _hash3(ix + 1, iy, iz + 1 + s) * tx) * (1 - ty) + \
         (_hash3(ix, iy + 1, iz + 1 + s) * (1 - tx) + _hash3(ix + 1, iy + 1, iz + 1 + s) * tx) * ty
    return v0 * (1 - tz) + v1 * tz


@njit(**PJIT)
def cull_cones(axes_base, cos_h, sin_h, R, u_obj, cos_r, sin_r, parent_obj, parent_n, parent_of, out_obj, out_n):
    """For each view cone (tile), list the objects of its parent list whose bounding sphere meets the cone.

    axes_base (T,3) unit cone axes (base frame), cos_h/sin_h (T,) of the half angles; R (3,3) world_from_base;
    u_obj (N,3) unit directions camera -> object centre (world); cos_r/sin_r (N,) of the objects' angular
    radii (cos_r = -2 marks an object that contains the camera: always listed);
    parent_obj (P, CAPP) / parent_n (P,) candidate lists, parent_of (T,) the parent of each cone;
    out_obj (T, CAP) int32 / out_n (T,) int32 outputs. Lists keep their parent's order (nearest first).
    """
    cap = out_obj.shape[1]
    for ti in prange(axes_base.shape[0]):
        ab = axes_base[ti]
        ax = R[0, 0] * ab[0] + R[0, 1] * ab[1] + R[0, 2] * ab[2]
        ay = R[1, 0] * ab[0] + R[1, 1] * ab[1] + R[1, 2] * ab[2]
        az = R[2, 0] * ab[0] + R[2, 1] * ab[1] + R[2, 2] * ab[2]
        ch, sh = cos_h[ti], sin_h[ti]
        pa = parent_of[ti]
        n = 0
        for k in range(parent_n[pa]):
            j = parent_obj[pa, k]
            cr = cos_r[j]
            ok = cr < -1.5
            if not ok:
                # angle(u, a) <= h + r  <=>  cos(angle) >= cos(h + r)   (h + r < pi here)
                c = u_obj[j, 0] * ax + u_obj[j, 1] * ay + u_obj[j, 2] * az
                ok = c >= ch * cr - sh * sin_r[j]
            if ok and n < cap:
                out_obj[ti, n] = j
                n += 1
        out_n[ti] = n


@njit(**JIT)
def _isect_box(ox, oy, oz, dx, dy, dz, b, tmax):
    c, s = b[14], b[15]
    px, py = ox - b[0], oy - b[1]
    lx, ly = c * px + s * py, -s * px + c * py
    ldx, ldy = c * dx + s * dy, -s * dx + c * dy
    t0, t1 = NEAR_T, tmax
    # x slab
    if abs(ldx) < 1e-12:
        if lx < -b[2] or lx > b[2]:
            return -1.0, -1.0
    else:
        ta, tb = (-b[2] - lx) / ldx, (b[2] - lx) / ldx
        if ta > tb:
            ta, tb = tb, ta
        t0, t1 = max(t0, ta), min(t1, tb)
    if abs(ldy) < 1e-12:
        if ly < -b[3] or ly > b[3]:
            return -1.0, -1.0
    else:
        ta, tb = (-b[3] - ly) / ldy, (b[3] - ly) / ldy
        if ta > tb:
            ta, tb = tb, ta
        t0, t1 = max(t0, ta), min(t1, tb)
    if abs(dz) < 1e-12:
        if oz < b[5] or oz > b[6]:
            return -1.0, -1.0
    else:
        ta, tb = (b[5] - oz) / dz, (b[6] - oz) / dz
        if ta > tb:
            ta, tb = tb, ta
        t0, t1 = max(t0, ta), min(t1, tb)
    if t0 > t1:
        return -1.0, -1.0
    return t0, t1


@njit(**JIT)
def _box_local(x, y, z, b):
    """Hit point in box coordinates, face axis (0 x, 1 y, 2 z) and side sign."""
    c, s = b[14], b[15]
    px, py = x - b[0], y - b[1]
    lx, ly = c * px + s * py, -s * px + c * py
    ex = abs(abs(lx) - b[2])
    ey = abs(abs(ly) - b[3])
    ez = abs(z - b[6])
    ax = 0
    e = ex
    if ey < e:
        ax, e = 1, ey
    if ez < e:
        ax = 2
    sg = 1.0
    if ax == 0:
        sg = 1.0 if lx > 0 else -1.0
    elif ax == 1:
        sg = 1.0 if ly > 0 else -1.0
    return lx, ly, ax, sg


@njit(**JIT)
def _fence_gap(b, lx, ly, z):
    """True where a see-through fence has a gap at this surface point."""
    m = b[8]
    if m == BM_FENCE_SLAT:
        if z > b[6] - 0.12 or (z > 0.18 and z < 0.26):
            return False  # top and bottom rails
        u = (lx + b[2]) / b[12]
        return u - math.floor(u) > b[13]
    if m == BM_FENCE_MESH:
        if z > b[6] - 0.06:
            return False
        u = (lx + b[2]) / 2.5  # posts every 2.5 m
        if u - math.floor(u) < 0.03:
            return False
        a = (lx + z) / b[12]
        bb = (lx - z) / b[12]
        return (a - math.floor(a) > 0.12) and (bb - math.floor(bb) > 0.12)
    return False


@njit(**JIT)
def _isect_cyl(ox, oy, oz, dx, dy, dz, cy, tmax):
    px, py = ox - cy[0], oy - cy[1]
    a = dx * dx + dy * dy
    r = cy[2]
    best = -1.0
    if a > 1e-12:
        bq = px * dx + py * dy
        cq = px * px + py * py - r * r
        disc = bq * bq - a * cq
        if disc >= 0.0:
            sq = math.sqrt(disc)
            t = (-bq - sq) / a
            if t > NEAR_T and t < tmax:
                z = oz + t * dz
                if z >= cy[3] and z <= cy[4]:
                    best = t
    if abs(dz) > 1e-12:
        t = (cy[4] - oz) / dz  # top cap
        if t > NEAR_T and t < tmax and (best < 0 or t < best):
            qx, qy = px + t * dx, py + t * dy
            if qx * qx + qy * qy <= r * r:
                best = t
    return best


@njit(**JIT)
def _isect_sph(ox, oy, oz, dx, dy, dz, sp, tmax, seed):
    """Spheroid with a ragged, see-through outline for foliage; returns t or -1."""
    k = sp[3] / sp[4]
    px, py, pz = ox - sp[0], oy - sp[1], (oz - sp[2]) * k
    ez = dz * k
    a = dx * dx + dy * dy + ez * ez
    bq = px * dx + py * dy + pz * ez
    cq = px * px + py * py + pz * pz - sp[3] * sp[3]
    disc = bq * bq - a * cq
    if disc < 0.0:
        return -1.0
    sq = math.sqrt(disc)
    for side in range(2):
        t = (-bq - sq) / a if side == 0 else (-bq + sq) / a
        if t <= NEAR_T or t >= tmax:
            continue
        if sp[6] != 0:  # not foliage: solid
            return t
        x, y, z = ox + t * dx, oy + t * dy, oz + t * dz
        n = _vnoise3(x * 1.7, y * 1.7, z * 1.7, seed) * 0.65 + _vnoise3(x * 4.1, y * 4.1, z * 4.1, seed + 7) * 0.35
        # normalised radius of the hit as seen from the ray: holes grow towards the silhouette
        rr = 1.0 - min(1.0, disc / (a * sp[3] * sp[3]))
        if n > 0.28 + 0.5 * rr:
            return t
    return -1.0


@njit(**JIT)
def _sky(dx, dy, dz, sun, p_sky, t_s):
    """Sky colour (linear RGB) along a direction; p_sky = (cloud cover, cloud scale, seed, haze)."""
    e = max(dz, 0.0)
    g = 1.0 - math.exp(-e * 4.0)
    r0, g0, b0 = 0.62, 0.70, 0.80  # horizon
    r1, g1, b1 = 0.16, 0.30, 0.62  # zenith
    r = r0 + (r1 - r0) * g
    gg = g0 + (g1 - g0) * g
    b = b0 + (b1 - b0) * g
    cs = dx * sun[0] + dy * sun[1] + dz * sun[2]
    if cs > 0:
        glow = cs ** 48 * 1.4 + cs ** 6 * 0.12
        r += glow
        gg += glow * 0.92
        b += glow * 0.75
    if dz > 0.015:
        sc = p_sky[1]
        u = dx / dz * sc + t_s * 0.004
        v = dy / dz * sc
        seed = np.int64(p_sky[2])
        n = _vnoise2(u, v, seed) * 0.55 + _vnoise2(u * 2.3, v * 2.3, seed + 1) * 0.3 + \
            _vnoise2(u * 5.1, v * 5.1, seed + 2) * 0.15
        c = (n - (1.0 - p_sky[0])) / 0.22
        if c > 0:
            c = min(c, 1.0) * min(1.0, dz * 6.0)
            shade = 0.78 + 0.3 * _vnoise2(u * 3.0 + 5.0, v * 3.0, seed + 3)
            r += (shade - r) * c
            gg += (shade - gg) * c
            b += (shade * 1.03 - b) * c
    return r, gg, b


@njit(**JIT)
def _light_at(shadow, s_x0, s_y1, s_res, x, y):
    """Ground light fraction 0..1 at (x, y), bilinear between shadow-raster cell centres."""
    fc = (x - s_x0) / s_res - 0.5
    fr = (s_y1 - y) / s_res - 0.5
    sc = np.int64(math.floor(fc))
    sr = np.int64(math.floor(fr))
    if sr < 0 or sr >= shadow.shape[0] - 1 or sc < 0 or sc >= shadow.shape[1] - 1:
        return 1.0
    ac, ar = fc - sc, fr - sr
    return ((shadow[sr, sc] * (1 - ac) + shadow[sr, sc + 1] * ac) * (1 - ar) +
            (shadow[sr + 1, sc] * (1 - ac) + shadow[sr + 1, sc + 1] * ac) * ar) * (1.0 / 255.0)


@njit(**PJIT)
def render_tiles(rays, vig, R, org, tile_obj, tile_n, tile_px, boxes, cyls, sph, objs,
                 gmat, g_x0, g_y1, g_res, gcolor, gclass, shadow, s_x0, s_y1, s_res,
                 grid_c, grid_s, sun, light, p_sky, t_s, max_t, haze_m, lut, gains, saturation, noise_sigma,
                 frame_seed, pix_ang, out_bgr, out_lab):
    """Ray-cast every pixel; writes BGR uint8 (H, W, 3) and class labels (H, W).

    rays (H, W, 3) base-frame unit rays; vig (H, W) vignetting gain; R, org world_from_base rotation and the
    camera centre; tile_obj/tile_n from :func:`cull_tiles`; tile_px (T, 4) pixel ranges (r0, r1, c0, c1);
    boxes carry two extra columns (cos, sin of the yaw); objs (N, 2) int (kind, row); gmat ground materials
    (north-up raster), gcolor/gclass per material;
    shadow light fraction raster (uint8); grid_c/grid_s rotation of the street grid (paving joints);
    sun unit vector; light (sun r, g, b, ambient r, g, b); lut (L,) tone curve to uint8 over linear 0..2;
    gains (3,) exposure x white balance (r, g, b); saturation 1 = as shaded, 0 = gray.
    """
    H, W = out_lab.shape
    gh, gw = gmat.shape
    nl = lut.shape[0]
    for ti in prange(tile_px.shape[0]):
        r0, r1, c0, c1 = tile_px[ti, 0], tile_px[ti, 1], tile_px[ti, 2], tile_px[ti, 3]
        nobj = tile_n[ti]
        for v in range(r0, r1):
            for u in range(c0, c1):
                bx, by, bz = rays[v, u, 0], rays[v, u, 1], rays[v, u, 2]
                dx = R[0, 0] * bx + R[0, 1] * by + R[0, 2] * bz
                dy = R[1, 0] * bx + R[1, 1] * by + R[1, 2] * bz
                dz = R[2, 0] * bx + R[2, 1] * by + R[2, 2] * bz
                best = max_t
                hit = HIT_SKY
                if dz < -1e-9:
                    tg = -org[2] / dz
                    if tg < best:
                        best = tg
                        hit = HIT_GROUND
                for k in range(nobj):
                    j = tile_obj[ti, k]
                    kind = objs[j, 0]
                    row = objs[j, 1]
                    if kind == OBJ_BOX:
                        ta, tb = _isect_box(org[0], org[1], org[2], dx, dy, dz, boxes[row], best)
                        if ta > 0.0:
                            m = boxes[row, 8]
                            if m == BM_FENCE_SLAT or m == BM_FENCE_MESH:
                                x, y, z = org[0] + ta * dx, org[1] + ta * dy, org[2] + ta * dz
                                lx, ly, ax, sg = _box_local(x, y, z, boxes[row])
                                if ax != 2 and _fence_gap(boxes[row], lx, ly, z):
                                    continue
                            if ta < best:
                                best = ta
                                hit = j
                    elif kind == OBJ_CYL:
                        t = _isect_cyl(org[0], org[1], org[2], dx, dy, dz, cyls[row], best)
                        if t > 0.0 and t < best:
                            best = t
                            hit = j
                    else:
                        t = _isect_sph(org[0], org[1], org[2], dx, dy, dz, sph[row], best, row * 131 + 17)
                        if t > 0.0 and t < best:
                            best = t
                            hit = j
                # ---- shade
                if hit == HIT_SKY or hit >= 0:
                    sky0, sky1, sky2 = _sky(dx, dy, dz, sun, p_sky, t_s)
                else:
                    sky0, sky1, sky2 = 0.62, 0.70, 0.80
                cls = SKY_CLASS
                x, y, z = org[0] + best * dx, org[1] + best * dy, org[2] + best * dz
                amb = 1.0
                sunlit = 0.0
                if hit == HIT_SKY:
                    q0, q1, q2 = sky0, sky1, sky2
                else:
                    fog = 1.0 - math.exp(-best / haze_m)
                    if hit == HIT_GROUND:
                        foot = best * pix_ang / max(-dz, 0.02)  # ground footprint of one pixel (m)
                        jx, jy = x, y
                        if foot < 0.08:
                            # ragged material borders instead of the raster's stair steps, up close
                            jx += (_vnoise2(x * 11.0, y * 11.0, 41) - 0.5) * 0.09
                            jy += (_vnoise2(x * 11.0, y * 11.0, 42) - 0.5) * 0.09
                        gc = np.int64(math.floor((jx - g_x0) / g_res))
                        gr = np.int64(math.floor((g_y1 - jy) / g_res))
                        m = G_ROUGH
                        if gr >= 0 and gr < gh and gc >= 0 and gc < gw:
                            m = gmat[gr, gc]
                        cls = gclass[m]
                        cr, cg, cb = gcolor[m, 0], gcolor[m, 1], gcolor[m, 2]
                        f1 = _vnoise2(x * 9.0, y * 9.0, 11) if foot < 0.12 else 0.5
                        f2 = _vnoise2(x * 1.3, y * 1.3, 12)
                        f3 = _vnoise2(x * 0.15, y * 0.15, 13)
                        if m == G_GRASS or m == G_ROUGH:
                            f0 = _vnoise2(x * 23.0, y * 23.0, 14) if foot < 0.04 else 0.5
                            k = 0.55 + 0.35 * f0 + 0.45 * f1 + 0.35 * f2
                            yel = 0.25 * f3 + (0.25 if m == G_ROUGH else 0.0) * f2
                            cr = cr * k * (1.0 + 2.2 * yel)
                            cg = cg * k * (1.0 + 0.5 * yel)
                            cb = cb * k
                        elif m == G_WATER:
                            rz = -dz
                            fr = 0.04 + 0.6 * (1.0 - rz) ** 5
                            wr, wg, wb = _sky(dx + 0.04 * (f1 - 0.5), dy + 0.04 * (f2 - 0.5), -dz, sun, p_sky, t_s)
                            k = 0.8 + 0.3 * f2
                            cr = cr * k * (1 - fr) + wr * fr * 0.5
                            cg = cg * k * (1 - fr) + wg * fr * 0.5
                            cb = cb * k * (1 - fr) + wb * fr * 0.5
                        else:
                            k = 0.78 + 0.22 * f1 + 0.25 * f2 + 0.15 * f3
                            if m == G_PAVING and foot < 0.05:
                                gu = grid_c * x + grid_s * y
                                gv = -grid_s * x + grid_c * y
                                a1 = gu / 0.6 - math.floor(gu / 0.6)
                                a2 = gv / 0.6 - math.floor(gv / 0.6)
                                if a1 < 0.04 or a2 < 0.04:
                                    k *= 0.7
                                else:
                                    k *= 0.9 + 0.2 * _hash3(np.int64(math.floor(gu / 0.6)),
                                                            np.int64(math.floor(gv / 0.6)), 5)
                            elif m == G_ASPHALT or m == G_LOT:
                                k = 0.8 + 0.3 * f1 + 0.3 * f2 + 0.3 * (f3 - 0.5)
                            cr, cg, cb = cr * k, cg * k, cb * k
                        # shadow lookup
                        sunlit = _light_at(shadow, s_x0, s_y1, s_res, x, y) * max(sun[2], 0.0)
                    else:
                        kind = objs[hit, 0]
                        row = objs[hit, 1]
                        if kind == OBJ_BOX:
                            b = boxes[row]
                            cls = np.int64(b[7])
                            m = np.int64(b[8])
                            lx, ly, ax, sg = _box_local(x, y, z, b)
                            c, s = b[14], b[15]
                            if ax == 0:
                                nx, ny, nz = c * sg, s * sg, 0.0
                                w = ly + b[3]
                                fw = 2 * b[3]
                            elif ax == 1:
                                nx, ny, nz = -s * sg, c * sg, 0.0
                                w = lx + b[2]
                                fw = 2 * b[2]
                            else:
                                nx, ny, nz = 0.0, 0.0, 1.0
                                w = lx + b[2]
                                fw = 2 * b[2]
                            cr, cg, cb = b[9], b[10], b[11]
                            foot = best * pix_ang
                            n1 = _vnoise2(w * 1.1 + row, z * 1.1, 21)
                            if m == BM_PLASTER or m == BM_BRICK or m == BM_GLASS:
                                if ax == 2:
                                    k = 0.35 + 0.1 * n1
                                    cr, cg, cb = 0.12 * k * 3, 0.11 * k * 3, 0.1 * k * 3
                                else:
                                    k = 0.85 + 0.25 * n1
                                    if z < 0.5:
                                        k *= 0.7 + 0.6 * z
                                    if m == BM_BRICK and foot < 0.03:
                                        rowb = math.floor(z / 0.075)
                                        off = 0.5 * (rowb % 2)
                                        ub = w / 0.24 + off
                                        k *= 0.85 + 0.3 * _hash3(np.int64(rowb), np.int64(math.floor(ub)), row)
                                        if z / 0.075 - rowb < 0.12 or ub - math.floor(ub) < 0.05:
                                            k *= 1.25
                                    cr, cg, cb = cr * k, cg * k, cb * k
                                    p0, p1 = b[12], b[13]
                                    if m == BM_GLASS:
                                        a1 = w / p0 - math.floor(w / p0)
                                        a2 = z / p1 - math.floor(z / p1)
                                        if a1 > 0.06 and a2 > 0.12 and z > 0.4:
                                            cs = _hash3(np.int64(math.floor(w / p0)), np.int64(math.floor(z / p1)), row)
                                            fr = 0.35 + 0.3 * cs
                                            cr = cr * (1 - fr) + sky0 * fr * 0.8
                                            cg = cg * (1 - fr) + sky1 * fr * 0.8
                                            cb = cb * (1 - fr) + sky2 * fr * 0.8
                                    else:
                                        fl = math.floor(z / p1)
                                        a2 = z / p1 - fl
                                        nwin = max(1.0, math.floor((fw - 1.0) / p0))
                                        wu = (w - (fw - nwin * p0) * 0.5) / p0
                                        a1 = wu - math.floor(wu)
                                        if wu >= 0 and wu < nwin and a1 > 0.22 and a1 < 0.78 and a2 > 0.3 and \
                                                a2 < 0.85 and z < b[6] - 0.7 and z > 0.8:
                                            cs = _hash3(np.int64(math.floor(wu)), np.int64(fl), row + 99)
                                            if a1 < 0.26 or a1 > 0.74 or a2 < 0.34 or a2 > 0.81:
                                                cr, cg, cb = 0.5, 0.5, 0.48  # frame
                                            else:
                                                fr = 0.25 + 0.35 * cs
                                                g0 = 0.02 + 0.04 * cs
                                                cr = g0 * (1 - fr) + sky0 * fr * 0.6
                                                cg = g0 * (1 - fr) + sky1 * fr * 0.6
                                                cb = g0 * 1.2 * (1 - fr) + sky2 * fr * 0.6
                            elif m == BM_HEDGE:
                                hn = _vnoise3(x * 6.0, y * 6.0, z * 6.0, 31) * 0.6 + \
                                    _vnoise3(x * 15.0, y * 15.0, z * 15.0, 32) * 0.4
                                k = 0.45 + 1.1 * hn
                                cr, cg, cb = cr * k, cg * k, cb * k
                                amb = 0.7
                            elif m == BM_CAR or m == BM_CABIN:
                                if m == BM_CABIN and ax != 2 and z < b[6] - 0.06:
                                    u2 = w / fw
                                    if u2 > 0.08 and u2 < 0.92:
                                        fr = 0.3
                                        cr = 0.02 * (1 - fr) + sky0 * fr * 0.5
                                        cg = 0.02 * (1 - fr) + sky1 * fr * 0.5
                                        cb = 0.025 * (1 - fr) + sky2 * fr * 0.5
                                elif m == BM_CAR and ax != 2:
                                    if z < 0.35:
                                        cr, cg, cb = 0.02, 0.02, 0.02
                                    if ax == 1:
                                        for wx in (0.18, 0.82):
                                            du = w / fw - wx
                                            dzw = z - 0.33
                                            if (du * fw) ** 2 + dzw * dzw < 0.1:
                                                cr, cg, cb = 0.015, 0.015, 0.015
                                    if z > b[6] - 0.35 and ax == 0:
                                        cr, cg, cb = cr * 0.5 + 0.2, cg * 0.5 + 0.2, cb * 0.5 + 0.18
                            else:  # walls, fences, sign plates
                                k = 0.8 + 0.35 * n1
                                cr, cg, cb = cr * k, cg * k, cb * k
                        elif kind == OBJ_CYL:
                            cy = cyls[row]
                            cls = np.int64(cy[5])
                            m = np.int64(cy[6])
                            nx, ny, nz = x - cy[0], y - cy[1], 0.0
                            nn = math.sqrt(nx * nx + ny * ny) + 1e-12
                            nx, ny = nx / nn, ny / nn
                            if z >= cy[4] - 1e-6:
                                nx, ny, nz = 0.0, 0.0, 1.0
                            cr, cg, cb = cy[7], cy[8], cy[9]
                            if m == 0:  # bark
                                ang = math.atan2(ny, nx)
                                k = 0.7 + 0.6 * _vnoise2(ang * 4.0, z * 1.5, row)
                            elif m == 1:  # metal
                                k = 0.9 + 0.2 * _vnoise2(z * 2.0, row, 3)
                            else:  # clothing: darker legs
                                k = 1.0
                                if z < (cy[4] - cy[3]) * 0.5:
                                    cr, cg, cb = 0.03 + 0.5 * cr * 0.3, 0.03 + 0.5 * cg * 0.3, 0.04 + 0.5 * cb * 0.3
                            cr, cg, cb = cr * k, cg * k, cb * k
                        else:
                            sp = sph[row]
                            cls = np.int64(sp[5])
                            m = np.int64(sp[6])
                            q = sp[3] / sp[4]
                            nx, ny, nz = (x - sp[0]) / sp[3], (y - sp[1]) / sp[3], (z - sp[2]) / sp[4] * q
                            nn = math.sqrt(nx * nx + ny * ny + nz * nz) + 1e-12
                            nx, ny, nz = nx / nn, ny / nn, nz / nn
                            cr, cg, cb = sp[7], sp[8], sp[9]
                            if m == 0:
                                fn = _vnoise3(x * 3.0, y * 3.0, z * 3.0, row) * 0.6 + \
                                    _vnoise3(x * 9.0, y * 9.0, z * 9.0, row + 1) * 0.4
                                k = 0.35 + 1.2 * fn
                                k *= 0.55 + 0.45 * (0.5 + 0.5 * nz)
                                cr, cg, cb = cr * k, cg * k, cb * k
                                amb = 0.65
                            elif m == 2 and (z - sp[2]) > 0.25 * sp[4]:
                                cr, cg, cb = 0.03, 0.02, 0.015  # hair
                        diff = nx * sun[0] + ny * sun[1] + nz * sun[2]
                        sunlit = max(diff, 0.0)
                        if sunlit > 0.0 and nz < 0.5 and sun[2] > 0.05:
                            # shadows cast on walls and trunks: the light at the ground point whose sun ray
                            # passes through this point (a little towards the sun, clear of the wall itself)
                            hz = math.sqrt(sun[0] * sun[0] + sun[1] * sun[1]) + 1e-12
                            k = z / sun[2] * hz + 0.3
                            sunlit *= _light_at(shadow, s_x0, s_y1, s_res, x + sun[0] / hz * k, y + sun[1] / hz * k)
                        amb *= 0.75 + 0.25 * nz
                    # lighting: sun + sky ambient
                    lr = light[0] * sunlit + light[3] * amb
                    lg = light[1] * sunlit + light[4] * amb
                    lb = light[2] * sunlit + light[5] * amb
                    q0 = cr * lr * (1 - fog) + 0.62 * fog
                    q1 = cg * lg * (1 - fog) + 0.70 * fog
                    q2 = cb * lb * (1 - fog) + 0.80 * fog
                out_lab[v, u] = cls
                # tone map, noise
                g = vig[v, u]
                if saturation != 1.0:
                    lum = 0.3 * q0 + 0.59 * q1 + 0.11 * q2
                    q0 = lum + saturation * (q0 - lum)
                    q1 = lum + saturation * (q1 - lum)
                    q2 = lum + saturation * (q2 - lum)
                pid = np.int64(v) * 7919 + np.int64(u)
                hA = np.int64(_hash3(pid, frame_seed, 1) * 1073741824.0)
                hB = np.int64(_hash3(pid, frame_seed, 2) * 1073741824.0)
                for ch in range(3):
                    val = (q0 if ch == 0 else (q1 if ch == 1 else q2)) * gains[ch] * g
                    idx = np.int64(val * (nl - 1) * 0.5)
                    if idx < 0:
                        idx = 0
                    elif idx >= nl:
                        idx = nl - 1
                    o = lut[idx]
                    if noise_sigma > 0:
                        h1 = ((hA >> (10 * ch)) & 1023) * (1.0 / 1024.0)
                        h2 = ((hB >> (10 * ch)) & 1023) * (1.0 / 1024.0)
                        nz2 = (h1 + h2 - 1.0) * 2.45  # triangular, unit variance
                        o = o + nz2 * noise_sigma * (0.6 + 0.4 * math.sqrt(o / 255.0 + 0.01))
                    o = min(255.0, max(0.0, o + 0.5))
                    out_bgr[v, u, 2 - ch] = np.uint8(o)
