"""The map compiler: GeoJSON FeatureCollection (lon/lat) + class rules -> packed map file.

Features are matched to classes by the rules (:mod:`tinyloc.maps.rules`),
projected to the ENU plane of the map's origin, rasterized band by band into
anti-aliased coverage (:mod:`tinyloc.maps.raster`) and written as tiles
(:mod:`tinyloc.maps.packfile`). Memory stays at a few bands of the map, whatever
its size.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
import math
from pathlib import Path
import time

import numpy as np

from ..classes import BUILDING, GRASS, MAP_CLASSES, NUM_MAP_CLASSES, PARKING, ROAD, SIDEWALK, WATER
from ..errors import GeoJSONError, InputError
from ..geo import LocalFrame, check_latlon
from .geojson import load_geojson
from .packfile import MapMeta, PackWriter, quantize
from .raster import BandRasterizer, ClassGeometry, Grid
from .rules import IGNORED, as_rules


@dataclass(frozen=True)
class PackParams:
    """Parameters of the map compiler.

    Parameters
    ----------
    res_m : float
        Cell size (m).
    tile : int
        Tile side (cells); a window read touches a few tiles. 128 (64 m at 0.5 m): a 128 m window
        touches at most 9 tiles; larger tiles make smaller files (fewer tile edges, where the coding
        starts afresh) and slower first reads.
    margin_m : float
        Empty border around the mapped features (m).
    max_side_m : float
        Largest extent of one map per side (m); beyond it the data is probably
        stray (or the site should be split).
    surface_order : tuple of int
        Ground classes from top to bottom; each keeps only the ground the classes
        above leave uncovered (see :class:`~tinyloc.maps.raster.BandRasterizer`).
        Empty tuple: classes are independent.
    levels : int
        Coverage steps stored (2..256). 16 (steps of 1/15) places an edge to a
        fifteenth of a cell and makes files far smaller than 256 steps.
    """

    res_m: float = 0.5
    tile: int = 128
    margin_m: float = 4.0
    max_side_m: float = 20000.0
    surface_order: tuple = (BUILDING, WATER, ROAD, PARKING, SIDEWALK, GRASS)
    levels: int = 16

    def __post_init__(self):
        if not 2 <= self.levels <= 256:
            raise InputError(f"coverage levels {self.levels} outside 2..256")
        if not (math.isfinite(self.res_m) and 0.02 <= self.res_m <= 50.0):
            raise InputError(f"resolution {self.res_m!r} m is outside 0.02..50 m")
        if not 8 <= self.tile <= 1024:
            raise InputError(f"tile size {self.tile} is outside 8..1024 cells")
        if not (math.isfinite(self.margin_m) and 0.0 <= self.margin_m <= 1000.0):
            raise InputError(f"margin {self.margin_m!r} m is outside 0..1000 m")


@dataclass
class PackReport:
    """What the compiler did (counts are features; a feature with several parts counts once per class)."""

    source: str
    out_path: str
    features: int
    mapped: dict                      # class name -> features drawn in that class
    unmapped: int                     # features no rule matched (or sizeless points/lines)
    ignored: int                      # features a rule deliberately skipped
    no_geometry: int                  # features with "geometry": null
    unmapped_keys: list               # most common property keys of unmapped features, [(key, count)]
    origin: tuple                     # (lat, lon, h)
    res_m: float
    rows: int
    cols: int
    tiles: int
    empty_tiles: int
    file_bytes: int
    seconds: float
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        d = dict(self.__dict__)
        d["origin"] = {"lat": self.origin[0], "lon": self.origin[1], "h": self.origin[2]}
        d["unmapped_keys"] = [{"key": k, "count": n} for k, n in self.unmapped_keys]
        return d

    def lines(self) -> list:
        """Human-readable summary, one fact per line."""
        out = [f"packed {self.source} -> {self.out_path} ({self.file_bytes / 1024:.1f} KiB, {self.seconds:.2f} s)",
               f"  {self.rows} x {self.cols} cells at {self.res_m:g} m "
               f"({self.cols * self.res_m:.0f} m east x {self.rows * self.res_m:.0f} m north), "
               f"{self.tiles} tiles ({self.empty_tiles} empty)",
               f"  origin lat {self.origin[0]:.7f}, lon {self.origin[1]:.7f}, h {self.origin[2]:.2f} m",
               f"  {self.features} features: " + ", ".join(f"{n} {c}" for c, n in self.mapped.items() if n)]
        extra = f"  unmapped {self.unmapped}, ignored by rules {self.ignored}, without geometry {self.no_geometry}"
        out.append(extra)
        if self.unmapped_keys:
            out.append("  unmapped features most often carry: " +
                       ", ".join(f"{k} ({n})" for k, n in self.unmapped_keys))
        out += [f"  note: {n}" for n in self.notes]
        return out


def _resolve_origin(origin, fs):
    if origin is not None:
        lat, lon = float(origin[0]), float(origin[1])
        h = float(origin[2]) if len(origin) > 2 else 0.0
        check_latlon(lat, lon, "map origin")
        return lat, lon, h
    if fs.origin is not None:
        return fs.origin
    b = fs.bounds_lonlat()
    if b is None:
        raise GeoJSONError(f"{fs.source}: empty map (no feature has any geometry)")
    return 0.5 * (b[1] + b[3]), 0.5 * (b[0] + b[2]), 0.0


def pack_geojson(src, out_path, *, res_m: float = 0.5, rules=None, progress=None, origin=None,
                 params: PackParams | None = None) -> PackReport:
    """Compile a GeoJSON FeatureCollection into a packed map file.

    Parameters
    ----------
    src : str, Path or dict
        GeoJSON file (RFC 7946, lon/lat) or an already-parsed FeatureCollection.
    out_path : str or Path
        Packed map to write (``.tlm``); written atomically.
    res_m : float
        Cell size (m); ignored when ``params`` is given.
    rules : None, path or Rules
        Class rules; None uses the bundled defaults.
    progress : callable, optional
        ``progress(done, total, what)`` called as features are matched (``what`` =
        "features") and as bands of rows are rasterized and written ("bands").
    origin : (lat, lon[, h]), optional
        ENU origin of the map (deg, deg, m). Default: the collection's ``"origin"``
        member, else the centre of the features' bounding box at h = 0.
    params : PackParams, optional
        All compiler parameters.

    Returns
    -------
    PackReport

    Raises
    ------
    GeoJSONError, RulesError, InputError
        Bad source, bad rules, nothing to draw, or an extent beyond ``max_side_m``.
    """
    t_start = time.perf_counter()
    prm = params or PackParams(res_m=res_m)
    out_path = Path(out_path)
    if not out_path.parent.is_dir():  # fail before the long part
        raise InputError(f"{out_path}: directory {out_path.parent} does not exist")
    fs = load_geojson(src)
    rl = as_rules(rules)
    lat0, lon0, h0 = _resolve_origin(origin, fs)
    frame = LocalFrame(lat0, lon0, h0)

    # Match every part of every feature; project all positions in one call.
    parts = []  # (class, kind, array index, size_m, polygon ring count)
    arrays = []
    mapped_by_class = [set() for _ in range(NUM_MAP_CLASSES)]
    unmapped_keys = Counter()
    n_unmapped = n_ignored = n_nogeom = 0
    n_feat = len(fs.features)
    for fi, f in enumerate(fs.features):
        if progress is not None and (fi % 5000 == 0 or fi == n_feat - 1):
            progress(fi + 1, n_feat, "features")
        if f.kind == "none":
            n_nogeom += 1
            continue
        drawn = ignored = False
        for kind, items in (("point", f.points), ("line", f.lines), ("area", f.polygons)):
            if not items:
                continue
            m = rl.match(f.properties, kind)
            if m is IGNORED:
                ignored = True
                continue
            if m is None:
                continue
            size = {"point": m.radius_m, "line": m.width_m, "area": 1.0}[kind]
            if not size > 0.0:
                continue  # e.g. a building given as a point: no footprint to draw
            for it in items:
                rings = it if kind == "area" else [it]
                parts.append((m.class_index, kind, len(arrays), size, len(rings)))
                arrays.extend(rings)
            drawn = True
            mapped_by_class[m.class_index].add(f.index)
        if not drawn:
            if ignored:
                n_ignored += 1
            else:
                n_unmapped += 1
                unmapped_keys.update(str(k) for k in f.properties)
    if not parts:
        raise GeoJSONError(f"{fs.source}: empty map (none of the {len(fs.features)} features matched a class rule: "
                           f"{n_unmapped} unmapped, {n_ignored} ignored, {n_nogeom} without geometry)")
    lens = [len(a) for a in arrays]
    allp = np.concatenate(arrays)
    x, y = frame.to_enu_xy(allp[:, 1], allp[:, 0])
    enu = np.stack([np.atleast_1d(x), np.atleast_1d(y)], axis=1)
    splits = np.split(enu, np.cumsum(lens)[:-1])

    geoms = [ClassGeometry() for _ in range(NUM_MAP_CLASSES)]
    lo = np.full(2, np.inf)
    hi = np.full(2, -np.inf)
    for ci, kind, k, size, nring in parts:
        rings = splits[k:k + nring]
        pad = 0.5 * size if kind == "line" else (size if kind == "point" else 0.0)
        for r in rings:
            lo = np.minimum(lo, r.min(axis=0) - pad)
            hi = np.maximum(hi, r.max(axis=0) + pad)
        if kind == "area":
            geoms[ci].add_polygon(rings)
        elif kind == "line":
            geoms[ci].add_line(rings[0], size)
        else:
            geoms[ci].add_points(rings[0], size)
    span = hi - lo
    if np.any(span > prm.max_side_m):
        raise GeoJSONError(f"{fs.source}: features span {span[0] / 1000:.1f} km x {span[1] / 1000:.1f} km, more than "
                           f"the {prm.max_side_m / 1000:g} km one map may cover (stray coordinates, or split the site)")
    res = prm.res_m
    x_min = math.floor((lo[0] - prm.margin_m) / res) * res
    y_max = math.ceil((hi[1] + prm.margin_m) / res) * res
    cols = max(1, int(math.ceil((hi[0] + prm.margin_m - x_min) / res - 1e-9)))
    rows = max(1, int(math.ceil((y_max - (lo[1] - prm.margin_m)) / res - 1e-9)))
    grid = Grid(x_min, y_max, res, rows, cols)
    # Channels are the classes in index order, so the surface order's classes are the partition channels.
    meta = MapMeta(lat0, lon0, h0, res, x_min, y_max, rows, cols, prm.tile,
                   tuple(c.name for c in MAP_CLASSES), tuple(c.index for c in MAP_CLASSES),
                   partition=tuple(sorted(set(prm.surface_order))))

    ras = BandRasterizer(geoms, grid, prm.tile, surface_order=prm.surface_order)
    t = prm.tile
    band = np.zeros((NUM_MAP_CLASSES, t, cols), dtype=np.float32)
    block = np.zeros((NUM_MAP_CLASSES, t, t), dtype=np.uint8)
    with PackWriter(out_path, meta) as w:
        for b in range(ras.n_bands):
            ras.band(b, band)
            q = quantize(band, prm.levels)
            for tc in range(meta.tile_cols):
                src_blk = q[:, :, tc * t:(tc + 1) * t]
                block[...] = 0
                block[:, :, :src_blk.shape[2]] = src_blk
                w.write_tile(b, tc, block)
            if progress is not None:
                progress(b + 1, ras.n_bands, "bands")
    size = out_path.stat().st_size
    notes = []
    if n_unmapped:
        notes.append(f"{n_unmapped} feature(s) matched no rule and are not in the map (see --rules)")
    return PackReport(
        source=fs.source, out_path=str(out_path), features=len(fs.features),
        mapped={c.name: len(mapped_by_class[c.index]) for c in MAP_CLASSES},
        unmapped=n_unmapped, ignored=n_ignored, no_geometry=n_nogeom,
        unmapped_keys=unmapped_keys.most_common(5), origin=(lat0, lon0, h0), res_m=res, rows=rows, cols=cols,
        tiles=meta.tile_rows * meta.tile_cols, empty_tiles=w.empty_tiles, file_bytes=size,
        seconds=time.perf_counter() - t_start, notes=notes)
