"""Procedural synthetic sites: a street grid with blocks of houses, tall buildings, a park and a parking lot.

:func:`generate_site` builds, from one seed, both the hidden 3D world
(:class:`~tinyloc.sim.world.World`) and the vector map a mapper would have drawn
of it (a GeoJSON FeatureCollection tagged the way open vector map data is:
``building=yes``, ``highway=residential`` + ``width``, ``footway=sidewalk``,
``natural=tree``, ``barrier=fence``, ``amenity=parking``, ``natural=water``,
``landuse=grass``, ``highway=street_lamp``). Footprints only: the map carries no
heights.

The map is deliberately imperfect, as real open maps are (``SiteParams``):
trees missing from it, buildings shifted and rotated by up to a metre or two,
mapped trees and lamps that are not there, and parked cars and pedestrians that
no map holds.

The site is our own invented place: invented street names, an arbitrary
georeference origin drawn from the seed, and the street grid rotated by an
arbitrary angle so headings are not all multiples of 90 degrees.

Everything is generated in a "grid frame" (streets along its axes) and rotated
into ENU at the end; the street graph is kept in ``world.meta["streets"]`` for
the rover's route planner.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from ..classes import BUILDING, DYNAMIC, FENCE, POLE, TREE
from ..geo import LocalFrame
from .world import (BM_BRICK, BM_CABIN, BM_CAR, BM_FENCE_MESH, BM_FENCE_SLAT, BM_GLASS, BM_HEDGE, BM_PLASTER,
                    BM_WALL, CM_BARK, CM_METAL, GM, NB, NC, NM, NS, SM_FOLIAGE, SM_LAMP, World)

STREET_NAMES = ("Quillon Lane", "Marrowby Street", "Tessaly Row", "Oxbrindle Avenue", "Pellmere Road",
                "Vantry Walk", "Corrigal Street", "Almsgate Lane", "Fennick Way", "Brasswick Road",
                "Ludderby Street", "Orrin Crescent", "Hallowmere Avenue", "Skelby Lane", "Tarrant Row",
                "Wimberlow Street")
SITE_NAMES = ("Wrenfold", "Ashcombe Vale", "Lindqvarth", "Mossbury Green", "Quellbridge", "Harrowfen")


@dataclass(frozen=True)
class SiteParams:
    """Site generator parameters (sizes in metres, angles in degrees, rates as fractions)."""

    blocks_x: int = 3
    blocks_y: int = 3
    block_min_m: float = 48.0
    block_max_m: float = 72.0
    street_extension_m: float = 22.0  # how far streets run past the outermost crossing
    # map errors
    missing_tree_frac: float = 0.15       # trees present in the world but not in the map
    building_shift_max_m: float = 1.5     # map footprint offset (uniform direction, magnitude up to this)
    building_rot_max_deg: float = 2.0     # map footprint rotation about its centroid
    extra_tree_frac: float = 0.05         # mapped trees that are not there (fraction of real trees)
    extra_lamp_frac: float = 0.05         # mapped lamps that are not there
    missing_fence_frac: float = 0.15      # fences not in the map
    mapped_verge_frac: float = 0.7        # grass verges that the map holds
    # distractors (never mapped)
    parked_cars_per_100m: float = 5.0
    walkers_per_block: float = 3.0

    def with_errors(self, scale: float) -> "SiteParams":
        """A copy with every map-error magnitude multiplied by ``scale`` (0 = a perfect map)."""
        from dataclasses import replace
        return replace(self, missing_tree_frac=self.missing_tree_frac * scale,
                       building_shift_max_m=self.building_shift_max_m * scale,
                       building_rot_max_deg=self.building_rot_max_deg * scale,
                       extra_tree_frac=self.extra_tree_frac * scale, extra_lamp_frac=self.extra_lamp_frac * scale,
                       missing_fence_frac=self.missing_fence_frac * scale,
                       mapped_verge_frac=1.0 - (1.0 - self.mapped_verge_frac) * scale)


DEMO_PARAMS = SiteParams(blocks_x=2, blocks_y=2, block_min_m=46.0, block_max_m=56.0, street_extension_m=18.0)


@dataclass
class Site:
    """A generated site: the hidden world and the GeoJSON map of it."""

    world: World
    geojson: dict
    seed: int
    name: str


# ---------------------------------------------------------------------- helpers
def _rect(cx, cy, hx, hy, yaw):
    c, s = math.cos(yaw), math.sin(yaw)
    pts = [(hx, hy), (-hx, hy), (-hx, -hy), (hx, -hy)]
    return np.array([(cx + c * u - s * v, cy + s * u + c * v) for u, v in pts])


def _seg_rect(p0, p1, half_w):
    """Rectangle polygon around the segment p0-p1 with half width ``half_w``."""
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    d = p1 - p0
    n = np.array([-d[1], d[0]]) / max(np.hypot(*d), 1e-9) * half_w
    return np.array([p0 + n, p1 + n, p1 - n, p0 - n])


def _ellipse(cx, cy, ax, ay, yaw, n=28, rng=None, wobble=0.0):
    t = np.linspace(0, 2 * math.pi, n, endpoint=False)
    r = 1.0 + (wobble * np.sin(3 * t + rng.uniform(0, 6.3)) if rng is not None and wobble else 0.0)
    x, y = ax * r * np.cos(t), ay * r * np.sin(t)
    c, s = math.cos(yaw), math.sin(yaw)
    return np.stack([cx + c * x - s * y, cy + s * x + c * y], axis=1)


def _lin(rgb):
    return tuple(float(v) for v in rgb)


class _Builder:
    """Collects world primitives and map features in the grid frame."""

    def __init__(self, rng: np.random.Generator, p: SiteParams):
        self.rng = rng
        self.p = p
        self.ground: list = []
        self.boxes: list = []
        self.cyls: list = []
        self.spheres: list = []
        self.walkers: list = []
        self.features: list = []  # (geometry type, coords (grid frame), properties)
        self.trees: list = []  # (x, y) of real trees, for map errors
        self.lamps: list = []
        self.free_spots: list = []  # (x, y) places where an extra mapped object may be drawn

    # -- world primitives
    def box(self, cx, cy, hx, hy, yaw, z0, z1, cls, mat, rgb, p0=0.0, p1=0.0):
        self.boxes.append((cx, cy, hx, hy, yaw, z0, z1, cls, mat, *_lin(rgb), p0, p1))

    def tree(self, x, y, *, big=1.0, mapped=True):
        r = self.rng
        trunk_r = r.uniform(0.11, 0.22) * big
        h_trunk = r.uniform(1.9, 3.0) * big
        rxy = r.uniform(1.4, 2.8) * big
        rz = rxy * r.uniform(0.9, 1.35)
        bark = np.array([0.09, 0.065, 0.045]) * r.uniform(0.7, 1.3)
        leaf = np.array([r.uniform(0.03, 0.09), r.uniform(0.09, 0.17), r.uniform(0.02, 0.05)])
        self.cyls.append((x, y, trunk_r, 0.0, h_trunk + rz * 0.6, TREE, CM_BARK, *_lin(bark)))
        self.spheres.append((x + r.normal(0, 0.15), y + r.normal(0, 0.15), h_trunk + rz * 0.85, rxy, rz, TREE,
                             SM_FOLIAGE, *_lin(leaf)))
        self.trees.append((x, y, mapped))

    def lamp(self, x, y):
        h = self.rng.uniform(4.5, 6.5)
        grey = self.rng.uniform(0.10, 0.22)
        self.cyls.append((x, y, self.rng.uniform(0.07, 0.10), 0.0, h, POLE, CM_METAL, grey, grey, grey * 1.05))
        self.spheres.append((x, y, h + 0.05, 0.26, 0.14, POLE, SM_LAMP, 0.45, 0.45, 0.42))
        self.lamps.append((x, y))

    def sign(self, x, y, yaw):
        self.cyls.append((x, y, 0.035, 0.0, 2.6, POLE, CM_METAL, 0.3, 0.3, 0.3))
        colors = ((0.5, 0.02, 0.02), (0.02, 0.08, 0.4), (0.6, 0.5, 0.02))
        c = colors[int(self.rng.integers(0, 3))]
        self.box(x, y, 0.3, 0.02, yaw, 1.95, 2.55, POLE, BM_WALL, c)
        self.features.append(("Point", np.array([x, y]), {"traffic_sign": "yes"}))

    def fence(self, pts, kind, *, mapped=True, height=None):
        r = self.rng
        pts = np.asarray(pts, float)
        if kind == "fence":
            mesh = r.random() < 0.35
            h = height or (r.uniform(1.5, 2.0) if mesh else r.uniform(0.9, 1.4))
            mat, t = (BM_FENCE_MESH, 0.03) if mesh else (BM_FENCE_SLAT, 0.04)
            col = (0.18, 0.19, 0.18) if mesh else tuple(np.array([0.28, 0.2, 0.12]) * r.uniform(0.5, 1.4))
            p0, p1 = (0.09, 0.25) if mesh else (r.uniform(0.1, 0.16), r.uniform(0.5, 0.75))
        elif kind == "wall":
            h = height or r.uniform(1.1, 2.1)
            mat, t = BM_WALL, 0.25
            col = tuple(np.array([0.28, 0.25, 0.21]) * r.uniform(0.6, 1.3))
            p0, p1 = 0.0, 0.0
        else:  # hedge
            h = height or r.uniform(1.0, 1.6)
            mat, t = BM_HEDGE, 0.8
            col = (r.uniform(0.03, 0.06), r.uniform(0.08, 0.13), 0.025)
            p0, p1 = 0.0, 0.0
        for a, b in zip(pts[:-1], pts[1:]):
            d = b - a
            L = float(np.hypot(*d))
            if L < 0.2:
                continue
            m = (a + b) / 2
            self.box(m[0], m[1], L / 2 + t / 2, t / 2, math.atan2(d[1], d[0]), 0.0, h, FENCE, mat, col, p0, p1)
        if mapped and r.random() >= self.p.missing_fence_frac:
            self.features.append(("LineString", pts, {"barrier": kind}))

    def car(self, x, y, yaw):
        r = self.rng
        palette = ((0.6, 0.6, 0.6), (0.02, 0.02, 0.02), (0.25, 0.26, 0.27), (0.35, 0.02, 0.02), (0.02, 0.06, 0.25),
                   (0.03, 0.1, 0.04), (0.09, 0.09, 0.1), (0.5, 0.45, 0.35), (0.12, 0.12, 0.13))
        col = palette[int(r.integers(0, len(palette)))]
        L, W = r.uniform(3.9, 4.8) / 2, r.uniform(0.85, 0.95)
        self.box(x, y, L, W, yaw, 0.15, r.uniform(0.95, 1.1), DYNAMIC, BM_CAR, col)
        c, s = math.cos(yaw), math.sin(yaw)
        off = r.uniform(-0.35, 0.0)
        self.box(x + c * off, y + s * off, L * 0.55, W * 0.9, yaw, 1.0, r.uniform(1.4, 1.55), DYNAMIC, BM_CABIN, col)

    def walker(self, a, b):
        r = self.rng
        clothes = np.array([r.uniform(0.02, 0.4), r.uniform(0.02, 0.35), r.uniform(0.02, 0.4)])
        if r.random() < 0.4:
            clothes[:] = r.uniform(0.02, 0.08)
        self.walkers.append((a[0], a[1], b[0], b[1], r.uniform(0.8, 1.5), r.uniform(0, 100.0), r.uniform(0.19, 0.25),
                             r.uniform(1.55, 1.9), *_lin(clothes), r.uniform(0.35, 1.0)))

    def building(self, origin, eu, ev, u0, width, depth, height, *, kind, tags):
        """A building in a lot frame: u along the street (eu), v into the block (ev), from lot origin."""
        r = self.rng
        eu, ev = np.asarray(eu, float), np.asarray(ev, float)
        o = np.asarray(origin, float)
        yaw = math.atan2(eu[1], eu[0])

        def P(u, v):
            return o + eu * u + ev * v

        if kind == "glass":
            mat, col, p0, p1 = BM_GLASS, np.array([0.10, 0.13, 0.15]) * r.uniform(0.7, 1.3), 1.6, 3.6
        elif kind == "brick" or (kind == "house" and r.random() < 0.35):
            mat, col = BM_BRICK, np.array([0.23, 0.09, 0.05]) * r.uniform(0.7, 1.3)
            p0, p1 = r.uniform(2.4, 3.4), r.uniform(2.8, 3.2)
        else:
            base = np.array([[0.45, 0.42, 0.36], [0.40, 0.36, 0.28], [0.33, 0.34, 0.33], [0.42, 0.33, 0.25],
                             [0.30, 0.32, 0.36], [0.44, 0.40, 0.30]])[int(r.integers(0, 6))]
            mat, col = BM_PLASTER, base * r.uniform(0.6, 1.15)
            p0, p1 = r.uniform(2.4, 3.6), r.uniform(2.8, 3.3)
        parts = [(u0, 0.0, u0 + width, depth)]
        outline = [(u0, 0), (u0 + width, 0), (u0 + width, depth), (u0, depth)]
        if kind == "house" and r.random() < 0.35 and width > 9 and depth > 8:
            w2, d2 = width * r.uniform(0.35, 0.55), depth * r.uniform(0.35, 0.5)
            if r.random() < 0.5:  # notch at the back right
                parts = [(u0, 0.0, u0 + width, depth - d2), (u0, depth - d2, u0 + width - w2, depth)]
                outline = [(u0, 0), (u0 + width, 0), (u0 + width, depth - d2), (u0 + width - w2, depth - d2),
                           (u0 + width - w2, depth), (u0, depth)]
            else:  # notch at the back left
                parts = [(u0, 0.0, u0 + width, depth - d2), (u0 + w2, depth - d2, u0 + width, depth)]
                outline = [(u0, 0), (u0 + width, 0), (u0 + width, depth), (u0 + w2, depth), (u0 + w2, depth - d2),
                           (u0, depth - d2)]
        for k, (ua, va, ub, vb) in enumerate(parts):
            c = P((ua + ub) / 2, (va + vb) / 2)
            h = height if k == 0 else height * r.uniform(0.6, 1.0)
            self.box(c[0], c[1], (ub - ua) / 2, (vb - va) / 2, yaw, 0.0, h, BUILDING, mat, col, p0, p1)
        ring = np.array([P(u, v) for u, v in outline])
        self.features.append(("Polygon", ring, dict(tags, building=tags.get("building", "yes"))))
        self.free_spots.append(tuple(P(u0 + width / 2, depth + 2.5)))


# ---------------------------------------------------------------------- the generator
def generate_site(seed: int, params: SiteParams = SiteParams()) -> Site:
    """Generate a site from ``seed`` (deterministic: same seed and parameters, same site, byte for byte).

    Parameters
    ----------
    seed : int
        Any non-negative integer.
    params : SiteParams
        Layout and map-error parameters.

    Returns
    -------
    Site
        ``world`` (hidden 3D world) and ``geojson`` (the imperfect map, a FeatureCollection dict with an
        ``"origin"`` member giving the ENU origin).
    """
    rng = np.random.default_rng([int(seed), 0x5173])
    p = params
    b = _Builder(rng, p)
    name = SITE_NAMES[int(rng.integers(0, len(SITE_NAMES)))]
    origin = (round(float(rng.uniform(-45.0, 55.0)), 6), round(float(rng.uniform(-170.0, 170.0)), 6),
              round(float(rng.uniform(5.0, 400.0)), 1))
    theta = float(rng.uniform(-math.pi, math.pi))

    # --- street grid (grid frame, centred on the origin)
    def cuts(n):
        sizes = rng.uniform(p.block_min_m, p.block_max_m, n)
        pos = np.concatenate([[0.0], np.cumsum(sizes)])
        return pos - pos[-1] / 2

    xs, ys = cuts(p.blocks_x), cuts(p.blocks_y)
    names = list(rng.permutation(len(STREET_NAMES)))
    streets = []  # dicts: axis ("x": runs north-south at x=c, "y": runs east-west at y=c), cross-section

    def section():
        road = float(rng.choice([6.0, 6.5, 7.0, 7.5, 8.0]))
        verge = float(rng.choice([0.0, 1.5, 1.8, 2.0]))
        walk = float(rng.uniform(2.2, 2.8) if verge > 0 else rng.uniform(3.0, 3.6))
        return road, verge, walk

    for axis, cs in (("x", xs), ("y", ys)):
        for c in cs:
            road, verge, walk = section()
            streets.append(dict(axis=axis, c=float(c), road=road, verge=verge, walk=walk,
                                name=STREET_NAMES[names.pop()]))
    ext = p.street_extension_m
    lo_x, hi_x = xs[0] - ext, xs[-1] + ext
    lo_y, hi_y = ys[0] - ext, ys[-1] + ext

    def half(s):
        return s["road"] / 2 + s["verge"] + s["walk"]

    sx = [s for s in streets if s["axis"] == "x"]
    sy = [s for s in streets if s["axis"] == "y"]

    def line_of(s):
        if s["axis"] == "x":
            return np.array([s["c"], lo_y]), np.array([s["c"], hi_y])
        return np.array([lo_x, s["c"]]), np.array([hi_x, s["c"]])

    # --- blocks first (painted under the street bands)
    nbx, nby = p.blocks_x, p.blocks_y
    kinds = ["houses"] * (nbx * nby)
    order = list(rng.permutation(nbx * nby))
    kinds[order[0]] = "park"
    if len(order) > 1:
        kinds[order[1]] = "parking"
    for k in order[2:]:
        kinds[k] = "downtown" if rng.random() < 0.35 else "houses"
    for i in range(nbx):
        for j in range(nby):
            bx0, bx1 = xs[i] + half(sx[i]), xs[i + 1] - half(sx[i + 1])
            by0, by1 = ys[j] + half(sy[j]), ys[j + 1] - half(sy[j + 1])
            kind = kinds[i * nby + j]
            {"houses": _houses, "downtown": _downtown, "park": _park, "parking": _parking}[kind](
                b, bx0, by0, bx1, by1)
    # the outskirts beyond the outermost streets: rough ground, a few trees and fences
    _outskirts(b, xs, ys, sx, sy, lo_x, hi_x, lo_y, hi_y, half)

    # --- street bands: sidewalks (full length), curbs, verges between crossings, then carriageways
    for s in streets:
        a, e = line_of(s)
        b.ground.append((GM["paving"], _seg_rect(a, e, half(s))))
    for s in streets:
        a, e = line_of(s)
        b.ground.append((GM["curb"], _seg_rect(a, e, s["road"] / 2 + 0.18)))
    cross_of = {"x": ys, "y": xs}
    for s in streets:
        if s["verge"] <= 0:
            continue
        cs = cross_of[s["axis"]]
        others = sy if s["axis"] == "x" else sx
        stops = [lo_y if s["axis"] == "x" else lo_x] + list(cs) + [hi_y if s["axis"] == "x" else hi_x]
        for k in range(len(stops) - 1):
            m0 = stops[k] + (half(others[k - 1]) + 1.0 if k > 0 else 0.0)
            m1 = stops[k + 1] - (half(others[k]) + 1.0 if k < len(stops) - 2 else 0.0)
            if m1 - m0 < 4:
                continue
            for side in (+1, -1):
                off = side * (s["road"] / 2 + 0.18 + (s["verge"] - 0.18) / 2)
                hw = (s["verge"] - 0.18) / 2
                if s["axis"] == "x":
                    pa, pb = (s["c"] + off, m0), (s["c"] + off, m1)
                else:
                    pa, pb = (m0, s["c"] + off), (m1, s["c"] + off)
                poly = _seg_rect(pa, pb, hw)
                b.ground.append((GM["grass"], poly))
                if rng.random() < p.mapped_verge_frac:
                    b.features.append(("Polygon", poly, {"landuse": "grass"}))
                _verge_furniture(b, np.array(pa), np.array(pb), side, s)
    for s in streets:
        if s["verge"] > 0:
            continue
        cs = cross_of[s["axis"]]
        others = sy if s["axis"] == "x" else sx
        stops = [lo_y if s["axis"] == "x" else lo_x] + list(cs) + [hi_y if s["axis"] == "x" else hi_x]
        for k in range(len(stops) - 1):
            m0 = stops[k] + (half(others[k - 1]) + 2.0 if k > 0 else 0.0)
            m1 = stops[k + 1] - (half(others[k]) + 2.0 if k < len(stops) - 2 else 0.0)
            for side in (+1, -1):
                off = side * (s["road"] / 2 + 0.75)
                if s["axis"] == "x":
                    pa, pb = np.array((s["c"] + off, m0)), np.array((s["c"] + off, m1))
                else:
                    pa, pb = np.array((m0, s["c"] + off)), np.array((m1, s["c"] + off))
                _pit_trees(b, pa, pb, side, s)
    for s in streets:
        a, e = line_of(s)
        b.ground.append((GM["asphalt"], _seg_rect(a, e, s["road"] / 2)))
        b.features.append(("LineString", np.array([a, e]),
                           {"highway": "residential" if s["road"] < 7.0 else "tertiary",
                            "width": f"{s['road']:.1f}", "name": s["name"]}))
        for side in (+1, -1):
            off = side * (s["road"] / 2 + s["verge"] + s["walk"] / 2)
            n = np.array([off, 0.0]) if s["axis"] == "x" else np.array([0.0, off])
            b.features.append(("LineString", np.array([a + n, e + n]),
                               {"highway": "footway", "footway": "sidewalk", "width": f"{s['walk']:.1f}"}))
    # markings: dashed centre line on wide streets, zebra crossings at some crossings
    for s in streets:
        a, e = line_of(s)
        if s["road"] >= 7.0:
            L = float(np.hypot(*(e - a)))
            d = (e - a) / L
            t = 2.0
            while t + 3.0 < L:
                b.ground.append((GM["marking"], _seg_rect(a + d * t, a + d * (t + 3.0), 0.06)))
                t += 9.0
    for s in sx:
        for ycross, so in zip(ys, sy):
            if rng.random() < 0.4:
                for sgn in (+1, -1):
                    y0 = ycross + sgn * (so["road"] / 2 + 1.5 + 2.0)
                    for k in range(int(s["road"] / 1.0)):
                        xk = s["c"] - s["road"] / 2 + 0.5 + k * 1.0
                        if k % 2 == 0:
                            b.ground.append((GM["crossing"], _rect(xk, y0, 0.25, 1.5, 0.0)))
    # car parking along wide streets, signs at some crossings
    for s in streets:
        if s["road"] < 7.0:
            continue
        a, e = line_of(s)
        L = float(np.hypot(*(e - a)))
        d = (e - a) / L
        cs = cross_of[s["axis"]]
        base = lo_y if s["axis"] == "x" else lo_x
        n_cars = int(rng.poisson(p.parked_cars_per_100m * L / 100.0))
        used = []
        for _ in range(n_cars):
            t = rng.uniform(4.0, L - 4.0)
            if any(abs(base + t - c) < 12.0 for c in cs) or any(abs(t - u) < 6.0 for u in used):
                continue
            used.append(t)
            side = 1 if rng.random() < 0.5 else -1
            nrm = np.array([-d[1], d[0]]) * side * (s["road"] / 2 - 1.05)
            pos = a + d * t + nrm
            b.car(pos[0], pos[1], math.atan2(d[1], d[0]) + (0.0 if side > 0 else math.pi) + rng.normal(0, 0.02))
    for s in sx:
        for ycross, so in zip(ys, sy):
            if rng.random() < 0.35:
                x = s["c"] + s["road"] / 2 + 0.45
                y = ycross - so["road"] / 2 - 0.6
                b.sign(x, y, 0.0)

    # --- walkers on the sidewalks
    for s in streets:
        a, e = line_of(s)
        L = float(np.hypot(*(e - a)))
        d = (e - a) / L
        n_w = int(rng.poisson(p.walkers_per_block * 0.5 * L / 60.0))
        for _ in range(n_w):
            side = 1 if rng.random() < 0.5 else -1
            off = side * (s["road"] / 2 + s["verge"] + s["walk"] - 0.45)
            nrm = np.array([-d[1], d[0]]) * off
            t0 = rng.uniform(0, L - 20)
            b.walker(a + d * t0 + nrm, a + d * (t0 + rng.uniform(10, 30)) + nrm)

    # --- map errors: missing trees, extra trees and lamps
    for (x, y, mapped) in b.trees:
        if mapped and rng.random() >= p.missing_tree_frac:
            b.features.append(("Point", np.array([x, y]), {"natural": "tree"}))
    spots = b.free_spots
    n_extra_t = int(round(p.extra_tree_frac * len(b.trees)))
    for k in range(min(n_extra_t, len(spots))):
        x, y = spots[int(rng.integers(0, len(spots)))]
        b.features.append(("Point", np.array([x + rng.normal(0, 1), y + rng.normal(0, 1)]), {"natural": "tree"}))
    for (x, y) in b.lamps:
        b.features.append(("Point", np.array([x, y]), {"highway": "street_lamp"}))
    n_extra_l = int(round(p.extra_lamp_frac * len(b.lamps)))
    for k in range(n_extra_l):
        s = streets[int(rng.integers(0, len(streets)))]
        a, e = line_of(s)
        t = rng.uniform(0.1, 0.9)
        off = (s["road"] / 2 + 0.5) * (1 if rng.random() < 0.5 else -1)
        n = np.array([off, 0.0]) if s["axis"] == "x" else np.array([0.0, off])
        q = a + (e - a) * t + n
        b.features.append(("Point", q, {"highway": "street_lamp"}))

    # --- building footprint errors (shift, rotation about the centroid), applied to the map only
    feats = []
    for gtype, coords, props in b.features:
        if gtype == "Polygon" and "building" in props:
            ang = math.radians(rng.uniform(-p.building_rot_max_deg, p.building_rot_max_deg))
            shift = rng.uniform(0, p.building_shift_max_m)
            phi = rng.uniform(-math.pi, math.pi)
            cen = coords.mean(axis=0)
            c, s_ = math.cos(ang), math.sin(ang)
            rel = coords - cen
            coords = cen + np.stack([c * rel[:, 0] - s_ * rel[:, 1], s_ * rel[:, 0] + c * rel[:, 1]], axis=1) \
                + shift * np.array([math.cos(phi), math.sin(phi)])
        feats.append((gtype, coords, props))

    # --- rotate the grid frame into ENU
    ct, st = math.cos(theta), math.sin(theta)

    def rot(xy):
        xy = np.asarray(xy, float)
        return np.stack([ct * xy[..., 0] - st * xy[..., 1], st * xy[..., 0] + ct * xy[..., 1]], axis=-1)

    def rot_rows(rows, cx, cy, yaw=None):
        a = np.array(rows, dtype=np.float64)
        xy = rot(a[:, [cx, cy]])
        a[:, cx], a[:, cy] = xy[:, 0], xy[:, 1]
        if yaw is not None:
            a[:, yaw] = np.arctan2(np.sin(a[:, yaw] + theta), np.cos(a[:, yaw] + theta))
        return a

    boxes = rot_rows(b.boxes, 0, 1, 4) if b.boxes else np.zeros((0, NB))
    cyls = rot_rows(b.cyls, 0, 1) if b.cyls else np.zeros((0, NC))
    sph = rot_rows(b.spheres, 0, 1) if b.spheres else np.zeros((0, NS))
    walk = np.array(b.walkers, dtype=np.float64).reshape(-1, NM)
    if len(walk):
        walk[:, 0:2] = rot(walk[:, 0:2])
        walk[:, 2:4] = rot(walk[:, 2:4])
    ground = [(m, rot(poly)) for m, poly in b.ground]
    corners = rot(np.array([[lo_x, lo_y], [hi_x, lo_y], [hi_x, hi_y], [lo_x, hi_y]]))
    bounds = (float(corners[:, 0].min()), float(corners[:, 1].min()), float(corners[:, 0].max()),
              float(corners[:, 1].max()))
    nodes = [[float(v) for v in rot(np.array([x, y]))] for x in xs for y in ys]
    # per-site material colours (linear RGB): towns differ in paving, asphalt and how green the grass is
    pave = float(rng.uniform(0.16, 0.30))  # aged concrete; asphalt below (albedos from memory)
    tint = (1.0 + float(rng.uniform(-0.04, 0.08)), 1.0, 1.0 - float(rng.uniform(0.0, 0.12)))
    asph = float(rng.uniform(0.05, 0.11))
    palette = {"paving": [pave * t for t in tint], "curb": [min(0.6, 1.2 * pave * t) for t in tint],
               "asphalt": [asph, asph, asph * 1.05], "lot": [asph * 1.2, asph * 1.15, asph * 1.1],
               "grass": [float(rng.uniform(0.07, 0.12)), float(rng.uniform(0.12, 0.18)),
                         float(rng.uniform(0.03, 0.06))],
               "rough": [float(rng.uniform(0.13, 0.2)), float(rng.uniform(0.13, 0.18)), float(rng.uniform(0.07, 0.1))]}
    meta = {"name": name, "seed": int(seed), "params": asdict(p), "grid_yaw_rad": theta, "palette": palette,
            "streets": {"xs": [float(v) for v in xs], "ys": [float(v) for v in ys],
                        "lo": [float(lo_x), float(lo_y)], "hi": [float(hi_x), float(hi_y)],
                        "sx": [{k: s[k] for k in ("road", "verge", "walk", "name")} for s in sx],
                        "sy": [{k: s[k] for k in ("road", "verge", "walk", "name")} for s in sy],
                        "nodes_enu": nodes}}
    world = World(origin, bounds, boxes, cyls, sph, walk, ground, meta)

    frame = LocalFrame(*origin)
    out = []
    for gtype, coords, props in feats:
        e = rot(coords)
        lat, lon = frame.to_latlon(e[..., 0], e[..., 1])
        ll = np.stack([np.round(np.atleast_1d(lon), 9), np.round(np.atleast_1d(lat), 9)], axis=-1)
        if gtype == "Point":
            g = {"type": "Point", "coordinates": ll[0].tolist()}
        elif gtype == "LineString":
            g = {"type": "LineString", "coordinates": ll.tolist()}
        else:
            ring = np.concatenate([ll, ll[:1]])
            # GeoJSON (RFC 7946) wants exterior rings counter-clockwise
            area2 = np.sum(ring[:-1, 0] * ring[1:, 1] - ring[1:, 0] * ring[:-1, 1])
            if area2 < 0:
                ring = ring[::-1]
            g = {"type": "Polygon", "coordinates": [ring.tolist()]}
        out.append({"type": "Feature", "properties": props, "geometry": g})
    gj = {"type": "FeatureCollection", "name": name,
          "origin": {"lat": origin[0], "lon": origin[1], "h": origin[2]},
          "generator": {"tool": "tinyloc sim site", "seed": int(seed)}, "features": out}
    return Site(world, gj, int(seed), name)


# ---------------------------------------------------------------------- blocks
def _houses(b: _Builder, x0, y0, x1, y1):
    r = b.rng
    b.ground.append((GM["grass"], np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])))
    mapped_yards = r.random() < 0.5
    if mapped_yards:
        b.features.append(("Polygon", np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]]), {"landuse": "grass"}))
    sides = (((x0, y0), (1, 0), (0, 1), x1 - x0), ((x1, y0), (0, 1), (-1, 0), y1 - y0),
             ((x1, y1), (-1, 0), (0, -1), x1 - x0), ((x0, y1), (0, -1), (1, 0), y1 - y0))
    reserve = 19.0
    for k, (o, eu, ev, L) in enumerate(sides):
        o, eu, ev = np.array(o, float), np.array(eu, float), np.array(ev, float)
        u = 2.0 if k % 2 == 0 else reserve
        end = L - (2.0 if k % 2 == 0 else reserve)
        front_fence = r.random() < 0.5
        fence_kind = ["fence", "hedge", "wall"][int(r.integers(0, 3))]
        while True:
            w = r.uniform(8.0, 15.0)
            if u + w > end:
                break
            setback = r.uniform(2.5, 5.0)
            depth = r.uniform(8.0, 13.0)
            h = r.uniform(5.0, 11.0)
            lot = o + eu * u + ev * setback
            b.building(lot, eu, ev, 0.0, w, depth, h, kind="house",
                       tags={"building": "house" if r.random() < 0.6 else "yes"})
            gap = r.uniform(3.5, 9.0)
            # path from the sidewalk to the door
            door = u + w * r.uniform(0.3, 0.7)
            pa, pb = o + eu * door, o + eu * door + ev * setback
            b.ground.append((GM["paving"], _seg_rect(pa, pb, 0.6)))
            if front_fence:
                f0, f1 = o + eu * (u - gap / 2) + ev * 0.5, o + eu * (door - 0.8) + ev * 0.5
                f2, f3 = o + eu * (door + 0.8) + ev * 0.5, o + eu * (u + w + gap / 2) + ev * 0.5
                b.fence([f0, f1], fence_kind)
                b.fence([f2, f3], fence_kind)
            # lot divider behind the house, a backyard tree or two
            if r.random() < 0.6:
                q = u + w + gap / 2
                b.fence([o + eu * q + ev * (setback + 1.0), o + eu * q + ev * (setback + depth + 6.0)], "fence")
            for _ in range(int(r.integers(0, 3))):
                tq = o + eu * (u + r.uniform(1, w - 1)) + ev * (setback + depth + r.uniform(3.0, 7.0))
                b.tree(tq[0], tq[1])
            if r.random() < 0.3:
                fy = o + eu * (u + w + gap / 2) + ev * (setback * 0.5)
                b.tree(fy[0], fy[1], big=0.7)
            u += w + gap


def _downtown(b: _Builder, x0, y0, x1, y1):
    r = b.rng
    b.ground.append((GM["paving"], np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])))
    sides = (((x0, y0), (1, 0), (0, 1), x1 - x0), ((x1, y0), (0, 1), (-1, 0), y1 - y0),
             ((x1, y1), (-1, 0), (0, -1), x1 - x0), ((x0, y1), (0, -1), (1, 0), y1 - y0))
    for k, (o, eu, ev, L) in enumerate(sides):
        o, eu, ev = np.array(o, float), np.array(eu, float), np.array(ev, float)
        depth = r.uniform(12.0, 16.0)
        u = 0.5 if k % 2 == 0 else depth + 1.0
        end = L - (0.5 if k % 2 == 0 else depth + 1.0)
        while u < end - 6.0:
            w = min(r.uniform(10.0, 24.0), end - u)
            kind = ["glass", "plaster", "brick"][int(r.integers(0, 3))]
            b.building(o + eu * u + ev * 0.6, eu, ev, 0.0, w, depth, r.uniform(12.0, 26.0), kind=kind,
                       tags={"building": "commercial" if kind == "glass" else "apartments"})
            u += w + (r.uniform(0.0, 0.3) if r.random() < 0.8 else r.uniform(3.0, 6.0))


def _park(b: _Builder, x0, y0, x1, y1):
    r = b.rng
    poly = np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])
    b.ground.append((GM["grass"], poly))
    b.features.append(("Polygon", poly, {"leisure": "park", "landuse": "grass", "name": "Greave Commons"}))
    cx, cy = (x0 + x1) / 2 + r.uniform(-4, 4), (y0 + y1) / 2 + r.uniform(-4, 4)
    paths = [np.array([[x0, cy], [x1, cy]]), np.array([[cx, y0], [cx, y1]])]
    if r.random() < 0.5:
        paths.append(np.array([[x0 + 1, y0 + 1], [x1 - 1, y1 - 1]]))
    for pth in paths:
        w = r.uniform(2.2, 3.2)
        mat = GM["gravel"] if r.random() < 0.5 else GM["paving"]
        b.ground.append((mat, _seg_rect(pth[0], pth[1], w / 2)))
        b.features.append(("LineString", pth, {"highway": "footway", "width": f"{w:.1f}",
                                              "surface": "gravel" if mat == GM["gravel"] else "paving_stones"}))
        d = pth[1] - pth[0]
        L = float(np.hypot(*d))
        nrm = np.array([-d[1], d[0]]) / L
        t = r.uniform(5, 12)
        while t < L - 5:
            q = pth[0] + d / L * t + nrm * (w / 2 + 0.6)
            b.lamp(q[0], q[1])
            t += r.uniform(18, 26)
        n_w = int(r.poisson(1.5))
        for _ in range(n_w):
            t0 = r.uniform(0, L * 0.5)
            b.walker(pth[0] + d / L * t0 + nrm * 0.5, pth[0] + d / L * (t0 + r.uniform(10, L * 0.5)) + nrm * 0.5)
    # a pond in the quadrant with the most room
    qx = x0 + (cx - x0) / 2 if cx - x0 > x1 - cx else cx + (x1 - cx) / 2
    qy = y0 + (cy - y0) / 2 if cy - y0 > y1 - cy else cy + (y1 - cy) / 2
    ax = min(abs(cx - qx), abs(qx - x0), abs(x1 - qx)) * 0.6
    ay = min(abs(cy - qy), abs(qy - y0), abs(y1 - qy)) * 0.6
    pond = _ellipse(qx, qy, ax, ay, r.uniform(0, 3.1), rng=r, wobble=0.12)
    rim = _ellipse(qx, qy, ax + 0.7, ay + 0.7, 0.0, rng=None)
    b.ground.append((GM["bed"], rim))
    b.ground.append((GM["water"], pond))
    b.features.append(("Polygon", pond, {"natural": "water", "name": "Siltmere Pond"}))
    # trees scattered away from paths and the pond
    n = int(r.integers(14, 26))
    for _ in range(n * 4):
        if n == 0:
            break
        x, y = r.uniform(x0 + 2, x1 - 2), r.uniform(y0 + 2, y1 - 2)
        if abs(x - cx) < 4.5 or abs(y - cy) < 4.5:
            continue
        if ((x - qx) / (ax + 3.5)) ** 2 + ((y - qy) / (ay + 3.5)) ** 2 < 1.0:
            continue
        if len(paths) > 2 and abs((x - x0) * (y1 - y0) - (y - y0) * (x1 - x0)) / math.hypot(x1 - x0, y1 - y0) < 4.5:
            continue
        b.tree(x, y, big=r.uniform(0.9, 1.4))
        n -= 1
    # a hedge along part of the edge
    if r.random() < 0.7:
        b.fence([[x0 + 1.0, y0 + 1.0], [cx - 4.0, y0 + 1.0]], "hedge")
    b.free_spots.extend([(cx + 9.0, cy + 9.0), (cx - 9.0, cy - 9.0)])


def _parking(b: _Builder, x0, y0, x1, y1):
    r = b.rng
    b.ground.append((GM["grass"], np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])))
    # lot on the west half, a big low store on the east half
    xm = x0 + (x1 - x0) * r.uniform(0.5, 0.62)
    lot = np.array([[x0 + 1.0, y0 + 1.0], [xm, y0 + 1.0], [xm, y1 - 1.0], [x0 + 1.0, y1 - 1.0]])
    b.ground.append((GM["lot"], lot))
    b.features.append(("Polygon", lot, {"amenity": "parking", "parking": "surface"}))
    # rows of stalls 2.5 m x 5 m either side of 6 m aisles, running north-south
    x = x0 + 2.0
    while x + 16.0 <= xm:
        for col0 in (x, x + 11.0):
            y = y0 + 3.0
            while y + 2.5 < y1 - 3.0:
                b.ground.append((GM["lot_line"], _rect(col0 + 2.5, y, 2.5, 0.06, 0.0)))
                if r.random() < 0.6 and y + 2.5 < y1 - 3.0:
                    b.car(col0 + 2.5 + r.normal(0, 0.1), y + 1.25, (0.0 if r.random() < 0.5 else math.pi)
                          + r.normal(0, 0.03))
                y += 2.5
        x += 16.0
    for k in range(int((y1 - y0) // 20)):
        b.lamp(xm - 1.0, y0 + 8.0 + k * 20.0)
    b.building(np.array([xm + 4.0, y0 + 4.0]), (0, 1), (1, 0), 0.0, (y1 - y0) - 8.0, (x1 - xm) - 8.0,
               r.uniform(5.0, 7.5), kind="plaster", tags={"building": "retail"})
    b.fence([[xm + 1.0, y1 - 1.0], [x1 - 1.0, y1 - 1.0]], "wall")


def _outskirts(b: _Builder, xs, ys, sx, sy, lo_x, hi_x, lo_y, hi_y, half):
    r = b.rng
    # a fence line and scattered trees just outside the outer sidewalks, on every side
    for side in range(4):
        if side == 0:
            y = ys[0] - half(sy[0]) - 2.0
            a, e = np.array([lo_x, y]), np.array([hi_x, y])
        elif side == 1:
            y = ys[-1] + half(sy[-1]) + 2.0
            a, e = np.array([lo_x, y]), np.array([hi_x, y])
        elif side == 2:
            x = xs[0] - half(sx[0]) - 2.0
            a, e = np.array([x, lo_y]), np.array([x, hi_y])
        else:
            x = xs[-1] + half(sx[-1]) + 2.0
            a, e = np.array([x, lo_y]), np.array([x, hi_y])
        d = e - a
        L = float(np.hypot(*d))
        nrm = np.array([-d[1], d[0]]) / L * (1 if side in (1, 3) else -1)
        cuts = sorted(r.uniform(0, L, 4))
        for k in range(0, 4, 2):
            if r.random() < 0.6:
                b.fence([a + d / L * cuts[k], a + d / L * cuts[k + 1]], "fence")
        t = r.uniform(3, 10)
        while t < L:
            q = a + d / L * t + nrm * r.uniform(4, 10)
            b.tree(q[0], q[1], big=r.uniform(0.8, 1.3))
            t += r.uniform(7, 20)


def _verge_furniture(b: _Builder, pa, pb, side, s):
    r = b.rng
    d = pb - pa
    L = float(np.hypot(*d))
    t = r.uniform(2.0, 6.0)
    lamp_side = 1 if s["c"] > 0 else -1  # lamps on one side of each street
    next_lamp = r.uniform(8, 20)
    while t < L - 2.0:
        q = pa + d / L * t
        if side == lamp_side and t >= next_lamp:
            b.lamp(q[0], q[1])
            next_lamp = t + r.uniform(24, 34)
            t += r.uniform(3, 5)
            continue
        if r.random() < 0.8:
            b.tree(q[0], q[1])
        t += r.uniform(8, 14)


def _pit_trees(b: _Builder, pa, pb, side, s):
    r = b.rng
    d = pb - pa
    L = float(np.hypot(*d))
    if L < 6:
        return
    t = r.uniform(3.0, 8.0)
    has_lamps = side == (1 if s["c"] > 0 else -1)
    k = 0
    while t < L - 3.0:
        q = pa + d / L * t
        if has_lamps and k % 3 == 1:
            b.lamp(q[0], q[1])
        elif r.random() < 0.7:
            b.ground.append((GM["bed"], _rect(q[0], q[1], 0.6, 0.6, math.atan2(d[1], d[0]))))
            b.tree(q[0], q[1], big=0.8)
        t += r.uniform(9, 14)
        k += 1
