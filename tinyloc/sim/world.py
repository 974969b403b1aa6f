"""The hidden 3D world of a synthetic site: what the camera sees, as opposed to what the map says.

Everything is in the site's ENU frame (metres, x east, y north, z up; the ground
is the plane z = 0). The world is a handful of primitive arrays, each row one
object, columns named by the ``B_*``, ``C_*``, ``S_*`` and ``M_*`` constants:

- ``boxes`` (N, 14): oriented boxes (buildings, building parts, walls, fences, car bodies),
- ``cyls`` (N, 10): vertical cylinders (tree trunks, poles),
- ``spheres`` (N, 10): axis-aligned spheroids (tree crowns, lamp heads),
- ``walkers`` (N, 12): people walking to and fro along a segment (posed per time stamp),
- ``ground``: list of (material, (K, 2) polygon) painted in order onto the ground plane.

Colours are linear RGB in 0..1. The file format (``world.json``) is ours:
``{"format": "tinyloc-world", "version": 1, "origin": {...}, "bounds": [...], "boxes": [[...]], ...}``;
the ground is re-rasterised from its polygons on load, so the file stays small.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..classes import BUILDING, DYNAMIC, FENCE, GRASS, PARKING, POLE, ROAD, SIDEWALK, TREE, WATER
from ..errors import InputError
from ..geo import LocalFrame

FORMAT_NAME = "tinyloc-world"
FORMAT_VERSION = 1

# --- oriented boxes
B_CX, B_CY, B_HX, B_HY, B_YAW, B_Z0, B_Z1, B_CLS, B_MAT, B_R, B_G, B_B, B_P0, B_P1 = range(14)
NB = 14
# box materials (P0/P1 are material parameters)
BM_PLASTER, BM_BRICK, BM_GLASS, BM_WALL, BM_FENCE_SLAT, BM_FENCE_MESH, BM_CAR, BM_CABIN, BM_HEDGE, BM_ROOF = range(10)

# --- vertical cylinders
C_CX, C_CY, C_R, C_Z0, C_Z1, C_CLS, C_MAT, C_R_, C_G, C_B = range(10)
NC = 10
CM_BARK, CM_METAL, CM_CLOTH = range(3)

# --- spheroids
S_CX, S_CY, S_CZ, S_RXY, S_RZ, S_CLS, S_MAT, S_R, S_G, S_B = range(10)
NS = 10
SM_FOLIAGE, SM_LAMP, SM_SKIN = range(3)

# --- walkers: segment ends, speed (m/s), phase (m), body radius, height, clothing rgb, skin rgb
M_X0, M_Y0, M_X1, M_Y1, M_SPEED, M_PHASE, M_RAD, M_H, M_R, M_G, M_B, M_SKIN = range(12)
NM = 12

# --- ground materials: (name, class index, linear rgb base colour)
GROUND_MATERIALS = (
    ("rough", GRASS, (0.16, 0.17, 0.08)),         # 0: unkempt ground outside painted areas
    ("asphalt", ROAD, (0.085, 0.085, 0.09)),
    ("marking", ROAD, (0.55, 0.55, 0.52)),
    ("paving", SIDEWALK, (0.30, 0.28, 0.25)),
    ("curb", SIDEWALK, (0.36, 0.35, 0.33)),
    ("grass", GRASS, (0.085, 0.17, 0.04)),
    ("gravel", SIDEWALK, (0.30, 0.26, 0.19)),
    ("lot", PARKING, (0.11, 0.105, 0.10)),
    ("lot_line", PARKING, (0.55, 0.55, 0.50)),
    ("water", WATER, (0.03, 0.06, 0.07)),
    ("bed", GRASS, (0.10, 0.075, 0.045)),         # planted soil / mulch
    ("crossing", ROAD, (0.55, 0.55, 0.52)),
)
GM = {name: i for i, (name, _, _) in enumerate(GROUND_MATERIALS)}
GROUND_CLASS = np.array([c for _, c, _ in GROUND_MATERIALS], dtype=np.uint8)
GROUND_COLOR = np.array([rgb for _, _, rgb in GROUND_MATERIALS], dtype=np.float32)

_CLASS_OK = {BUILDING, FENCE, DYNAMIC, TREE, POLE}


@dataclass
class World:
    """The hidden 3D world (see module docstring for the array layouts)."""

    origin: tuple[float, float, float]
    bounds: tuple[float, float, float, float]  # x_min, y_min, x_max, y_max (m)
    boxes: np.ndarray
    cyls: np.ndarray
    spheres: np.ndarray
    walkers: np.ndarray
    ground: list = field(default_factory=list)  # [(material index, (K,2) float64 polygon)]
    meta: dict = field(default_factory=dict)

    @property
    def frame(self) -> LocalFrame:
        """The ENU frame of the site."""
        return LocalFrame(*self.origin)

    def walkers_at(self, t_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Cylinders (bodies) and spheres (heads) of the walkers at time ``t_s`` (s)."""
        n = len(self.walkers)
        cyl = np.zeros((n, NC))
        sph = np.zeros((n, NS))
        for i, w in enumerate(self.walkers):
            dx, dy = w[M_X1] - w[M_X0], w[M_Y1] - w[M_Y0]
            length = math.hypot(dx, dy)
            s = (w[M_PHASE] + w[M_SPEED] * t_s) % (2.0 * length) if length > 0 else 0.0
            s = s if s <= length else 2.0 * length - s  # to and fro
            f = s / length if length > 0 else 0.0
            x, y = w[M_X0] + f * dx, w[M_Y0] + f * dy
            cyl[i] = (x, y, w[M_RAD], 0.0, w[M_H] * 0.87, DYNAMIC, CM_CLOTH, w[M_R], w[M_G], w[M_B])
            skin = w[M_SKIN]
            sph[i] = (x, y, w[M_H] * 0.93, w[M_H] * 0.075, w[M_H] * 0.08, DYNAMIC, SM_SKIN,
                      0.55 * skin, 0.38 * skin, 0.28 * skin)
        return cyl, sph

    # ------------------------------------------------------------------ file I/O
    def to_dict(self) -> dict:
        """The JSON document of this world (floats kept exactly)."""
        return {"format": FORMAT_NAME, "version": FORMAT_VERSION,
                "origin": {"lat": self.origin[0], "lon": self.origin[1], "h": self.origin[2]},
                "bounds": [float(v) for v in self.bounds], "meta": self.meta,
                "boxes": self.boxes.tolist(), "cyls": self.cyls.tolist(), "spheres": self.spheres.tolist(),
                "walkers": self.walkers.tolist(),
                "ground": [{"material": GROUND_MATERIALS[m][0], "polygon": np.asarray(p).tolist()}
                           for m, p in self.ground]}

    def save(self, path) -> None:
        """Write ``world.json``."""
        Path(path).write_text(json.dumps(self.to_dict(), separators=(",", ":")) + "\n", encoding="utf-8")

    @classmethod
    def load(cls, path) -> "World":
        """Read a ``world.json`` written by :meth:`save`; raises InputError naming the file."""
        p = Path(path)
        try:
            doc = json.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise InputError(f"{p}: no such file (a site folder holds world.json; make one with "
                             "'tinyloc sim site')") from None
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
            raise InputError(f"{p}: not a readable world file ({e})") from None
        return cls.from_dict(doc, str(p))

    @classmethod
    def from_dict(cls, doc: dict, name: str = "world") -> "World":
        """Build from the JSON document, checking shapes."""
        if not isinstance(doc, dict) or doc.get("format") != FORMAT_NAME:
            fmt = doc.get("format") if isinstance(doc, dict) else None
            raise InputError(f"{name}: not a tinyloc world file (format {fmt!r})")
        if doc.get("version") != FORMAT_VERSION:
            raise InputError(f"{name}: world version {doc.get('version')!r} is not {FORMAT_VERSION}")

        def arr(key, ncol):
            a = np.asarray(doc.get(key, []), dtype=np.float64)
            if a.size == 0:
                return np.zeros((0, ncol))
            if a.ndim != 2 or a.shape[1] != ncol or not np.all(np.isfinite(a)):
                raise InputError(f"{name}: '{key}' must be rows of {ncol} finite numbers")
            return a

        try:
            o = doc["origin"]
            origin = (float(o["lat"]), float(o["lon"]), float(o.get("h", 0.0)))
            bounds = tuple(float(v) for v in doc["bounds"])
            ground = []
            for g in doc.get("ground", []):
                ground.append((GM[g["material"]], np.asarray(g["polygon"], dtype=np.float64).reshape(-1, 2)))
        except (KeyError, TypeError, ValueError) as e:
            raise InputError(f"{name}: malformed world file ({e!r})") from None
        if len(bounds) != 4:
            raise InputError(f"{name}: 'bounds' must be [x_min, y_min, x_max, y_max]")
        return cls(origin, bounds, arr("boxes", NB), arr("cyls", NC), arr("spheres", NS), arr("walkers", NM),
                   ground, dict(doc.get("meta", {})))


# ---------------------------------------------------------------------- rasters
@dataclass(frozen=True)
class GroundGrid:
    """A north-up raster over the ground plane: cell (r, c) centre x = x_min + (c+0.5) res, y = y_max - (r+0.5) res."""

    data: np.ndarray
    x_min: float
    y_max: float
    res_m: float


def _grid_shape(world: World, res_m: float, margin_m: float):
    x0, y0, x1, y1 = world.bounds
    x_min, y_max = x0 - margin_m, y1 + margin_m
    cols = int(math.ceil((x1 + margin_m - x_min) / res_m))
    rows = int(math.ceil((y_max - (y0 - margin_m)) / res_m))
    return x_min, y_max, rows, cols


def _to_px(xy: np.ndarray, x_min: float, y_max: float, res_m: float, shift: int) -> np.ndarray:
    # cv2 polygon vertices are in pixel-centre coordinates; fixed point with `shift` fraction bits.
    c = (xy[:, 0] - x_min) / res_m - 0.5
    r = (y_max - xy[:, 1]) / res_m - 0.5
    return np.round(np.stack([c, r], axis=1) * (1 << shift)).astype(np.int32)


def ground_raster(world: World, *, res_m: float = 0.05, margin_m: float = 30.0) -> GroundGrid:
    """Paint the ground polygons (in order) into a uint8 material raster."""
    import cv2

    x_min, y_max, rows, cols = _grid_shape(world, res_m, margin_m)
    img = np.full((rows, cols), GM["rough"], dtype=np.uint8)
    for mat, poly in world.ground:
        pts = _to_px(np.asarray(poly, float), x_min, y_max, res_m, 4)
        cv2.fillPoly(img, [pts], int(mat), lineType=cv2.LINE_8, shift=4)
    return GroundGrid(img, x_min, y_max, res_m)


def sun_vector(azimuth_deg: float, elevation_deg: float) -> np.ndarray:
    """Unit ENU vector towards the sun; azimuth clockwise from north (the usual solar convention)."""
    az, el = math.radians(azimuth_deg), math.radians(elevation_deg)
    return np.array([math.sin(az) * math.cos(el), math.cos(az) * math.cos(el), math.sin(el)])


def shadow_raster(world: World, sun: np.ndarray, *, res_m: float = 0.1, margin_m: float = 30.0,
                  soft_px: float = 1.2) -> GroundGrid:
    """Ground light fraction (uint8, 255 = sunlit) from the static objects' shadows cast along ``sun``.

    Each object's shadow on z = 0 is the convex hull of its points projected along the sun ray
    (exact for boxes, cylinders and spheroids, which are convex); edges are softened by ``soft_px``.
    """
    import cv2

    x_min, y_max, rows, cols = _grid_shape(world, res_m, margin_m)
    img = np.full((rows, cols), 255, dtype=np.uint8)
    sx, sy, sz = (float(v) for v in sun)
    if sz < 0.05:
        return GroundGrid(img, x_min, y_max, res_m)  # sun at or below the horizon: no hard shadows
    kx, ky = -sx / sz, -sy / sz  # ground offset per metre of height

    def proj(pts3):
        return np.stack([pts3[:, 0] + kx * pts3[:, 2], pts3[:, 1] + ky * pts3[:, 2]], axis=1)

    polys = []
    for b in world.boxes:
        if b[B_MAT] == BM_FENCE_MESH:
            continue  # mesh fences cast almost no shadow
        c, s = math.cos(b[B_YAW]), math.sin(b[B_YAW])
        corners = []
        for ex, ey in ((1, 1), (1, -1), (-1, -1), (-1, 1)):
            lx, ly = ex * b[B_HX], ey * b[B_HY]
            corners.append((b[B_CX] + c * lx - s * ly, b[B_CY] + s * lx + c * ly))
        corners = np.array(corners)
        p3 = np.concatenate([np.c_[corners, np.full(4, b[B_Z0])], np.c_[corners, np.full(4, b[B_Z1])]])
        polys.append(proj(p3))
    ang = np.linspace(0, 2 * math.pi, 16, endpoint=False)
    for cy in world.cyls:
        ring = np.c_[cy[C_CX] + cy[C_R] * np.cos(ang), cy[C_CY] + cy[C_R] * np.sin(ang)]
        p3 = np.concatenate([np.c_[ring, np.full(16, cy[C_Z0])], np.c_[ring, np.full(16, cy[C_Z1])]])
        polys.append(proj(p3))
    for sp in world.spheres:
        # Silhouette of a spheroid along the sun: sample its surface densely enough for a 0.1 m raster.
        u = np.linspace(0, 2 * math.pi, 24, endpoint=False)
        v = np.linspace(-math.pi / 2, math.pi / 2, 9)
        uu, vv = np.meshgrid(u, v)
        p3 = np.stack([sp[S_CX] + sp[S_RXY] * np.cos(vv) * np.cos(uu), sp[S_CY] + sp[S_RXY] * np.cos(vv) * np.sin(uu),
                       sp[S_CZ] + sp[S_RZ] * np.sin(vv)], axis=-1).reshape(-1, 3)
        polys.append(proj(p3))
    for pg in polys:
        hull = cv2.convexHull(_to_px(pg, x_min, y_max, res_m, 0).reshape(-1, 1, 2))
        cv2.fillConvexPoly(img, hull, 0, lineType=cv2.LINE_AA)
    if soft_px > 0:
        img = cv2.GaussianBlur(img, (0, 0), soft_px)
    return GroundGrid(img, x_min, y_max, res_m)


def check_world(world: World) -> None:
    """Raise InputError if the arrays hold impossible values (negative sizes, unknown classes)."""
    if len(world.boxes) and (np.any(world.boxes[:, [B_HX, B_HY]] <= 0) or
                             np.any(world.boxes[:, B_Z1] <= world.boxes[:, B_Z0])):
        raise InputError("world: a box has a non-positive size")
    if len(world.cyls) and np.any(world.cyls[:, C_R] <= 0):
        raise InputError("world: a cylinder has a non-positive radius")
    for a, col in ((world.boxes, B_CLS), (world.cyls, C_CLS), (world.spheres, S_CLS)):
        if len(a) and not set(np.unique(a[:, col]).astype(int)) <= _CLASS_OK:
            raise InputError("world: an object has a class that cannot stand in the world")
