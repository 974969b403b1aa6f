"""Metrics of a replayed drive: pure functions over per-frame arrays.

Every metric is defined in docs/replay.md; the definitions here are the code.

Conventions shared by all functions:

- Errors are per-frame arrays. ``NaN`` means *not evaluated* (no ground truth for
  that frame); ``+inf`` means *evaluated and missed* (truth exists, the localizer
  gave no estimate). Recall counts a miss as a failure; percentiles are taken over
  the finite values only (the number of misses is reported beside them).
- Percentiles follow ``numpy.percentile`` with its default ``method="linear"``
  (type 7 of Hyndman and Fan, 1996): the q-th percentile of n sorted values sits at
  rank ``(n - 1) * q / 100``, interpolated linearly between neighbours.
- Angles are radians inside, degrees only in names ending in ``_deg``; heading
  differences are wrapped with :func:`tinyloc.frames.angle_diff`, so 179 deg vs
  -179 deg is a 2 deg error.
- Positions are ENU metres (x east, y north); covariances are over (x, y, yaw).
"""

from __future__ import annotations

from dataclasses import dataclass
import math
import statistics

import numpy as np

from ..frames import angle_diff, compose2, relative2, wrap_angle

RECALL_THRESHOLDS: tuple[tuple[float, float], ...] = ((0.25, 2.0), (0.5, 2.0), (1.0, 3.0), (2.0, 5.0))
QUALITIES: tuple[str, ...] = ("no-fix", "searching", "tracking", "degraded")


@dataclass(frozen=True)
class MetricParams:
    """What counts as good, lost and stale when scoring a drive.

    Parameters
    ----------
    recall_thresholds : tuple of (metres, degrees)
        Position and heading bounds of the recall figures.
    good_pos_m, good_yaw_deg : float
        A frame is *good* when its position error is <= ``good_pos_m`` and its heading
        error is <= ``good_yaw_deg`` (defaults: the 1 m, 3 deg sign-off bound).
    min_lost_s : float
        A run of not-good frames after the first good fix is a *lost spell* only if it
        lasts at least this long (s); shorter flickers are not counted.
    ellipse_p : float
        Probability mass of the reported-uncertainty ellipse checked for calibration.
    gnss_max_age_s : float
        A GNSS fix older than this (s) at a frame's time does not count for that frame.
    truth_max_gap_s : float
        Truth is interpolated to frame times only between samples at most this far apart (s).
    """

    recall_thresholds: tuple[tuple[float, float], ...] = RECALL_THRESHOLDS
    good_pos_m: float = 1.0
    good_yaw_deg: float = 3.0
    min_lost_s: float = 1.0
    ellipse_p: float = 0.95
    gnss_max_age_s: float = 2.0
    truth_max_gap_s: float = 1.0


def recall_key(pos_m: float, yaw_deg: float) -> str:
    """JSON key of a recall figure, e.g. ``(0.25, 2) -> "0.25m_2deg"``."""
    return f"{pos_m:g}m_{yaw_deg:g}deg"


# ----------------------------------------------------------------------------- errors

def position_errors(est_xy, truth_xy) -> np.ndarray:
    """Euclidean position error per frame (m).

    Parameters
    ----------
    est_xy, truth_xy : array_like, shape (N, 2)
        Estimated and true ENU positions (m). A non-finite estimate is a miss (+inf);
        a non-finite truth is not evaluated (NaN).
    """
    est = np.asarray(est_xy, dtype=np.float64).reshape(-1, 2)
    tru = np.asarray(truth_xy, dtype=np.float64).reshape(-1, 2)
    err = np.hypot(est[:, 0] - tru[:, 0], est[:, 1] - tru[:, 1])
    err[~np.all(np.isfinite(est), axis=1)] = np.inf
    err[~np.all(np.isfinite(tru), axis=1)] = np.nan
    return err


def heading_errors_deg(est_yaw_rad, truth_yaw_rad) -> np.ndarray:
    """Absolute heading error per frame (deg), wrapped across +-180 deg.

    Same miss/not-evaluated convention as :func:`position_errors`.
    """
    est = np.asarray(est_yaw_rad, dtype=np.float64).ravel()
    tru = np.asarray(truth_yaw_rad, dtype=np.float64).ravel()
    ok = np.isfinite(est) & np.isfinite(tru)
    err = np.full(est.shape, np.inf)
    err[ok] = np.degrees(np.abs(angle_diff(est[ok], tru[ok])))
    err[~np.isfinite(tru)] = np.nan
    return err


# ----------------------------------------------------------------------------- summaries

def percentile(values, q: float) -> float:
    """q-th percentile (0..100) of the finite values, ``numpy.percentile`` linear method; NaN if none."""
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return math.nan
    return float(np.percentile(v, q))


def recall(pos_err_m, yaw_err_deg, pos_m: float, yaw_deg: float | None) -> float:
    """Share of evaluated frames with position error <= ``pos_m`` and heading error <= ``yaw_deg``.

    Parameters
    ----------
    pos_err_m : array_like, shape (N,)
        Position errors (m); NaN = not evaluated, inf = miss.
    yaw_err_deg : array_like, shape (N,) or None
        Heading errors (deg); ``None`` (or ``yaw_deg=None``) scores position only.
    pos_m, yaw_deg : float
        The bounds (inclusive).

    Returns
    -------
    float
        In [0, 1]; NaN if no frame was evaluated.
    """
    pe = np.asarray(pos_err_m, dtype=np.float64).ravel()
    evaluated = ~np.isnan(pe)
    hit = pe <= pos_m
    if yaw_err_deg is not None and yaw_deg is not None:
        ye = np.asarray(yaw_err_deg, dtype=np.float64).ravel()
        evaluated &= ~np.isnan(ye)
        hit &= ye <= yaw_deg
    n = int(np.count_nonzero(evaluated))
    if n == 0:
        return math.nan
    return float(np.count_nonzero(hit & evaluated)) / n


def recall_curve(pos_err_m, yaw_err_deg, pos_grid_m, yaw_deg: float | None) -> np.ndarray:
    """Recall at each position bound of ``pos_grid_m`` with a fixed heading bound (for plots)."""
    return np.array([recall(pos_err_m, yaw_err_deg, float(p), yaw_deg) for p in np.ravel(pos_grid_m)])


def good_mask(pos_err_m, yaw_err_deg, params: MetricParams) -> np.ndarray:
    """Per-frame good flag: within ``good_pos_m`` and ``good_yaw_deg`` (NaN/inf are not good)."""
    pe = np.asarray(pos_err_m, dtype=np.float64)
    ye = np.asarray(yaw_err_deg, dtype=np.float64)
    return (pe <= params.good_pos_m) & (ye <= params.good_yaw_deg)


def path_length(xy) -> np.ndarray:
    """Cumulative distance travelled along a path (m), 0 at the first sample.

    Steps touching a non-finite point add nothing (the path is bridged, not broken).
    """
    p = np.asarray(xy, dtype=np.float64).reshape(-1, 2)
    if len(p) == 0:
        return np.zeros(0)
    # Carry the last finite point forward so a hole does not reset or poison the sum.
    filled = p.copy()
    last = None
    for i in range(len(filled)):
        if np.all(np.isfinite(filled[i])):
            last = filled[i].copy()
        elif last is not None:
            filled[i] = last
    step = np.hypot(np.diff(filled[:, 0]), np.diff(filled[:, 1]))
    step[~np.isfinite(step)] = 0.0
    return np.concatenate([[0.0], np.cumsum(step)])


def first_good_fix(t_s, good, dist_m) -> tuple[float | None, float | None, int | None]:
    """Time (s since the first frame), distance travelled (m) and index of the first good frame.

    Parameters
    ----------
    t_s : array_like, shape (N,)
        Frame times (s).
    good : array_like of bool, shape (N,)
    dist_m : array_like, shape (N,)
        Cumulative true distance travelled at each frame (m), see :func:`path_length`.

    Returns
    -------
    (time_s, distance_m, index), or (None, None, None) if no frame was good.
    """
    t = np.asarray(t_s, dtype=np.float64)
    g = np.asarray(good, dtype=bool)
    idx = np.flatnonzero(g)
    if len(t) == 0 or idx.size == 0:
        return None, None, None
    i = int(idx[0])
    return float(t[i] - t[0]), float(np.asarray(dist_m, dtype=np.float64)[i]), i


@dataclass(frozen=True)
class Spell:
    """A lost spell: frames ``[start, end)`` not good, after the first good fix.

    ``duration_s`` runs from the first lost frame to the first good frame after it
    (the recovery); for a spell still open at the end of the run, to the last frame.
    """

    start: int
    end: int
    duration_s: float
    distance_m: float
    recovered: bool


def lost_spells(t_s, good, dist_m, *, min_lost_s: float, start: int | None = None) -> list[Spell]:
    """Lost spells: maximal runs of not-good frames after the first good fix.

    Parameters
    ----------
    t_s, good, dist_m : array_like, shape (N,)
        Frame times (s), good flags, cumulative true distance (m).
    min_lost_s : float
        Runs shorter than this (s, by :attr:`Spell.duration_s`) are dropped.
    start : int, optional
        Index of the first good fix (spells are looked for after it); default the first good frame.
    """
    t = np.asarray(t_s, dtype=np.float64)
    g = np.asarray(good, dtype=bool)
    d = np.asarray(dist_m, dtype=np.float64)
    n = len(t)
    if start is None:
        idx = np.flatnonzero(g)
        if idx.size == 0:
            return []
        start = int(idx[0])
    spells = []
    i = int(start) + 1
    while i < n:
        if g[i]:
            i += 1
            continue
        j = i
        while j < n and not g[j]:
            j += 1
        recovered = j < n
        stop = j if recovered else n - 1
        dur = float(t[stop] - t[i])
        if dur >= min_lost_s:
            spells.append(Spell(i, j, dur, float(d[stop] - d[i]), recovered))
        i = j
    return spells


# ----------------------------------------------------------------------------- uncertainty

def chi2_2dof_quantile(p: float) -> float:
    """Quantile of the chi-square distribution with 2 degrees of freedom.

    Its CDF is ``1 - exp(-k / 2)`` in closed form, so the quantile is ``-2 ln(1 - p)``;
    p = 0.95 gives 5.9915 (standard tables: 5.991).
    """
    if not 0.0 < p < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {p}")
    return -2.0 * math.log1p(-p)


def normal_two_sided_quantile(p: float) -> float:
    """z such that a standard normal lies in [-z, z] with probability p (0.95 -> 1.95996)."""
    if not 0.0 < p < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {p}")
    return statistics.NormalDist().inv_cdf(0.5 + 0.5 * p)


def mahalanobis2_xy(err_xy, cov_xy) -> np.ndarray:
    """Squared Mahalanobis distance of planar errors under their 2x2 covariances.

    Parameters
    ----------
    err_xy : array_like, shape (N, 2)
        Estimate minus truth (m).
    cov_xy : array_like, shape (N, 2, 2)
        Reported position covariance (m^2).

    Returns
    -------
    ndarray, shape (N,)
        ``e^T C^-1 e``; NaN where the error or the covariance is not finite or the
        covariance is not positive definite (such frames count as outside any ellipse).
    """
    e = np.asarray(err_xy, dtype=np.float64).reshape(-1, 2)
    c = np.asarray(cov_xy, dtype=np.float64).reshape(-1, 2, 2)
    a, b, bb, d = c[:, 0, 0], c[:, 0, 1], c[:, 1, 0], c[:, 1, 1]
    det = a * d - b * bb
    ok = np.all(np.isfinite(e), axis=1) & np.all(np.isfinite(c.reshape(-1, 4)), axis=1) & (a > 0) & (det > 0)
    out = np.full(len(e), np.nan)
    ex, ey = e[ok, 0], e[ok, 1]
    # Inverse of [[a, b], [b', d]] is [[d, -b], [-b', a]] / det.
    out[ok] = (d[ok] * ex * ex - (b[ok] + bb[ok]) * ex * ey + a[ok] * ey * ey) / det[ok]
    return out


def inside_share(d2, threshold: float) -> float:
    """Share of frames with ``d2 <= threshold``; NaN d2 (no estimate, bad covariance) counts outside.

    Returns NaN when ``d2`` is empty.
    """
    v = np.asarray(d2, dtype=np.float64).ravel()
    if v.size == 0:
        return math.nan
    return float(np.count_nonzero(v <= threshold)) / v.size


def calibration_curve(d2, levels) -> np.ndarray:
    """Observed share inside the reported ellipse at each nominal probability in ``levels``.

    A calibrated covariance gives observed == nominal (the diagonal of the plot).
    """
    return np.array([inside_share(d2, chi2_2dof_quantile(float(p))) for p in np.ravel(levels)])


# ----------------------------------------------------------------------------- baselines

def interp_pose(t_src, pose_src, t_query, *, max_gap_s: float) -> np.ndarray:
    """Pose (x, y, yaw) at query times by linear interpolation (yaw through its unwrapped series).

    Parameters
    ----------
    t_src : array_like, shape (M,)
        Sample times (s), increasing.
    pose_src : array_like, shape (M, 3)
        x, y (m), yaw (rad). Rows with any non-finite value are skipped.
    t_query : array_like, shape (N,)
    max_gap_s : float
        No value (NaN) at a query time outside the samples or between two samples further
        apart than this.

    Returns
    -------
    ndarray, shape (N, 3)
    """
    ts = np.asarray(t_src, dtype=np.float64).ravel()
    ps = np.asarray(pose_src, dtype=np.float64).reshape(-1, 3)
    tq = np.asarray(t_query, dtype=np.float64).ravel()
    keep = np.isfinite(ts) & np.all(np.isfinite(ps), axis=1)
    ts, ps = ts[keep], ps[keep]
    out = np.full((len(tq), 3), np.nan)
    if len(ts) == 0:
        return out
    if len(ts) == 1:
        hit = np.abs(tq - ts[0]) <= 1e-9
        out[hit] = ps[0]
        return out
    yaw_u = np.unwrap(ps[:, 2])
    k = np.searchsorted(ts, tq, side="right")  # ts[k-1] <= tq < ts[k]
    lo = np.clip(k - 1, 0, len(ts) - 1)
    hi = np.clip(k, 0, len(ts) - 1)
    on_sample = tq == ts[lo]  # a query exactly on a sample needs no neighbour
    hi[on_sample] = lo[on_sample]
    inside = (tq >= ts[0]) & (tq <= ts[-1]) & ((ts[hi] - ts[lo]) <= max_gap_s)
    span = ts[hi] - ts[lo]
    w = np.where(span > 0, (tq - ts[lo]) / np.where(span > 0, span, 1.0), 0.0)
    x = ps[lo, 0] + w * (ps[hi, 0] - ps[lo, 0])
    y = ps[lo, 1] + w * (ps[hi, 1] - ps[lo, 1])
    yaw = wrap_angle(yaw_u[lo] + w * (yaw_u[hi] - yaw_u[lo]))
    out[inside, 0] = x[inside]
    out[inside, 1] = y[inside]
    out[inside, 2] = yaw[inside]
    return out


def dead_reckoning(odom_at_frames, truth_at_frames) -> np.ndarray:
    """Odometry-only trajectory anchored at the first frame that has both odometry and truth.

    The wheel-odometry pose lives in its own odom frame; its motion since the anchor
    frame k is composed onto the true pose there: ``dr_i = truth_k * inv(odom_k) * odom_i``.

    Parameters
    ----------
    odom_at_frames : array_like, shape (N, 3)
        Odometry pose (x, y, yaw) interpolated at the frame times (NaN rows allowed).
    truth_at_frames : array_like, shape (N, 3)
        True world pose at the frame times (NaN rows allowed).

    Returns
    -------
    ndarray, shape (N, 3)
        World poses; NaN before the anchor and where odometry is missing.
    """
    od = np.asarray(odom_at_frames, dtype=np.float64).reshape(-1, 3)
    tr = np.asarray(truth_at_frames, dtype=np.float64).reshape(-1, 3)
    out = np.full(od.shape, np.nan)
    fin_od = np.all(np.isfinite(od), axis=1)
    both = np.flatnonzero(fin_od & np.all(np.isfinite(tr), axis=1))
    if both.size == 0:
        return out
    k = int(both[0])
    o_k, t_k = tuple(od[k]), tuple(tr[k])
    for i in np.flatnonzero(fin_od):
        if i >= k:
            out[i] = compose2(t_k, relative2(o_k, tuple(od[i])))
    return out


def gnss_at_frames(gnss_t, gnss_xy, gnss_acc_m, frame_t, *, max_age_s: float):
    """Latest GNSS fix at or before each frame time, if not older than ``max_age_s``.

    Returns
    -------
    xy : ndarray (N, 2), acc_m : ndarray (N,), age_s : ndarray (N,)
        NaN where no fresh fix exists (an outage).
    """
    gt = np.asarray(gnss_t, dtype=np.float64).ravel()
    gxy = np.asarray(gnss_xy, dtype=np.float64).reshape(-1, 2)
    ga = np.asarray(gnss_acc_m, dtype=np.float64).ravel()
    ft = np.asarray(frame_t, dtype=np.float64).ravel()
    keep = np.isfinite(gt) & np.all(np.isfinite(gxy), axis=1)
    gt, gxy, ga = gt[keep], gxy[keep], ga[keep]
    xy = np.full((len(ft), 2), np.nan)
    acc = np.full(len(ft), np.nan)
    age = np.full(len(ft), np.nan)
    if len(gt) == 0:
        return xy, acc, age
    k = np.searchsorted(gt, ft, side="right") - 1
    has = k >= 0
    kk = np.clip(k, 0, None)
    a = ft - gt[kk]
    fresh = has & (a <= max_age_s)
    xy[fresh] = gxy[kk[fresh]]
    acc[fresh] = ga[kk[fresh]]
    age[fresh] = a[fresh]
    return xy, acc, age


# ----------------------------------------------------------------------------- one run

def status_counts(status, top: int = 12) -> dict:
    """How often the loop said what: status texts with their numbers replaced by ``#``, most frequent first.

    ``"slow frame 412 ms; global search"`` counts as ``"slow frame # ms"`` and ``"global search"``
    (parts separated by ``;`` are counted apart).
    """
    import re
    from collections import Counter

    c: Counter = Counter()
    for s in status if status is not None else ():
        for part in str(s).split(";"):
            # '/' would split the report's key paths (metrics.json keys are looked up by "a/b/c").
            part = re.sub(r"-?\d+(\.\d+)?", "#", part.strip()).replace("/", "|")
            if part:
                c[part] += 1
    return dict(c.most_common(top))


def _column(rec, name):
    try:
        return rec[name]
    except (KeyError, AttributeError, IndexError):
        return None



def _num(v):
    """JSON-safe float: NaN/inf become None."""
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _pose_block(pos_err, yaw_err, params: MetricParams) -> dict:
    out = {
        "recall": {recall_key(p, a): _num(recall(pos_err, yaw_err, p, a)) for p, a in params.recall_thresholds},
        "median_error_m": _num(percentile(pos_err, 50)),
        "p90_error_m": _num(percentile(pos_err, 90)),
        "evaluated_frames": int(np.count_nonzero(~np.isnan(pos_err))),
        "missed_frames": int(np.count_nonzero(np.isinf(pos_err))),
    }
    if yaw_err is not None:
        out["median_heading_error_deg"] = _num(percentile(yaw_err, 50))
        out["p90_heading_error_deg"] = _num(percentile(yaw_err, 90))
    return out


def compute_metrics(rec, params: MetricParams = MetricParams()) -> dict:
    """All metrics of one replayed run, as a JSON-ready dict (missing values are ``None``).

    Parameters
    ----------
    rec : mapping of per-frame arrays (length N)
        ``t`` (s), ``x``, ``y``, ``yaw`` (estimate; NaN = no estimate), ``cov`` (N, 3, 3),
        ``quality`` (strings), ``frame_ms``, ``truth_x``, ``truth_y``, ``truth_yaw`` (NaN = no
        truth), ``gnss_x``, ``gnss_y``, ``gnss_acc_m`` (fix in use at the frame, NaN = none),
        ``dr_x``, ``dr_y``, ``dr_yaw`` (dead-reckoning baseline). See
        :class:`tinyloc.replay.records.FrameRecords`.
    params : MetricParams

    Returns
    -------
    dict
        The top level carries the headline keys (``frames``, ``recall``, ``median_error_m``,
        ``p90_error_m``, ``median_heading_error_deg``, ``gnss_median_error_m``,
        ``inside_95_ellipse``, ``frame_ms_median``...); sections ``first_good_fix``, ``lost``,
        ``uncertainty``, ``latency``, ``quality``, ``gnss``, ``dead_reckoning`` hold the rest.
    """
    t = np.asarray(rec["t"], dtype=np.float64)
    n = len(t)
    est_xy = np.stack([rec["x"], rec["y"]], axis=1) if n else np.zeros((0, 2))
    tru_xy = np.stack([rec["truth_x"], rec["truth_y"]], axis=1) if n else np.zeros((0, 2))
    pos_err = position_errors(est_xy, tru_xy)
    yaw_err = heading_errors_deg(rec["yaw"], rec["truth_yaw"])
    has_truth = ~np.isnan(pos_err) & ~np.isnan(yaw_err)
    dist = path_length(tru_xy)
    good = good_mask(pos_err, yaw_err, params)

    m: dict = {"frames": n, "frames_with_truth": int(np.count_nonzero(has_truth))}
    m.update(_pose_block(pos_err, yaw_err, params))
    m["duration_s"] = _num(t[-1] - t[0]) if n else None
    m["truth_distance_m"] = _num(dist[-1]) if n else None

    # A fix the robot would act on: within the bound *and* flagged tracking (a lucky guess while
    # searching is not a fix). The first tracking flag, right or wrong, is reported beside it.
    q = np.asarray(rec["quality"]).astype(str)
    tracking = q == "tracking"
    ft, fd, fi = first_good_fix(t, good & tracking, dist)
    tt, td, ti = first_good_fix(t, tracking, dist)
    m["first_good_fix"] = {"time_s": ft, "distance_m": fd, "frame": fi,
                           "bound": f"{params.good_pos_m:g} m, {params.good_yaw_deg:g} deg",
                           "first_tracking_s": tt, "first_tracking_distance_m": td}

    status = _column(rec, "status")
    spells = [] if fi is None else lost_spells(t, good, dist, min_lost_s=params.min_lost_s, start=fi)
    durs = [s.duration_s for s in spells]
    m["lost"] = {
        "spells": len(spells),
        "recoveries": sum(1 for s in spells if s.recovered),
        "total_s": _num(sum(durs)) if spells else 0.0,
        "longest_s": _num(max(durs)) if spells else 0.0,
        "median_s": _num(float(np.median(durs))) if spells else None,
        "longest_distance_m": _num(max(s.distance_m for s in spells)) if spells else 0.0,
        "min_lost_s": params.min_lost_s,
        "list": [{"start_t": _num(t[s.start]), "duration_s": _num(s.duration_s),
                  "distance_m": _num(s.distance_m), "recovered": s.recovered,
                  "quality_at_start": str(q[s.start]),
                  "status_at_start": str(status[s.start]) if status is not None else ""} for s in spells],
    }

    # Calibration: every frame with truth counts; no estimate or a bad covariance is outside.
    cov = np.asarray(rec["cov"], dtype=np.float64).reshape(-1, 3, 3)
    err_xy = est_xy - tru_xy
    d2 = mahalanobis2_xy(err_xy[has_truth], cov[has_truth, :2, :2])
    k95 = chi2_2dof_quantile(params.ellipse_p)
    yaw_sig = np.sqrt(np.where(cov[has_truth, 2, 2] > 0, cov[has_truth, 2, 2], np.nan))
    yaw_z = np.radians(yaw_err[has_truth]) / yaw_sig
    z95 = normal_two_sided_quantile(params.ellipse_p)
    inside = inside_share(d2, k95)
    m["inside_95_ellipse"] = _num(inside)
    fin_d2 = d2[np.isfinite(d2)]
    m["uncertainty"] = {
        "ellipse_p": params.ellipse_p,
        "chi2_threshold": k95,
        "inside_ellipse": _num(inside),
        "heading_inside": _num(inside_share(yaw_z ** 2, z95 ** 2)),
        "mean_nees_xy": _num(float(np.mean(fin_d2))) if fin_d2.size else None,
        "invalid_cov_frames": int(np.count_nonzero(np.isnan(d2) & np.isfinite(pos_err[has_truth]))),
    }

    fms = np.asarray(rec["frame_ms"], dtype=np.float64)
    m["frame_ms_median"] = _num(percentile(fms, 50))
    m["latency"] = {"median_ms": m["frame_ms_median"], "p99_ms": _num(percentile(fms, 99)),
                    "max_ms": _num(float(np.max(fms[np.isfinite(fms)])) if np.any(np.isfinite(fms)) else None)}

    qshare = {k: (float(np.count_nonzero(q == k)) / n if n else None) for k in QUALITIES}
    # The dangerous case: the flag says tracking while the pose is outside the loosest bound.
    loose_p, loose_a = max(params.recall_thresholds)
    wrong = has_truth & (q == "tracking") & ~((pos_err <= loose_p) & (yaw_err <= loose_a))
    n_track = int(np.count_nonzero(has_truth & (q == "tracking")))
    m["quality"] = {"share": qshare,
                    "tracking_but_wrong_frames": int(np.count_nonzero(wrong)),
                    "tracking_but_wrong_share": (float(np.count_nonzero(wrong)) / n_track) if n_track else None,
                    "wrong_bound": f"{loose_p:g} m, {loose_a:g} deg"}

    m["status_counts"] = status_counts(_column(rec, "status"))

    # GNSS baseline: position only (a fix has no heading); a frame in an outage is a miss.
    gxy = np.stack([rec["gnss_x"], rec["gnss_y"]], axis=1) if n else np.zeros((0, 2))
    g_err = position_errors(gxy, tru_xy)
    g_acc = np.asarray(rec["gnss_acc_m"], dtype=np.float64)
    g_cov = np.zeros((n, 2, 2))
    g_cov[:, 0, 0] = g_cov[:, 1, 1] = g_acc ** 2
    g_d2 = mahalanobis2_xy((gxy - tru_xy)[has_truth], g_cov[has_truth])
    gnss = {"recall_position_only": {f"{p:g}m": _num(recall(g_err, None, p, None))
                                     for p in sorted({p for p, _ in params.recall_thresholds})},
            "median_error_m": _num(percentile(g_err, 50)), "p90_error_m": _num(percentile(g_err, 90)),
            "frames_without_fix": int(np.count_nonzero(np.isinf(g_err))),
            "inside_95_circle": _num(inside_share(g_d2, k95)),
            "max_age_s": params.gnss_max_age_s}
    m["gnss"] = gnss
    m["gnss_median_error_m"] = gnss["median_error_m"]

    dr_err = position_errors(np.stack([rec["dr_x"], rec["dr_y"]], axis=1) if n else np.zeros((0, 2)), tru_xy)
    dr_yaw = heading_errors_deg(rec["dr_yaw"], rec["truth_yaw"])
    m["dead_reckoning"] = _pose_block(dr_err, dr_yaw, params)
    m["dead_reckoning"]["final_error_m"] = _num(dr_err[np.isfinite(dr_err)][-1]) if np.any(np.isfinite(dr_err)) else None
    m["dr_median_error_m"] = m["dead_reckoning"]["median_error_m"]
    return m
