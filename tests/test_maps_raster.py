"""Rasterization: exact polygon coverage, strokes and disks, checked against independent references.

References: the shoelace (surveyor's) formula for polygon area; Sutherland-Hodgman
clipping of the polygon to every cell (slow, obviously right, tests/_maps_helpers.py);
OpenCV's cv2.fillPoly on a 16x supersampled grid (independent reference library);
the capsule area L*w + pi*w^2/4 and disk area pi*r^2 (geometry handbook formulas).
"""

import cv2
import numpy as np
import pytest

from tinyloc.maps.raster import BandRasterizer, ClassGeometry, Grid

from _maps_helpers import circle, ref_capsule_coverage, ref_coverage, shoelace, star_polygon


def rasterize(geom, rows, cols, band=16):
    """One class on a res 1 grid whose cell (col, row) is ENU (x, -y): returns (rows, cols) coverage."""
    grid = Grid(0.0, 0.0, 1.0, rows, cols)
    ras = BandRasterizer([geom], grid, band)
    out = np.zeros((rows, cols), dtype=np.float32)
    buf = np.zeros((1, band, cols), dtype=np.float32)
    for b in range(ras.n_bands):
        ras.band(b, buf)
        k = min(band, rows - b * band)
        out[b * band:b * band + k] = buf[0, :k]
    return out


def to_enu(cells):
    c = np.asarray(cells, float)
    return np.stack([c[:, 0], -c[:, 1]], axis=1)


@pytest.mark.parametrize("seed", range(6))
def test_polygon_coverage_matches_cell_clipping_reference(seed):
    rng = np.random.default_rng(seed)
    rows, cols = 40, 44
    ext = star_polygon(rng, (22.3, 19.7), 6.0, 18.0, int(rng.integers(5, 14)))
    hole = star_polygon(rng, (22.0, 20.0), 1.0, 4.0, 6)[::-1]
    g = ClassGeometry()
    g.add_polygon([to_enu(ext), to_enu(hole)])
    got = rasterize(g, rows, cols, band=int(rng.integers(8, 24)))
    want = ref_coverage([ext, hole], rows, cols)
    assert np.max(np.abs(got - want)) < 2e-5


def test_orientation_of_rings_does_not_matter():
    rng = np.random.default_rng(7)
    ext = star_polygon(rng, (15, 15), 5, 12, 9)
    hole = star_polygon(rng, (15, 15), 1, 3, 5)
    covs = []
    for e, h in ((ext, hole), (ext[::-1], hole), (ext, hole[::-1]), (ext[::-1], hole[::-1])):
        g = ClassGeometry()
        g.add_polygon([to_enu(e), to_enu(h)])
        covs.append(rasterize(g, 32, 32))
    for c in covs[1:]:
        assert np.max(np.abs(c - covs[0])) < 1e-6
    assert np.max(np.abs(covs[0] - ref_coverage([ext, hole], 32, 32))) < 2e-5  # the hole stays empty


def test_shared_edge_of_two_polygons_leaves_no_seam():
    g = ClassGeometry()
    a = [(2.3, 2.0), (10.7, 3.1), (9.2, 12.4), (3.1, 11.0)]
    b = [(10.7, 3.1), (18.0, 2.2), (17.5, 13.0), (9.2, 12.4)]
    g.add_polygon([to_enu(a)])
    g.add_polygon([to_enu(b)])
    cov = rasterize(g, 16, 20)
    # Cells the shared edge crosses are fully covered by the union.
    for r in range(5, 11):
        c = int(10.7 + (9.2 - 10.7) * (r + 0.5 - 3.1) / (12.4 - 3.1))
        assert cov[r, c] == pytest.approx(1.0, abs=1e-5)


def test_polygon_crossing_many_bands_and_the_map_edge():
    # Part of the polygon lies west, east, north and south of the raster.
    ext = np.array([(-7.5, -3.2), (53.1, 4.4), (47.9, 71.3), (3.3, 60.2)])
    g = ClassGeometry()
    g.add_polygon([to_enu(ext)])
    got = rasterize(g, 50, 40, band=8)
    want = ref_coverage([ext], 50, 40)
    assert np.max(np.abs(got - want)) < 2e-5


@pytest.mark.parametrize("seed", range(4))
def test_polygon_area_matches_shoelace_within_2_percent(seed):
    # Areas from ~200 m^2 up; 0.5 m cells.
    rng = np.random.default_rng(100 + seed)
    res = 0.5
    ext = star_polygon(rng, (40.0, 40.0), 10.0, 10.0 + 25.0 * rng.random(), int(rng.integers(6, 30)))
    area = shoelace(ext)
    assert area > 200.0
    grid = Grid(0.0, 80.0, res, 160, 160)
    g = ClassGeometry()
    g.add_polygon([ext])
    ras = BandRasterizer([g], grid, 64)
    buf = np.zeros((1, 64, 160), dtype=np.float32)
    total = 0.0
    for b in range(ras.n_bands):
        ras.band(b, buf)
        total += float(buf.sum()) * res * res
    assert abs(total - area) / area < 0.02
    assert abs(total - area) / area < 1e-5  # it is exact up to float rounding


def test_polygon_agrees_with_opencv_fillpoly_supersampled():
    rng = np.random.default_rng(3)
    rows, cols, ss = 48, 48, 16
    ext = star_polygon(rng, (24, 24), 8, 21, 12)
    g = ClassGeometry()
    g.add_polygon([to_enu(ext)])
    got = rasterize(g, rows, cols)
    # cv2.fillPoly samples pixel centres of the 16x grid; 4 fractional bits of shift for sub-pixel vertices.
    big = np.zeros((rows * ss, cols * ss), dtype=np.uint8)
    pts = np.round((ext * ss - 0.5) * 16).astype(np.int32)
    cv2.fillPoly(big, [pts], 1, lineType=cv2.LINE_8, shift=4)
    ref = big.reshape(rows, ss, cols, ss).mean(axis=(1, 3))
    assert np.max(np.abs(got - ref)) < 0.1
    assert abs(got.sum() - ref.sum()) / ref.sum() < 0.01


def test_stroke_area_and_shape_of_a_straight_road():
    rng = np.random.default_rng(11)
    for _ in range(3):
        ang = rng.uniform(0, np.pi)
        half = rng.uniform(1.5, 4.0)
        p0 = np.array([30.0, 30.0]) - 18 * np.array([np.cos(ang), np.sin(ang)])
        p1 = np.array([30.0, 30.0]) + 18 * np.array([np.cos(ang), np.sin(ang)])
        g = ClassGeometry()
        g.add_line(to_enu([p0, p1]), 2 * half)
        got = rasterize(g, 60, 60)
        length = np.hypot(*(p1 - p0))
        capsule = length * 2 * half + np.pi * half * half
        assert abs(got.sum() - capsule) / capsule < 0.01
        ref = ref_capsule_coverage(p0, p1, half, 60, 60, sub=8)
        # A box-filtered distance ramp differs from exact coverage only in edge cells, by a bounded amount.
        assert np.max(np.abs(got - ref)) < 0.2
        assert np.mean(np.abs(got - ref)) < 0.01


def test_polyline_union_is_not_double_counted_at_joints():
    pts = [(5.0, 5.0), (30.0, 6.0), (31.0, 30.0), (8.0, 28.0)]
    g = ClassGeometry()
    g.add_line(to_enu(pts), 4.0)
    cov = rasterize(g, 36, 36)
    assert cov.max() <= 1.0
    total = sum(np.hypot(pts[i + 1][0] - pts[i][0], pts[i + 1][1] - pts[i][1]) for i in range(3)) * 4.0
    # Union area of the three capsules lies between the length*width and that plus the two end caps.
    assert total * 0.97 < cov.sum() < total + np.pi * 4.0 + 2.0


def test_disk_area():
    g = ClassGeometry()
    centres = np.array([(10.3, -10.7), (25.0, -12.5), (12.2, -30.9)])
    radius = 2.6
    g.add_points(centres, radius)
    cov = rasterize(g, 40, 40)
    want = 3 * np.pi * radius ** 2
    assert abs(cov.sum() - want) / want < 0.01
    # Compare against the same disk as a fine polygon (exact coverage).
    gp = ClassGeometry()
    for c in centres:
        gp.add_polygon([circle(c, radius, 256)])
    ref = rasterize(gp, 40, 40)
    assert np.max(np.abs(cov - ref)) < 0.08


def test_surface_order_keeps_ground_coverage_at_most_one():
    grid = Grid(0.0, 0.0, 1.0, 16, 16)
    top, low = ClassGeometry(), ClassGeometry()
    top.add_polygon([to_enu([(2, 2), (10.5, 2), (10.5, 10.5), (2, 10.5)])])
    low.add_polygon([to_enu([(0, 0), (16, 0), (16, 16), (0, 16)])])
    ras = BandRasterizer([top, low], grid, 16, surface_order=(0, 1))
    buf = np.zeros((2, 16, 16), dtype=np.float32)
    ras.band(0, buf)
    assert np.max(buf.sum(axis=0)) <= 1.0 + 1e-6
    assert buf[1, 5, 5] == 0.0 and buf[1, 14, 14] == 1.0
    assert buf[1, 5, 10] == pytest.approx(0.5)  # the lawn keeps what the footprint leaves
