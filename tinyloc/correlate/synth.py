"""Generated map rasters and bird's-eye grids at planted poses, for calibration, tests and benchmarks.

Nothing here runs on the robot. A seeded street-grid site is drawn straight into
map channels (anti-aliased coverage 0..1, row 0 north, ``MAP_CLASSES`` order);
a bird's-eye grid is then cut from it at a planted pose, seen through a camera
wedge, with noise and map errors, following the layout of docs/interfaces.md.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..classes import BUILDING, FENCE, GRASS, NUM_MAP_CLASSES, PARKING, POLE, ROAD, SIDEWALK, TREE, WATER

VERTICAL = (BUILDING, TREE, POLE, FENCE)
_SS = 4  # supersampling factor for anti-aliased coverage


@dataclass(frozen=True)
class SyntheticBev:
    """A bird's-eye grid in the layout of ``tinyloc.perception.overhead.BevGrid`` (duck-typed)."""

    evidence: np.ndarray  # (C, h, w) float32
    free: np.ndarray  # (h, w) float32
    visible: np.ndarray  # (h, w) float32
    res_m: float
    origin_row: float
    origin_col: float
    status: str = "ok"


def street_map(size: int, seed: int, *, block_m: tuple[float, float] = (34.0, 60.0), res_m: float = 0.5,
               straight: bool = False) -> np.ndarray:
    """A seeded street-grid site as map channels.

    Parameters
    ----------
    size : int
        Raster side (cells).
    seed : int
        Generator seed; the same seed gives the same raster.
    block_m : (float, float)
        Range of block sizes between road centre lines (m).
    res_m : float
        Cell size (m).
    straight : bool
        If true, one long east-west street with uniform sidewalks and lawns and
        nothing else: a deliberately ambiguous scene (the pose along the street is
        unobservable).

    Returns
    -------
    ndarray, shape (NUM_MAP_CLASSES, size, size), float32
    """
    rng = np.random.default_rng(seed)
    n = size * _SS
    px = _SS / res_m  # supersampled pixels per metre
    layers = np.zeros((NUM_MAP_CLASSES, n, n), np.uint8)
    layers[GRASS][:] = 1
    if straight:
        yc = n // 2
        _hband(layers[SIDEWALK], yc, 7.0 * px)
        _hband(layers[ROAD], yc, 3.5 * px)
        return _coverage(layers, size)
    # Road centre lines at irregular spacing in both directions.
    xs, ys = _lines(rng, n, px, block_m), _lines(rng, n, px, block_m)
    road_half = {x: rng.uniform(2.5, 4.5) * px for x in xs}
    road_half_y = {y: rng.uniform(2.5, 4.5) * px for y in ys}
    for x in xs:
        _vband(layers[SIDEWALK], x, road_half[x] + 2.5 * px)
    for y in ys:
        _hband(layers[SIDEWALK], y, road_half_y[y] + 2.5 * px)
    for x in xs:
        _vband(layers[ROAD], x, road_half[x])
    for y in ys:
        _hband(layers[ROAD], y, road_half_y[y])
    edges_x = [0] + xs + [n]
    edges_y = [0] + ys + [n]
    for bx0, bx1 in zip(edges_x[:-1], edges_x[1:]):
        for by0, by1 in zip(edges_y[:-1], edges_y[1:]):
            _block(rng, layers, bx0, bx1, by0, by1, px)
    # Ground classes are exclusive: paint order decides, later wins.
    for lower, upper in ((GRASS, SIDEWALK), (GRASS, PARKING), (GRASS, WATER), (SIDEWALK, ROAD),
                         (GRASS, ROAD), (PARKING, ROAD), (GRASS, BUILDING), (SIDEWALK, BUILDING),
                         (PARKING, BUILDING)):
        layers[lower][layers[upper] > 0] = 0
    return _coverage(layers, size)


def _lines(rng, n, px, block_m):
    out, p = [], rng.uniform(5.0, 25.0) * px
    while p < n:
        out.append(int(p))
        p += rng.uniform(*block_m) * px
    return out


def _hband(img, yc, half):
    img[max(0, int(yc - half)):max(0, int(yc + half))] = 1


def _vband(img, xc, half):
    img[:, max(0, int(xc - half)):max(0, int(xc + half))] = 1


def _block(rng, layers, x0, x1, y0, y1, px):
    m = 8.5 * px  # road half width + sidewalk, roughly
    bx0, bx1, by0, by1 = x0 + m, x1 - m, y0 + m, y1 - m
    if bx1 - bx0 < 6 * px or by1 - by0 < 6 * px:
        return
    kind = rng.uniform()
    if kind < 0.12:
        cv2.rectangle(layers[PARKING], (int(bx0), int(by0)), (int(bx1), int(by1)), 1, -1)
    elif kind < 0.18:
        c = (int((bx0 + bx1) / 2), int((by0 + by1) / 2))
        ax = (int((bx1 - bx0) / 3), int((by1 - by0) / 3))
        cv2.ellipse(layers[WATER], c, ax, float(rng.uniform(0, 180)), 0, 360, 1, -1)
    else:
        # A few buildings of random footprint, set back from the sidewalk.
        for _ in range(int(rng.integers(1, 4))):
            w = rng.uniform(6.0, 20.0) * px
            h = rng.uniform(6.0, 20.0) * px
            cx = rng.uniform(bx0 + w / 2, max(bx0 + w / 2 + 1, bx1 - w / 2))
            cy = rng.uniform(by0 + h / 2, max(by0 + h / 2 + 1, by1 - h / 2))
            ang = float(rng.choice([0.0, 0.0, rng.uniform(-30, 30)]))
            box = cv2.boxPoints(((cx, cy), (w, h), ang)).astype(np.int32)
            cv2.fillConvexPoly(layers[BUILDING], box, 1)
        if rng.uniform() < 0.4:
            cv2.rectangle(layers[FENCE], (int(bx0), int(by0)), (int(bx1), int(by1)), 1, max(1, int(0.3 * px)))
    # Street trees and poles along the block edge.
    for _ in range(int(rng.integers(0, 7))):
        side = rng.integers(4)
        t = rng.uniform()
        if side == 0:
            p = (bx0 + t * (bx1 - bx0), by0 - 1.2 * px)
        elif side == 1:
            p = (bx0 + t * (bx1 - bx0), by1 + 1.2 * px)
        elif side == 2:
            p = (bx0 - 1.2 * px, by0 + t * (by1 - by0))
        else:
            p = (bx1 + 1.2 * px, by0 + t * (by1 - by0))
        cls, r = (TREE, 0.6) if rng.uniform() < 0.6 else (POLE, 0.25)
        cv2.circle(layers[cls], (int(p[0]), int(p[1])), max(1, int(r * px)), 1, -1)


def _coverage(layers, size):
    out = np.empty((NUM_MAP_CLASSES, size, size), np.float32)
    for c in range(NUM_MAP_CLASSES):
        out[c] = cv2.resize(layers[c].astype(np.float32), (size, size), interpolation=cv2.INTER_AREA)
    return out


def cut_bev(map_channels: np.ndarray, row: float, col: float, yaw_rad: float, rng: np.random.Generator, *,
            shape: tuple[int, int] = (64, 64), origin: tuple[float, float] = (32.0, 0.0), res_m: float = 0.5,
            fov_deg: float = 90.0, range_m: float = 30.0, noise: float = 0.15, dropout: float = 0.2,
            clutter: float = 0.02, map_error_cells: float = 0.0) -> SyntheticBev:
    """A bird's-eye grid seen by a robot at a planted pose in a map raster.

    Parameters
    ----------
    map_channels : ndarray (C, H, W)
        Map coverage the "world" is taken from (row 0 north).
    row, col : float
        Continuous map cell coordinates of the robot origin (cell centre at +0.5).
    yaw_rad : float
        Robot yaw (rad, CCW from east).
    rng : numpy Generator
        Source of noise (seeded by the caller).
    noise : float
        Std of additive noise on the evidence of visible cells.
    dropout : float
        Fraction of visible cells whose evidence is lost (occlusion, misclassification).
    clutter : float
        Probability per visible cell of spurious vertical evidence (a pole, a person).
    map_error_cells : float
        Std (cells) of a smooth random displacement of the world against the map
        (map survey error); 0 means the world equals the map.
    """
    h, w = shape
    orow, ocol = origin
    rr, cc = np.mgrid[0:h, 0:w].astype(np.float64)
    xf = cc + 0.5 - ocol  # body forward, cells
    yl = orow - (rr + 0.5)  # body left, cells
    cy, sy = math.cos(yaw_rad), math.sin(yaw_rad)
    mc = col + cy * xf - sy * yl  # map col (continuous)
    mr = row - (sy * xf + cy * yl)  # map row (continuous)
    if map_error_cells > 0:
        sh = rng.normal(0.0, map_error_cells, size=2)
        mc = mc + sh[0]
        mr = mr + sh[1]
    rng_c = np.hypot(xf, yl) * res_m
    bearing = np.degrees(np.arctan2(yl, xf))
    visible = ((np.abs(bearing) <= fov_deg / 2) & (rng_c <= range_m) & (rng_c >= 1.0)).astype(np.float32)
    mapx = (mc - 0.5).astype(np.float32)
    mapy = (mr - 0.5).astype(np.float32)
    C = map_channels.shape[0]
    world = np.empty((C, h, w), np.float32)
    for c in range(C):
        world[c] = cv2.remap(map_channels[c], mapx, mapy, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                             borderValue=0.0)
    vert = np.clip(sum(world[c] for c in VERTICAL), 0.0, 1.0)
    # Vertical things are seen only by their ground contact: their near edge, a
    # thin band; an occluder hides what lies behind it along the ray.
    edge = np.clip(vert - cv2.erode(vert, np.ones((3, 3), np.float32)), 0.0, 1.0)
    shadow = _ray_shadow(vert, orow, ocol)
    vis = visible * (1.0 - shadow)
    ev = np.empty_like(world)
    for c in range(C):
        base = edge * world[c] / np.maximum(vert, 1e-6) if c in VERTICAL else world[c] * (1.0 - vert)
        ev[c] = base * vis
    keep = (rng.uniform(size=(h, w)) >= dropout).astype(np.float32)
    ev *= keep
    ev += rng.normal(0.0, noise, size=ev.shape).astype(np.float32) * vis
    spur = (rng.uniform(size=(h, w)) < clutter) & (vis > 0)
    ev[POLE][spur] = 1.0
    np.clip(ev, 0.0, 1.0, out=ev)
    free = np.clip((1.0 - vert) * vis * keep + rng.normal(0.0, noise, (h, w)).astype(np.float32) * vis, 0.0, 1.0)
    return SyntheticBev(ev.astype(np.float32), free.astype(np.float32), vis.astype(np.float32), res_m, orow, ocol)


def _ray_shadow(vert, orow, ocol):
    """1 where a ray from the robot origin already passed through a vertical thing."""
    h, w = vert.shape
    rr, cc = np.mgrid[0:h, 0:w].astype(np.float64)
    dy, dx = rr + 0.5 - orow, cc + 0.5 - ocol
    dist = np.hypot(dx, dy)
    shadow = np.zeros((h, w), np.float32)
    occ = vert > 0.5
    steps = np.linspace(0.0, 1.0, 48, endpoint=False)[1:]
    for t in steps:
        r = np.clip((orow + dy * t).astype(int), 0, h - 1)
        c = np.clip((ocol + dx * t).astype(int), 0, w - 1)
        hit = occ[r, c] & (dist * (1.0 - t) > 1.5)
        shadow[hit] = 1.0
    return shadow
