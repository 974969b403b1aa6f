"""Reading and validating GeoJSON (RFC 7946) FeatureCollections of a site.

Positions are (longitude, latitude[, height]) in WGS84 degrees, as RFC 7946
fixes. Every fault is a :class:`~tinyloc.errors.GeoJSONError` whose one-line
message names the source, the feature (index and id) and the fault.

A FeatureCollection may carry a foreign member ``"origin": {"lat": .., "lon": ..,
"h": ..}`` (degrees, metres) that fixes the map's ENU origin; the compiler uses
it when no origin is given explicitly.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import json
import math
from pathlib import Path

import numpy as np

from ..errors import GeoJSONError
from . import _kernels

GEOMETRY_TYPES = ("Point", "MultiPoint", "LineString", "MultiLineString", "Polygon", "MultiPolygon",
                  "GeometryCollection")
MAX_NESTING = 8  # GeometryCollection depth we follow (RFC 7946 discourages nesting at all)


@dataclass
class Feature:
    """One feature, flattened to its parts (all arrays are (N, 2) lon/lat degrees, float64).

    Polygon rings are stored without the closing repeat of the first position.
    """

    index: int
    fid: object
    properties: dict
    points: list = field(default_factory=list)
    lines: list = field(default_factory=list)
    polygons: list = field(default_factory=list)  # each: [exterior, hole, hole, ...]

    @property
    def kind(self) -> str:
        """"point", "line", "area", "mixed" or "none" (no geometry)."""
        kinds = [k for k, parts in (("point", self.points), ("line", self.lines), ("area", self.polygons)) if parts]
        if not kinds:
            return "none"
        return kinds[0] if len(kinds) == 1 else "mixed"

    def label(self) -> str:
        """How messages name this feature."""
        return f"feature {self.index}" + (f" (id {self.fid!r})" if self.fid is not None else "")


@dataclass
class FeatureSet:
    """A parsed FeatureCollection."""

    source: str
    features: list
    origin: tuple | None = None  # (lat, lon, h) from the "origin" foreign member, if any

    def bounds_lonlat(self):
        """(lon_min, lat_min, lon_max, lat_max) over every position, or None when there is none."""
        arrs = [a for f in self.features for a in _all_arrays(f)]
        if not arrs:
            return None
        allp = np.concatenate(arrs)
        return float(allp[:, 0].min()), float(allp[:, 1].min()), float(allp[:, 0].max()), float(allp[:, 1].max())


def _all_arrays(f: Feature):
    yield from f.points
    yield from f.lines
    for poly in f.polygons:
        yield from poly


def load_geojson(src) -> FeatureSet:
    """Read and validate a GeoJSON FeatureCollection.

    Parameters
    ----------
    src : str, Path or dict
        A file path, or an already-parsed FeatureCollection (dict).

    Returns
    -------
    FeatureSet
        Features with validated lon/lat arrays.

    Raises
    ------
    GeoJSONError
        Not JSON, not a FeatureCollection, malformed or out-of-range positions,
        unknown geometry type, self-intersecting polygon ring, or no features.
    """
    if isinstance(src, dict):
        name, doc = "<FeatureCollection>", src
    else:
        p = Path(src)
        name = str(p)
        try:
            raw = p.read_bytes()
        except FileNotFoundError:
            raise GeoJSONError(f"{name}: no such file") from None
        except IsADirectoryError:
            raise GeoJSONError(f"{name}: is a directory, not a GeoJSON file") from None
        except OSError as e:
            raise GeoJSONError(f"{name}: cannot read ({e.strerror or e})") from None
        try:
            doc = json.loads(raw.decode("utf-8-sig"))
        except UnicodeDecodeError:
            raise GeoJSONError(f"{name}: not JSON (not UTF-8 text)") from None
        except json.JSONDecodeError as e:
            raise GeoJSONError(f"{name}: not JSON ({e.msg} at line {e.lineno} column {e.colno})") from None
        except RecursionError:
            raise GeoJSONError(f"{name}: not JSON we can read (nested too deeply)") from None
    if not isinstance(doc, dict):
        raise GeoJSONError(f"{name}: not a FeatureCollection (top level is a JSON {type(doc).__name__})")
    if doc.get("type") != "FeatureCollection":
        raise GeoJSONError(f"{name}: not a FeatureCollection (top-level \"type\" is {doc.get('type')!r})")
    crs = doc.get("crs")
    if crs is not None:
        cname = str((crs.get("properties") or {}).get("name", "")) if isinstance(crs, dict) else str(crs)
        if not any(t in cname.upper() for t in ("CRS84", "4326")):
            raise GeoJSONError(f"{name}: declares coordinate system {cname or crs!r}; GeoJSON (RFC 7946) positions "
                               "must be WGS84 longitude/latitude: reproject the data first")
    feats = doc.get("features")
    if not isinstance(feats, list):
        raise GeoJSONError(f"{name}: FeatureCollection has no \"features\" array")
    if not feats:
        raise GeoJSONError(f"{name}: empty map (the FeatureCollection has no features)")
    out = []
    for i, fd in enumerate(feats):
        out.append(_feature(name, i, fd))
    return FeatureSet(name, out, _origin(name, doc.get("origin")))


def _origin(name, o):
    if o is None:
        return None
    try:
        lat, lon, h = float(o["lat"]), float(o["lon"]), float(o.get("h", 0.0))
    except (TypeError, KeyError, ValueError):
        raise GeoJSONError(f"{name}: \"origin\" must be an object {{\"lat\": deg, \"lon\": deg, \"h\": m}}") from None
    if not (math.isfinite(lat) and math.isfinite(lon) and math.isfinite(h)) or abs(lat) > 90 or abs(lon) > 180:
        raise GeoJSONError(f"{name}: \"origin\" latitude/longitude out of range or not finite")
    return lat, lon, h


def _feature(name: str, i: int, fd) -> Feature:
    if not isinstance(fd, dict) or fd.get("type") != "Feature":
        got = fd.get("type") if isinstance(fd, dict) else type(fd).__name__
        raise GeoJSONError(f"{name}: feature {i}: not a Feature object (type {got!r})")
    props = fd.get("properties")
    if props is None:
        props = {}
    if not isinstance(props, dict):
        raise GeoJSONError(f"{name}: feature {i}: \"properties\" must be an object or null")
    f = Feature(i, fd.get("id"), props)
    geom = fd.get("geometry")
    if geom is not None:
        _geometry(name, f, geom, 0)
    return f


def _geometry(name: str, f: Feature, g, depth: int) -> None:
    where = f"{name}: {f.label()}"
    if not isinstance(g, dict):
        raise GeoJSONError(f"{where}: \"geometry\" must be an object or null")
    t = g.get("type")
    if t not in GEOMETRY_TYPES:
        raise GeoJSONError(f"{where}: unknown geometry type {t!r} (expected one of {', '.join(GEOMETRY_TYPES)})")
    if t == "GeometryCollection":
        if depth >= MAX_NESTING:
            raise GeoJSONError(f"{where}: GeometryCollection nested deeper than {MAX_NESTING}")
        gs = g.get("geometries")
        if not isinstance(gs, list):
            raise GeoJSONError(f"{where}: GeometryCollection has no \"geometries\" array")
        for sub in gs:
            _geometry(name, f, sub, depth + 1)
        return
    c = g.get("coordinates")
    if t == "Point":
        f.points.append(_positions(where, [c], 1))
    elif t == "MultiPoint":
        if not isinstance(c, list):
            raise GeoJSONError(f"{where}: MultiPoint coordinates must be an array of positions")
        if c:
            f.points.append(_positions(where, c, 1))
    elif t == "LineString":
        f.lines.append(_line(where, c))
    elif t == "MultiLineString":
        for part in _list(where, c, t):
            f.lines.append(_line(where, part))
    elif t == "Polygon":
        f.polygons.append(_polygon(where, c))
    else:  # MultiPolygon
        for part in _list(where, c, t):
            f.polygons.append(_polygon(where, part))


def _list(where, c, t):
    if not isinstance(c, list):
        raise GeoJSONError(f"{where}: {t} coordinates must be an array")
    return c


def _positions(where: str, c, min_n: int) -> np.ndarray:
    if not isinstance(c, list) or len(c) < min_n:
        raise GeoJSONError(f"{where}: malformed coordinates (expected at least {min_n} position(s))")
    rows = []
    for p in c:
        if not isinstance(p, list) or not 2 <= len(p) <= 4 or not all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in p):
            raise GeoJSONError(f"{where}: malformed position {_short(p)} (expected [lon, lat] numbers)")
        rows.append((float(p[0]), float(p[1])))
    a = np.array(rows, dtype=np.float64)
    if not np.all(np.isfinite(a)):
        raise GeoJSONError(f"{where}: coordinates not finite (NaN or infinity)")
    bad = np.flatnonzero((np.abs(a[:, 0]) > 180.0) | (np.abs(a[:, 1]) > 90.0))
    if bad.size:
        lon, lat = a[bad[0]]
        raise GeoJSONError(f"{where}: coordinates out of range (lon {lon:g}, lat {lat:g}; "
                           "need lon in [-180, 180], lat in [-90, 90], in that order)")
    return a


def _short(p) -> str:
    s = json.dumps(p) if not isinstance(p, float) else repr(p)
    return s if len(s) <= 40 else s[:37] + "..."


def _line(where: str, c) -> np.ndarray:
    a = _positions(where, c, 2)
    a = _dedup(a)
    if len(a) < 2:
        # A line of one distinct position still marks a spot: keep it as a degenerate segment.
        a = np.vstack([a, a])
    return a


def _dedup(a: np.ndarray) -> np.ndarray:
    keep = np.ones(len(a), dtype=bool)
    keep[1:] = np.any(a[1:] != a[:-1], axis=1)
    return a[keep]


def _polygon(where: str, c) -> list:
    if not isinstance(c, list) or not c:
        raise GeoJSONError(f"{where}: Polygon coordinates must be a non-empty array of rings")
    rings = []
    for k, rc in enumerate(c):
        a = _dedup(_positions(where, rc, 3))
        if len(a) > 1 and np.all(a[0] == a[-1]):
            a = a[:-1]  # RFC 7946 closes rings by repeating the first position; we keep it open
        if len(a) < 3:
            raise GeoJSONError(f"{where}: polygon ring {k} has fewer than 3 distinct positions")
        if _area2(a) == 0.0:
            raise GeoJSONError(f"{where}: polygon ring {k} has zero area (all positions on one line)")
        hit = ring_self_intersection(a)
        if hit is not None:
            lon, lat = a[hit[1]]
            raise GeoJSONError(f"{where}: self-intersecting polygon (ring {k}, edges {hit[0]} and {hit[1]} "
                               f"cross near lon {lon:.7f}, lat {lat:.7f})")
        rings.append(a)
    return rings


def ring_self_intersection(xy: np.ndarray):
    """First pair of non-adjacent edges of an open ring (N, 2) that touch or cross, or None.

    Planar test on the given coordinates; topology is unchanged by the near-affine
    map from lon/lat to local ENU over a site.
    """
    xy = np.ascontiguousarray(xy, dtype=np.float64)
    if len(xy) < 4:
        return None  # a triangle cannot cross itself (a flat one is caught as zero area)
    nxt = np.roll(xy, -1, axis=0)
    order = np.argsort(np.minimum(xy[:, 0], nxt[:, 0]), kind="stable").astype(np.int64)
    i, j = _kernels.ring_self_hit(xy, order)
    return None if i < 0 else (int(i), int(j))


def _area2(xy: np.ndarray) -> float:
    x, y = xy[:, 0], xy[:, 1]
    return float(np.dot(x, np.roll(y, -1)) - np.dot(np.roll(x, -1), y))
