"""Short figures of a run against ground truth (what ``tinyloc demo`` prints; replay has the full set).

Definitions (the same as docs/replay.md where they overlap):

- A frame *counts* once the robot has driven ``skip_m`` metres along the true path (the lock-on
  stretch is reported separately as ``time_to_first_tracking_s``).
- *recall_1m_3deg*: share of counted frames whose estimate is within 1 m and 3 degrees of the
  truth; a frame without an estimate (quality "no-fix") is a miss.
- *median_error_m*, *median_heading_error_deg*: over counted frames with an estimate.
- *gnss_median_error_m*: distance from the latest satellite fix at each counted frame to the truth.
- *inside_95_ellipse*: share of counted frames with an estimate whose position error lies inside
  the reported 95 % ellipse (Mahalanobis distance squared <= 5.991, the chi-square 95 % value for
  2 degrees of freedom from standard tables); *inside_95_tested* is how many frames that share is
  over (to pool drives), *mahalanobis_d2_median* the median of those squared distances (about 1.39
  for an honest 2-D Gaussian covariance: the chi-square median for 2 degrees of freedom, 2 ln 2).
"""

from __future__ import annotations

import math

import numpy as np

from ..frames import wrap_angle

CHI2_95_2DOF = 5.991


def summarize(poses, truth: np.ndarray, gnss_xy: np.ndarray | None = None, *, skip_m: float = 30.0) -> dict:
    """Figures of a list of PoseEstimate against truth (N, 3) x, y, yaw; gnss_xy (N, 2) or None."""
    n = len(poses)
    truth = np.asarray(truth, dtype=np.float64)[:n]
    est = np.array([[p.x, p.y, p.yaw] for p in poses], dtype=np.float64).reshape(-1, 3)
    ok_t = np.all(np.isfinite(truth), axis=1)
    step = np.zeros(n)
    if n > 1:
        d = np.hypot(np.diff(truth[:, 0]), np.diff(truth[:, 1]))
        step[1:] = np.where(np.isfinite(d), d, 0.0)
    dist = np.cumsum(step)
    counted = ok_t & (dist >= skip_m)
    has = np.array([p.quality != "no-fix" for p in poses]) & np.all(np.isfinite(est), axis=1)
    perr = np.hypot(est[:, 0] - truth[:, 0], est[:, 1] - truth[:, 1])
    herr = np.degrees(np.abs(wrap_angle(est[:, 2] - truth[:, 2]))) if n else np.zeros(0)
    hit = counted & has & (perr <= 1.0) & (herr <= 3.0)
    m = counted & has
    d2 = []
    for i in np.flatnonzero(m):
        c = np.asarray(poses[i].cov, dtype=np.float64)[:2, :2]
        dd = np.array([truth[i, 0] - est[i, 0], truth[i, 1] - est[i, 1]])
        try:
            d2.append(float(dd @ np.linalg.solve(c, dd)))
        except np.linalg.LinAlgError:
            d2.append(math.inf)  # a singular covariance claims certainty: counted outside
    inside = [v <= CHI2_95_2DOF for v in d2]
    out = {
        "frames": n,
        "frames_counted": int(counted.sum()),
        "distance_m": float(dist[-1]) if n else 0.0,
        "recall_1m_3deg": float(hit.sum() / counted.sum()) if counted.any() else math.nan,
        "median_error_m": float(np.median(perr[m])) if m.any() else math.nan,
        "median_heading_error_deg": float(np.median(herr[m])) if m.any() else math.nan,
        "p90_error_m": float(np.percentile(perr[m], 90)) if m.any() else math.nan,
        "inside_95_ellipse": float(np.mean(inside)) if inside else math.nan,
        "inside_95_tested": len(inside),
        "mahalanobis_d2_median": float(np.median(d2)) if d2 else math.nan,
        "frame_ms_median": float(np.median([p.frame_ms for p in poses])) if n else math.nan,
        "frame_ms_p99": float(np.percentile([p.frame_ms for p in poses], 99)) if n else math.nan,
        "quality_share": {q: float(np.mean([p.quality == q for p in poses])) if n else 0.0
                          for q in ("no-fix", "searching", "tracking", "degraded")},
    }
    first = next((i for i, p in enumerate(poses) if p.quality == "tracking"), None)
    out["time_to_first_tracking_s"] = float(poses[first].t - poses[0].t) if first is not None else math.nan
    if gnss_xy is not None:
        g = np.asarray(gnss_xy, dtype=np.float64)[:n]
        ge = np.hypot(g[:, 0] - truth[:, 0], g[:, 1] - truth[:, 1])
        gm = counted & np.isfinite(ge)
        out["gnss_median_error_m"] = float(np.median(ge[gm])) if gm.any() else math.nan
    else:
        out["gnss_median_error_m"] = math.nan
    return out


def gnss_at_frames(rf, world) -> np.ndarray:
    """Latest satellite fix at each frame time (x, y in ``world``), NaN before the first (N, 2)."""
    ft = rf.frame_t
    out = np.full((len(ft), 2), np.nan)
    g = rf.gnss
    if g is None or not len(g) or world is None:
        return out
    x, y = world.to_enu_xy(g[:, 1], g[:, 2])
    idx = np.searchsorted(g[:, 0], ft, side="right") - 1
    ok = idx >= 0
    out[ok, 0] = np.asarray(x)[idx[ok]]
    out[ok, 1] = np.asarray(y)[idx[ok]]
    return out
