"""Wheel-odometry distance factor from drives along a straight line of measured length.

The robot starts at rest on one mark, drives straight to a second mark whose distance from the first
was measured with a tape, and stops; driving back gives a second recording. The odometry's own
start-to-end distance over the tape's distance is the wheels' scale, and its inverse is the factor the
loop multiplies every odometry step by (``track.odometry_scale``). Common practice (the straight-line
test of wheel odometry); several recordings are pooled as sum(tape) / sum(odometry), so a longer line
or more passes average the slip down (about 0.2 % for two 20 m passes of the simulated wheels).

The checks are what make it trustworthy in the field: each recording must start and end at rest (the
mark is where the robot stood, not where it passed), be straight (a turn makes the start-to-end
distance shorter than the path) and cover most of the tape's distance (a recording of the wrong drive,
or odometry in other units, shows as a factor far from 1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import CalibrationError


@dataclass(frozen=True)
class LineParams:
    """Acceptance limits of one straight-line recording."""

    min_rows: int = 20             # e.g. 0.4 s at 50 Hz: a recording, not a stray line
    min_distance_m: float = 5.0    # shorter lines leave the tape's own error (about 1 cm) above 0.2 %
    max_turn_deg: float = 5.0      # heading change start to end; more and it was not a straight drive
    max_bend: float = 0.005        # path length may exceed the start-to-end distance by this share
    rest_mps: float = 0.05         # speed over the first and last 0.5 s below this: started and stopped at rest
    factor_range: tuple[float, float] = (0.8, 1.25)  # outside: wrong recording, units or distance


@dataclass(frozen=True)
class LineDrive:
    """One recording's odometry along the line (its own odom frame)."""

    path: str
    chord_m: float      # odometry start-to-end distance
    path_m: float       # odometry path length
    turn_deg: float     # heading change start to end
    seconds: float


@dataclass(frozen=True)
class WheelFactor:
    """Result of the straight-line calibration."""

    factor: float             # multiply odometry distances by this (track.odometry_scale)
    distance_m: float         # the tape's distance, per recording
    drives: tuple             # LineDrive per recording
    spread: float             # largest relative difference of one recording's factor from the pooled one


def _speed_at_ends(table: np.ndarray, span_s: float = 0.5) -> float:
    """Largest mean speed over the first and the last ``span_s`` seconds (m/s)."""
    t, xy = table[:, 0], table[:, 1:3]
    out = 0.0
    for sel in (t <= t[0] + span_s, t >= t[-1] - span_s):
        k = np.flatnonzero(sel)
        if len(k) >= 2 and t[k[-1]] > t[k[0]]:
            d = float(np.hypot(*(xy[k[-1]] - xy[k[0]])))
            out = max(out, d / float(t[k[-1]] - t[k[0]]))
    return out


def read_line(path, table: np.ndarray, distance_m: float, p: LineParams = LineParams()) -> LineDrive:
    """Check one recording; ``table`` holds rows t, x, y, yaw (the run folder's odometry.csv format)."""
    if table.shape[0] < p.min_rows:
        raise CalibrationError(f"{path}: {table.shape[0]} odometry rows; need at least {p.min_rows}")
    xy = table[:, 1:3]
    chord = float(np.hypot(*(xy[-1] - xy[0])))
    length = float(np.sum(np.hypot(*np.diff(xy, axis=0).T)))
    yaw = np.unwrap(table[:, 3])
    turn = math.degrees(abs(float(yaw[-1] - yaw[0])))
    if chord <= 0.0:
        raise CalibrationError(f"{path}: the odometry did not move")
    f = distance_m / chord
    lo, hi = p.factor_range
    if not lo <= f <= hi:
        raise CalibrationError(f"{path}: odometry covered {chord:.2f} m of the {distance_m:g} m line (factor "
                               f"{f:.3f}, outside {lo} .. {hi}); wrong recording, distance or units?")
    if turn > p.max_turn_deg or length > chord * (1.0 + p.max_bend):
        raise CalibrationError(f"{path}: not a straight drive (heading changed {turn:.1f} deg, path {length:.2f} m "
                               f"for {chord:.2f} m start to end; limits {p.max_turn_deg:g} deg, "
                               f"{100 * p.max_bend:g} %)")
    v = _speed_at_ends(table)
    if v > p.rest_mps:
        raise CalibrationError(f"{path}: the robot was moving at the start or the end ({v:.2f} m/s); start on "
                               "one mark at rest and stop on the other")
    return LineDrive(str(path), chord, length, turn, float(table[-1, 0] - table[0, 0]))


def pooled_factor(drives, distance_m: float) -> WheelFactor:
    """sum(tape) / sum(odometry chord) over the recordings, and how far each one's own factor is from it."""
    drives = tuple(drives)
    if not drives:
        raise CalibrationError("no straight-line recording given")
    f = distance_m * len(drives) / sum(d.chord_m for d in drives)
    spread = max(abs(distance_m / d.chord_m / f - 1.0) for d in drives)
    return WheelFactor(float(f), float(distance_m), drives, float(spread))


def odometry_table(path) -> np.ndarray:
    """Rows t, x, y, yaw of a wheel-odometry CSV (odometry.csv format), or of RUN/odometry.csv."""
    from ..runfolder import read_sensor_csv

    q = Path(path)
    if q.is_dir():
        q = q / "odometry.csv"
    return read_sensor_csv(q, ("t", "x", "y", "yaw"), cls=CalibrationError)


def calibrate_from_files(paths, distance_m: float, p: LineParams = LineParams()) -> WheelFactor:
    """The straight-line calibration from recordings (CSV files or run folders: :func:`odometry_table`)."""
    if not (math.isfinite(distance_m) and distance_m >= p.min_distance_m):
        raise CalibrationError(f"--distance {distance_m}: the measured line must be at least {p.min_distance_m:g} m")
    return pooled_factor([read_line(q, odometry_table(q), distance_m, p) for q in paths], distance_m)
