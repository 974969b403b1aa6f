"""WGS84 <-> ENU against pyproj (reference library) and the WGS84 defining constants."""

import math

import numpy as np
import pytest

from tinyloc.errors import InputError
from tinyloc.geo import LocalFrame, WGS84_A, WGS84_B, ecef_to_geodetic, geodetic_to_ecef, parse_latlon

pyproj = pytest.importorskip("pyproj", reason="pyproj is the reference library for geodesy checks")


def _pyproj_enu(lat0, lon0, h0):
    # The topocentric conversion of PROJ: ECEF -> local ENU at (lat0, lon0, h0), an independent implementation.
    return pyproj.Transformer.from_pipeline(
        f"+proj=pipeline +step +proj=cart +ellps=WGS84 "
        f"+step +proj=topocentric +ellps=WGS84 +lat_0={lat0} +lon_0={lon0} +h_0={h0}")


@pytest.mark.parametrize("lat0,lon0,h0", [(12.34, -45.67, 30.0), (-33.5, 151.2, 0.0), (64.1, 21.9, 250.0),
                                          (0.0, 179.95, 5.0)])
def test_enu_matches_pyproj_within_1mm_over_10km(lat0, lon0, h0, rng):
    frame = LocalFrame(lat0, lon0, h0)
    tr = _pyproj_enu(lat0, lon0, h0)
    # Random ENU points within 10 km of the origin, heights within +-100 m.
    n = 500
    xyz = np.column_stack([rng.uniform(-10e3, 10e3, n), rng.uniform(-10e3, 10e3, n), rng.uniform(-100, 100, n)])
    lat, lon, h = frame.to_geodetic(xyz[:, 0], xyz[:, 1], xyz[:, 2])
    e, nn, u = tr.transform(lon, lat, h)
    err = np.max(np.abs(np.column_stack([e, nn, u]) - xyz))
    assert err < 1e-3, err
    x2, y2, z2 = frame.to_enu(lat, lon, h)
    assert np.max(np.abs(np.column_stack([x2, y2, z2]) - xyz)) < 1e-6


def test_ecef_matches_pyproj(rng):
    tr = pyproj.Transformer.from_crs("EPSG:4979", "EPSG:4978", always_xy=True)
    lat = rng.uniform(-89.9, 89.9, 200)
    lon = rng.uniform(-180, 180, 200)
    h = rng.uniform(-100, 5000, 200)
    x, y, z = geodetic_to_ecef(lat, lon, h)
    xr, yr, zr = tr.transform(lon, lat, h)
    assert np.max(np.abs(np.column_stack([x - xr, y - yr, z - zr]))) < 1e-6
    lat2, lon2, h2 = ecef_to_geodetic(x, y, z)
    assert np.max(np.abs(lat2 - lat)) < 1e-11 and np.max(np.abs(lon2 - lon)) < 1e-11
    assert np.max(np.abs(h2 - h)) < 1e-6


def test_ellipsoid_constants_handbook():
    # WGS84 semi-minor axis b = 6356752.314245 m (NIMA TR8350.2, table 3.1).
    assert WGS84_A == 6378137.0
    assert abs(WGS84_B - 6356752.314245) < 1e-6
    # The pole and a point on the equator, by hand.
    x, y, z = geodetic_to_ecef(90.0, 0.0, 0.0)
    assert abs(z - WGS84_B) < 1e-6 and abs(x) < 1e-6
    x, y, z = geodetic_to_ecef(0.0, 90.0, 0.0)
    assert abs(y - WGS84_A) < 1e-6


def test_one_degree_north_is_about_111_km():
    # Length of one degree of latitude at 45 deg, ~111.132 km (common handbook value, from memory).
    f = LocalFrame(44.5, 10.0)
    _, y, _ = f.to_enu(45.5, 10.0, 0.0)
    assert abs(y - 111_132) < 150


@pytest.mark.parametrize("bad", [(91.0, 0.0), (0.0, 181.0), (math.nan, 0.0), (0.0, math.inf)])
def test_bad_origin_is_rejected(bad):
    with pytest.raises(InputError, match="latitude"):
        LocalFrame(*bad)


def test_parse_latlon():
    assert parse_latlon("12.5, -3.25") == (12.5, -3.25)
    assert parse_latlon("1,2,30") == (1.0, 2.0, 30.0)
    for bad in ["", "1", "a,b", "1,2,3,4", "95,0"]:
        with pytest.raises(InputError):
            parse_latlon(bad)
