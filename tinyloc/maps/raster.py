"""Rasterization of class geometry into anti-aliased coverage, one band of rows at a time.

- Polygons (with holes, any number per class): exact area coverage by signed-area
  accumulation along rows (each edge adds its exact area to the cells east of it;
  a running sum along the row is the covered fraction). Exterior rings count +1,
  holes -1; overlapping polygons of one class saturate at 1.
- Lines: strokes of a given width with round caps and joins; coverage is the
  box-filtered distance ramp ``clamp(w/2 + res/2 - d, 0, res) / res``.
- Points: disks of a given radius, 8 x 8 supersampled per cell.
Classes are independent channels; within a class the union of all its shapes
is drawn (maximum of coverages).

Geometry is handed over in ENU metres and converted here to continuous cell
coordinates x = (east - x_min) / res_m (columns), y = (y_max - north) / res_m (rows).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import _kernels

DISK_SUBSAMPLES = 8


@dataclass(frozen=True)
class Grid:
    """The map raster: ``rows`` x ``cols`` cells of ``res_m`` metres, north-west corner (x_min, y_max)."""

    x_min: float
    y_max: float
    res_m: float
    rows: int
    cols: int

    def to_cells(self, xy: np.ndarray) -> np.ndarray:
        """(N, 2) ENU metres -> (N, 2) continuous (col, row) cell coordinates."""
        out = np.empty_like(xy, dtype=np.float64)
        out[:, 0] = (xy[:, 0] - self.x_min) / self.res_m
        out[:, 1] = (self.y_max - xy[:, 1]) / self.res_m
        return out


def signed_area(xy: np.ndarray) -> float:
    """Shoelace signed area of an open ring (N, 2); positive when counter-clockwise (x east, y north)."""
    x, y = xy[:, 0], xy[:, 1]
    return 0.5 * float(np.dot(x, np.roll(y, -1)) - np.dot(np.roll(x, -1), y))


class ClassGeometry:
    """Collects the shapes of one class (ENU metres) before rasterization."""

    def __init__(self):
        self.rings = []      # (ring xy, is_hole)
        self.lines = []      # (xy (N, 2), width_m)
        self.disks = []      # (xy (N, 2), radius_m)

    def add_polygon(self, rings) -> None:
        """Exterior ring first, then holes; each (N, 2) open ring in ENU metres."""
        for k, ring in enumerate(rings):
            self.rings.append((np.asarray(ring, dtype=np.float64), k > 0))

    def add_line(self, xy, width_m: float) -> None:
        self.lines.append((np.asarray(xy, dtype=np.float64), float(width_m)))

    def add_points(self, xy, radius_m: float) -> None:
        self.disks.append((np.asarray(xy, dtype=np.float64).reshape(-1, 2), float(radius_m)))

    def __bool__(self):
        return bool(self.rings or self.lines or self.disks)


def _bucket(lo: np.ndarray, hi: np.ndarray, band_rows: int, n_bands: int):
    """Items spanning rows [lo, hi] -> (order, starts): band b holds order[starts[b]:starts[b+1]]."""
    b0 = np.clip(np.floor(lo / band_rows), 0, n_bands - 1).astype(np.int64)
    b1 = np.clip(np.floor(hi / band_rows), 0, n_bands - 1).astype(np.int64)
    live = (hi >= 0) & (lo < n_bands * band_rows)
    idx = np.flatnonzero(live)
    counts = (b1 - b0 + 1)[idx]
    item = np.repeat(idx, counts)
    first = np.repeat(b0[idx], counts)
    offs = np.arange(item.size) - np.repeat(np.cumsum(counts) - counts, counts)
    band = first + offs
    o = np.argsort(band, kind="stable")
    starts = np.searchsorted(band[o], np.arange(n_bands + 1))
    return item[o], starts


class _Prepared:
    """One class's shapes in cell coordinates, bucketed by band."""

    def __init__(self, geom: ClassGeometry, grid: Grid, band_rows: int, n_bands: int):
        self.edges = np.zeros((0, 4))
        self.segs = np.zeros((0, 4))
        self.half = np.zeros(0)
        self.centres = np.zeros((0, 2))
        self.radius = np.zeros(0)
        res = grid.res_m
        edges = []
        for ring, hole in geom.rings:
            # Exterior counter-clockwise (+1 inside), holes clockwise (-1), whatever the file said.
            ccw = signed_area(ring) > 0.0
            r = ring if ccw != hole else ring[::-1]
            c = grid.to_cells(r)
            edges.append(np.hstack([c, np.roll(c, -1, axis=0)]))
        if edges:
            self.edges = np.ascontiguousarray(np.vstack(edges))
        segs, half = [], []
        for xy, w in geom.lines:
            c = grid.to_cells(xy)
            segs.append(np.hstack([c[:-1], c[1:]]))
            half.append(np.full(len(c) - 1, 0.5 * w / res))
        if segs:
            self.segs = np.ascontiguousarray(np.vstack(segs))
            self.half = np.concatenate(half)
        cen, rad = [], []
        for xy, r in geom.disks:
            cen.append(grid.to_cells(xy))
            rad.append(np.full(len(xy), r / res))
        if cen:
            self.centres = np.ascontiguousarray(np.vstack(cen))
            self.radius = np.concatenate(rad)
        e = self.edges
        self.e_order, self.e_starts = _bucket(np.minimum(e[:, 1], e[:, 3]), np.maximum(e[:, 1], e[:, 3]),
                                              band_rows, n_bands)
        s, h = self.segs, self.half
        self.s_order, self.s_starts = _bucket(np.minimum(s[:, 1], s[:, 3]) - h - 1,
                                              np.maximum(s[:, 1], s[:, 3]) + h + 1, band_rows, n_bands)
        p, r = self.centres, self.radius
        self.p_order, self.p_starts = _bucket(p[:, 1] - r - 1, p[:, 1] + r + 1, band_rows, n_bands)

    def draw(self, b: int, row0: int, cols: int, acc: np.ndarray, cov: np.ndarray) -> None:
        sel = self.e_order[self.e_starts[b]:self.e_starts[b + 1]]
        if sel.size:
            _kernels.accumulate_edges(np.ascontiguousarray(self.edges[sel]), row0, cols, acc)
            _kernels.integrate_rows(acc, cov)
        sel = self.s_order[self.s_starts[b]:self.s_starts[b + 1]]
        if sel.size:
            _kernels.stroke_segments(np.ascontiguousarray(self.segs[sel]), np.ascontiguousarray(self.half[sel]),
                                     row0, cov)
        sel = self.p_order[self.p_starts[b]:self.p_starts[b + 1]]
        if sel.size:
            _kernels.stamp_disks(np.ascontiguousarray(self.centres[sel]), np.ascontiguousarray(self.radius[sel]),
                                 row0, DISK_SUBSAMPLES, cov)


class BandRasterizer:
    """Rasterizes per-class geometry into (C, band_rows, cols) float32 coverage bands.

    Parameters
    ----------
    geoms : sequence of ClassGeometry
        One per map class, in class index order.
    grid : Grid
        The map raster.
    band_rows : int
        Rows per band (the packed map's tile size).
    surface_order : sequence of int, optional
        Ground classes from top to bottom: each keeps only what the classes above
        it leave uncovered (a lawn under a footprint is not seen), so coverage of
        these classes sums to at most 1. None leaves classes independent.
    """

    def __init__(self, geoms, grid: Grid, band_rows: int, *, surface_order=None):
        self.grid = grid
        self.band_rows = int(band_rows)
        self.n_bands = -(-grid.rows // self.band_rows)
        self.classes = [(_Prepared(g, grid, self.band_rows, self.n_bands) if g else None) for g in geoms]
        self.surface_order = tuple(surface_order) if surface_order else ()
        self._acc = np.zeros((self.band_rows, grid.cols + 2), dtype=np.float64)

    def band(self, b: int, out: np.ndarray) -> None:
        """Fill ``out`` (C, band_rows, cols) float32 with band ``b`` (rows past the map edge stay 0)."""
        out[...] = 0.0
        row0 = b * self.band_rows
        for ci, prep in enumerate(self.classes):
            if prep is not None:
                prep.draw(b, row0, self.grid.cols, self._acc, out[ci])
        if self.grid.rows < row0 + self.band_rows:
            out[:, self.grid.rows - row0:, :] = 0.0
        if self.surface_order:
            taken = np.zeros(out.shape[1:], dtype=np.float32)
            for ci in self.surface_order:
                np.minimum(out[ci], 1.0 - taken, out=out[ci])
                np.maximum(out[ci], 0.0, out=out[ci])
                taken += out[ci]
