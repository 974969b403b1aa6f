"""Accelerometer bias from two recordings at rest, the robot turned by half a turn between them.

The per-recording checks are what make the two-position method trustworthy in the field: each
recording must be long enough, the robot must not have moved (small spread of the samples), the
reading must be about one gravity, and the two recordings must come from the same spot (turning in
place changes neither the size of the reading nor its vertical component, whatever the slope).
That last check is weak by nature: two spots whose slopes differ show only in the vertical part,
g (cos t1 - cos t2), a second-order difference (0.29 m/s^2 between 2 and 14 deg, 0.01 between 2 and
3 deg), so a change of spot of a few degrees goes unseen and half of it ends up in the bias. Turn
the robot in place.
The arithmetic itself is :func:`tinyloc.perception.gravity.accel_bias_two_position`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import CalibrationError
from ..perception.gravity import G0, accel_bias_two_position


@dataclass(frozen=True)
class RestParams:
    """Acceptance limits of a recording at rest (m/s^2, seconds, samples)."""

    min_samples: int = 50          # e.g. half a second at 100 Hz
    max_std: float = 0.25          # per-axis spread; vibration of a running motor is far below, a push is above
    g_tolerance: float = 0.05      # |mean| within 5 % of local gravity
    same_spot_mps2: float = 0.15   # the two recordings' |f| and f_z agree this well (same spot, turned in place)


@dataclass(frozen=True)
class RestReading:
    """Mean and spread of one recording (FLU base frame, m/s^2)."""

    path: str
    mean: np.ndarray
    std: np.ndarray
    n: int
    seconds: float


@dataclass(frozen=True)
class ImuBias:
    """Result of the two-position calibration."""

    bias: np.ndarray          # (3,) m/s^2, to subtract from every reading
    tilt_deg: float           # slope of the spot under the robot
    first: RestReading
    second: RestReading


def read_rest(path, table: np.ndarray, p: RestParams = RestParams()) -> RestReading:
    """Check one recording at rest; ``table`` holds rows t, fx, fy, fz (the run folder's imu.csv)."""
    if table.shape[0] < p.min_samples:
        raise CalibrationError(f"{path}: {table.shape[0]} samples at rest; need at least {p.min_samples}")
    f = table[:, 1:4]
    mean = f.mean(axis=0)
    std = f.std(axis=0)
    if float(std.max()) > p.max_std:
        ax = "xyz"[int(np.argmax(std))]
        raise CalibrationError(f"{path}: the robot was not at rest (spread {std.max():.2f} m/s^2 on {ax}; "
                               f"limit {p.max_std})")
    return RestReading(str(path), mean, std, int(table.shape[0]), float(table[-1, 0] - table[0, 0]))


def two_position_bias(a: RestReading, b: RestReading, *, g_mps2: float = G0,
                      p: RestParams = RestParams()) -> ImuBias:
    """Bias from recordings ``a`` and ``b`` (the same spot, turned by 180 degrees)."""
    for r in (a, b):
        n = float(np.linalg.norm(r.mean))
        if abs(n / g_mps2 - 1.0) > p.g_tolerance:
            raise CalibrationError(f"{r.path}: mean reading {n:.2f} m/s^2 is not one gravity ({g_mps2:.3f}); "
                                   "is this the accelerometer in m/s^2?")
    dn = abs(float(np.linalg.norm(a.mean)) - float(np.linalg.norm(b.mean)))
    dz = abs(float(a.mean[2] - b.mean[2]))
    if max(dn, dz) > p.same_spot_mps2:
        raise CalibrationError(f"{b.path}: differs from {a.path} by {max(dn, dz):.2f} m/s^2 in size or vertical "
                               "part; both must be taken on the same spot, turned in place by half a turn")
    bias = accel_bias_two_position(a.mean, b.mean, g_mps2)
    h = 0.5 * (a.mean - b.mean)
    tilt = math.degrees(math.atan2(math.hypot(h[0], h[1]), max(float(a.mean[2] - bias[2]), 1e-9)))
    return ImuBias(bias, tilt, a, b)


def imu_table(path) -> np.ndarray:
    """Rows t, fx, fy, fz of an accelerometer CSV (imu.csv format), or of RUN/imu.csv for a run folder."""
    from ..runfolder import read_sensor_csv

    p = Path(path)
    if p.is_dir():
        p = p / "imu.csv"
    return read_sensor_csv(p, ("t", "fx", "fy", "fz"), cls=CalibrationError)


def calibrate_from_files(first, second, *, g_mps2: float = G0, p: RestParams = RestParams()) -> ImuBias:
    """The two-position calibration from two recordings (CSV files or run folders: :func:`imu_table`)."""
    a = read_rest(first, imu_table(first), p)
    b = read_rest(second, imu_table(second), p)
    return two_position_bias(a, b, g_mps2=g_mps2, p=p)
