"""Helpers for the replay tests: a generated run folder with truth, a small packed map, a test-double localizer.

The run is invented (a loop on our own made-up site); it exercises the replay harness,
not the localizer's accuracy. The test double returns truth plus seeded noise with an
honest covariance; it stands in for the loop only where a test is about the harness.
"""

from __future__ import annotations

import math
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from tinyloc.camera.model import CameraModel
from tinyloc.geo import LocalFrame
from tinyloc.replay.metrics import interp_pose
from tinyloc.runfolder import RunWriter

ORIGIN = (47.1, 8.2, 400.0)  # invented site origin (no real place intended)


def truth_pose(t):
    """A 30 m x 20 m ellipse driven at about 1.5 m/s, counter-clockwise; returns (x, y, yaw)."""
    w = 0.06
    x, y = 15.0 * np.cos(w * t), 10.0 * np.sin(w * t)
    yaw = np.arctan2(10.0 * np.cos(w * t), -15.0 * np.sin(w * t))
    return x, y, yaw


def make_run(path, *, n_frames=40, fps=5.0, gaps=False, seed=3) -> Path:
    """Write a run folder with truth, odometry (2 % scale error), GNSS (1.5 m noise) and IMU.

    With ``gaps``: frame 7's image is deleted, three IMU rows are NaN, GNSS is out from 30 % to 60 % of the run,
    and imu.csv and odometry.csv end in a truncated line.
    """
    rng = np.random.default_rng(seed)
    path = Path(path)
    cam = CameraModel(width=64, height=48, fx=50.0, fy=50.0, cx=31.5, cy=23.5)
    frame = LocalFrame(*ORIGIN)
    dur = n_frames / fps
    with RunWriter(path, camera=cam, origin=ORIGIN, name=path.name, source="replay test helper") as w:
        for k in range(n_frames):
            t = k / fps
            img = np.full((48, 64, 3), 90, np.uint8)
            img[24:] = (60 + k % 50, 120, 60)
            w.add_frame(t, img)
        for t in np.arange(0.0, dur + 0.01, 0.02):
            w.add_imu(t, 0.0, 0.0, 9.81)
        # Odometry in its own frame: the truth's motion, 2 % long, starting at the odom origin.
        tt = np.arange(0.0, dur + 0.01, 0.05)
        x, y, yaw = truth_pose(tt)
        x0, y0, yaw0 = x[0], y[0], yaw[0]
        c, s = math.cos(-yaw0), math.sin(-yaw0)
        for t, xi, yi, ai in zip(tt, x, y, yaw):
            dx, dy = xi - x0, yi - y0
            w.add_odometry(t, 1.02 * (c * dx - s * dy), 1.02 * (s * dx + c * dy), ai - yaw0)
        for t in np.arange(0.0, dur + 0.01, 1.0):
            if gaps and 0.3 * dur <= t <= 0.6 * dur:
                continue
            gx, gy, _ = truth_pose(t)
            lat, lon = frame.to_latlon(gx + rng.normal(0, 1.5), gy + rng.normal(0, 1.5))
            w.add_gnss(t, lat, lon, ORIGIN[2], 1.5)
        for t in np.arange(0.0, dur + 0.01, 0.1):
            gx, gy, ga = truth_pose(t)
            lat, lon = frame.to_latlon(gx, gy)
            w.add_truth(t, lat, lon, ga, gx, gy)
    if gaps:
        inject_gaps(path, drop_frame=7)
    return path


def inject_gaps(path, *, drop_frame: int, gnss_span=None) -> None:
    """Damage a run folder the way real logs are damaged: one frame file gone, three NaN IMU rows,
    (optionally) the GNSS rows with time in ``gnss_span`` removed, and imu.csv and odometry.csv cut
    mid-line."""
    path = Path(path)
    (path / "frames" / f"{drop_frame:06d}.png").unlink()
    lines = (path / "imu.csv").read_text().splitlines(keepends=True)
    for k in (10, 11, 40):
        t = lines[k].split(",")[0]
        lines[k] = f"{t},nan,0.0,9.81\n"
    (path / "imu.csv").write_text("".join(lines) + "1.23,0.0")
    with open(path / "odometry.csv", "a") as f:
        f.write("99.0,1.0")
    if gnss_span is not None:
        rows = (path / "gnss.csv").read_text().splitlines(keepends=True)
        keep = [rows[0]] + [r for r in rows[1:] if not gnss_span[0] <= float(r.split(",")[0]) <= gnss_span[1]]
        (path / "gnss.csv").write_text("".join(keep))


def make_map(path) -> Path:
    """A small packed map at the run's origin: a lawn with a ring-shaped path under the loop."""
    from tinyloc.classes import GRASS, MAP_CLASSES, SIDEWALK, TREE
    from tinyloc.maps.packfile import MapMeta, write_packed

    res, x_min, y_max, rows, cols = 0.5, -30.0, 25.0, 100, 120
    cov = np.zeros((len(MAP_CLASSES), rows, cols), np.float32)
    yy, xx = np.mgrid[0:rows, 0:cols]
    x = x_min + (xx + 0.5) * res
    y = y_max - (yy + 0.5) * res
    r = np.hypot(x / 15.0, y / 10.0)
    cov[GRASS] = 1.0
    ring = np.abs(r - 1.0) < 0.08
    cov[SIDEWALK][ring] = 1.0
    cov[GRASS][ring] = 0.0
    cov[TREE][(np.hypot(x - 5, y - 2) < 1.0)] = 1.0
    meta = MapMeta(ORIGIN[0], ORIGIN[1], ORIGIN[2], res, x_min, y_max, rows, cols, 64,
                   tuple(c.name for c in MAP_CLASSES), tuple(c.index for c in MAP_CLASSES))
    write_packed(path, meta, cov)
    return Path(path)


class NoisyTruth:
    """Test double of a localizer: truth + seeded noise (0.3 m, 1.5 deg), covariance to match.

    Searching for the first 3 frames; a frame without an image (unreadable) keeps the last pose as
    "degraded" with a doubled covariance. Counts the sensor rows it is fed.
    """

    def __init__(self, rf, packed=None, seed=11):
        self.rng = np.random.default_rng(seed)
        t = rf.truth
        self.t = t[:, 0]
        self.p = t[:, [4, 5, 3]]
        self.frame = rf.frame
        self.n = 0
        self.rows = {"imu": 0, "odometry": 0, "gnss": 0}
        self.nan_rows = 0
        self.last = None

    def step(self, fr):
        self.n += 1
        for k in self.rows:
            a = getattr(fr, k)
            self.rows[k] += len(a)
            self.nan_rows += int(np.count_nonzero(~np.isfinite(a)))
        cov = np.diag([0.09, 0.09, math.radians(1.5) ** 2])
        if fr.image is None and self.last is not None:
            x, y, yaw = self.last
            return SimpleNamespace(x=x, y=y, yaw=yaw, lat=math.nan, lon=math.nan, cov=2 * cov, quality="degraded",
                                   frame_ms=0.5, status="no image: predicted")
        tp = interp_pose(self.t, self.p, [fr.t], max_gap_s=1.0)[0]
        x = tp[0] + self.rng.normal(0, 0.3)
        y = tp[1] + self.rng.normal(0, 0.3)
        yaw = tp[2] + math.radians(self.rng.normal(0, 1.5))
        self.last = (x, y, yaw)
        q = "searching" if self.n <= 3 else "tracking"
        lat, lon = self.frame.to_latlon(x, y)
        return SimpleNamespace(x=x, y=y, yaw=yaw, lat=lat, lon=lon, cov=cov, quality=q, frame_ms=1.0 + 0.01 * self.n,
                               status="ok")


def noisy_truth(rf, packed):
    """Factory for ``--localizer _replay_helpers:noisy_truth``."""
    return NoisyTruth(rf, packed)


def broken(rf, packed):
    """Factory that fails: a localizer that cannot start."""
    raise RuntimeError("this localizer always fails to start")


class StandStill:
    """Test double that needs no truth: always reports the origin, searching, with a wide covariance."""

    def step(self, fr):
        return SimpleNamespace(x=0.0, y=0.0, yaw=0.0, lat=math.nan, lon=math.nan, cov=np.diag([100.0, 100.0, 1.0]),
                               quality="searching", frame_ms=0.1, status="ok")


def stand_still(rf, packed):
    return StandStill()


class Flaky(NoisyTruth):
    """Test double that raises on every 5th frame (a localizer bug met mid-run)."""

    def step(self, fr):
        if fr.index % 5 == 4:
            raise ValueError(f"cannot handle frame {fr.index}")
        return super().step(fr)
