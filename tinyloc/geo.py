"""WGS84 geodetic coordinates <-> local ENU tangent plane.

Exact conversion through ECEF (no flat-earth approximation), so the error is at
the level of float64 rounding (far below 1 mm) at any distance from the origin.
Ellipsoid constants: WGS84 (NIMA TR8350.2): a = 6378137 m, 1/f = 298.257223563.
"""

from __future__ import annotations

from dataclasses import dataclass
import math

import numpy as np

from .errors import InputError

WGS84_A = 6378137.0
WGS84_F = 1.0 / 298.257223563
WGS84_E2 = WGS84_F * (2.0 - WGS84_F)
WGS84_B = WGS84_A * (1.0 - WGS84_F)
_EP2 = WGS84_E2 / (1.0 - WGS84_E2)


def check_latlon(lat_deg, lon_deg, what: str = "coordinates") -> None:
    """Raise :class:`InputError` unless every latitude/longitude is finite and in range."""
    lat = np.asarray(lat_deg, dtype=np.float64)
    lon = np.asarray(lon_deg, dtype=np.float64)
    if not (np.all(np.isfinite(lat)) and np.all(np.isfinite(lon))):
        raise InputError(f"{what}: latitude/longitude must be finite numbers")
    if np.any(np.abs(lat) > 90.0) or np.any(np.abs(lon) > 180.0):
        raise InputError(f"{what}: latitude must be in [-90, 90] and longitude in [-180, 180] degrees")


def geodetic_to_ecef(lat_deg, lon_deg, h_m=0.0):
    """Geodetic (deg, deg, m above the ellipsoid) -> ECEF (m). Arrays broadcast."""
    lat = np.radians(lat_deg)
    lon = np.radians(lon_deg)
    sl, cl = np.sin(lat), np.cos(lat)
    n = WGS84_A / np.sqrt(1.0 - WGS84_E2 * sl * sl)
    x = (n + h_m) * cl * np.cos(lon)
    y = (n + h_m) * cl * np.sin(lon)
    z = (n * (1.0 - WGS84_E2) + h_m) * sl
    return x, y, z


def ecef_to_geodetic(x, y, z):
    """ECEF (m) -> geodetic (deg, deg, m). Bowring's start, then Newton iterations on latitude."""
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    z = np.asarray(z, dtype=np.float64)
    lon = np.arctan2(y, x)
    p = np.hypot(x, y)
    theta = np.arctan2(z * WGS84_A, p * WGS84_B)
    lat = np.arctan2(z + _EP2 * WGS84_B * np.sin(theta) ** 3, p - WGS84_E2 * WGS84_A * np.cos(theta) ** 3)
    for _ in range(3):  # Bowring is already ~1e-9 m near the surface; polish to rounding.
        sl = np.sin(lat)
        n = WGS84_A / np.sqrt(1.0 - WGS84_E2 * sl * sl)
        h = np.where(np.abs(np.cos(lat)) > 1e-9, p / np.cos(lat) - n, np.abs(z) - WGS84_B)
        lat = np.arctan2(z, p * (1.0 - WGS84_E2 * n / (n + h)))
    sl = np.sin(lat)
    n = WGS84_A / np.sqrt(1.0 - WGS84_E2 * sl * sl)
    h = np.where(np.abs(np.cos(lat)) > 1e-9, p / np.cos(lat) - n, np.abs(z) - WGS84_B)
    return np.degrees(lat), np.degrees(lon), h


@dataclass(frozen=True)
class LocalFrame:
    """A local ENU tangent plane anchored at a WGS84 origin.

    Parameters
    ----------
    lat0_deg, lon0_deg : float
        Origin latitude and longitude (degrees, WGS84).
    h0_m : float
        Origin height above the ellipsoid (m).
    """

    lat0_deg: float
    lon0_deg: float
    h0_m: float = 0.0

    def __post_init__(self):
        check_latlon(self.lat0_deg, self.lon0_deg, "ENU origin")
        if not math.isfinite(self.h0_m):
            raise InputError("ENU origin: height must be finite")

    def _basis(self):
        lat = math.radians(self.lat0_deg)
        lon = math.radians(self.lon0_deg)
        sl, cl, so, co = math.sin(lat), math.cos(lat), math.sin(lon), math.cos(lon)
        # Rows: east, north, up unit vectors in ECEF.
        return np.array([[-so, co, 0.0], [-sl * co, -sl * so, cl], [cl * co, cl * so, sl]])

    def to_enu(self, lat_deg, lon_deg, h_m=None):
        """Geodetic -> ENU metres (x east, y north, z up). ``h_m`` defaults to the origin height."""
        if h_m is None:
            h_m = self.h0_m
        x, y, z = geodetic_to_ecef(lat_deg, lon_deg, h_m)
        x0, y0, z0 = geodetic_to_ecef(self.lat0_deg, self.lon0_deg, self.h0_m)
        d = np.stack(np.broadcast_arrays(np.asarray(x) - x0, np.asarray(y) - y0, np.asarray(z) - z0))
        enu = np.tensordot(self._basis(), d, axes=1)
        if enu.ndim == 1:
            return float(enu[0]), float(enu[1]), float(enu[2])
        return enu[0], enu[1], enu[2]

    def to_geodetic(self, x_m, y_m, z_m=0.0):
        """ENU metres -> geodetic (lat deg, lon deg, h m above the ellipsoid)."""
        d = np.stack(np.broadcast_arrays(np.asarray(x_m, float), np.asarray(y_m, float), np.asarray(z_m, float)))
        ecef = np.tensordot(self._basis().T, d, axes=1)
        x0, y0, z0 = geodetic_to_ecef(self.lat0_deg, self.lon0_deg, self.h0_m)
        lat, lon, h = ecef_to_geodetic(ecef[0] + x0, ecef[1] + y0, ecef[2] + z0)
        if np.ndim(lat) == 0:
            return float(lat), float(lon), float(h)
        return lat, lon, h

    def to_enu_xy(self, lat_deg, lon_deg):
        """Geodetic -> ENU (x, y) on the origin's height (the map plane), metres."""
        x, y, _ = self.to_enu(lat_deg, lon_deg)
        return x, y

    def to_latlon(self, x_m, y_m):
        """ENU (x, y) on the map plane -> (lat, lon) degrees."""
        lat, lon, _ = self.to_geodetic(x_m, y_m, 0.0)
        return lat, lon


def parse_latlon(text: str, *, what: str = "--at") -> tuple[float, ...]:
    """Parse 'LAT,LON' or 'LAT,LON,EXTRA' (degrees, optional third number) from the command line."""
    parts = [p.strip() for p in str(text).split(",")]
    try:
        vals = tuple(float(p) for p in parts)
    except ValueError:
        raise InputError(f"{what}: expected LAT,LON in decimal degrees, got {text!r}") from None
    if len(vals) not in (2, 3):
        raise InputError(f"{what}: expected LAT,LON in decimal degrees, got {text!r}")
    check_latlon(vals[0], vals[1], what)
    return vals
