"""Finding the gaps in a run folder: missing frames, sensor dropouts, GNSS outages, reader faults.

Each gap is reported as one line of text (the report lists them; metrics.json
carries them under ``gaps``). Nothing here raises on bad data: a gap is data.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class GapParams:
    """When a pause in a sensor stream counts as a gap.

    A stream has a gap where two consecutive samples are further apart than
    ``max(min_gap_s, factor * median interval)`` (for frames ``frame_factor * median interval``,
    so that one dropped frame, which doubles the interval, is seen); GNSS has an outage where no fix is
    younger than ``gnss_max_age_s`` for longer than that age.
    """

    factor: float = 2.5
    frame_factor: float = 1.5
    min_gap_s: float = 0.25
    gnss_max_age_s: float = 2.0


def stream_gaps(t, name: str, params: GapParams, *, t_first: float | None = None,
                t_last: float | None = None) -> list[str]:
    """Gaps in one time series, as lines ``"imu.csv: no samples for 1.20 s (t 12.40 .. 13.60 s)"``.

    ``t_first`` / ``t_last`` (the frame span) also report a stream that starts late or stops early.
    """
    t = np.asarray(t, dtype=np.float64).ravel()
    out = []
    if t.size == 0:
        return [f"{name}: no samples at all"]
    if t.size >= 2:
        dt = np.diff(t)
        pos = dt[dt > 0]
        med = float(np.median(pos)) if pos.size else 0.0
        lim = max(params.min_gap_s, params.factor * med)
        for k in np.flatnonzero(dt > lim):
            out.append(f"{name}: no samples for {dt[k]:.2f} s (t {t[k]:.2f} .. {t[k + 1]:.2f} s)")
    if t_first is not None and t[0] - t_first > params.min_gap_s:
        out.append(f"{name}: starts {t[0] - t_first:.2f} s after the first frame")
    if t_last is not None and t_last - t[-1] > params.min_gap_s:
        out.append(f"{name}: stops {t_last - t[-1]:.2f} s before the last frame")
    return out


def gnss_outages(gnss_t, frame_t, max_age_s: float) -> list[tuple[float, float]]:
    """Spans (start, end) of frame time during which no GNSS fix is younger than ``max_age_s``."""
    gt = np.asarray(gnss_t, dtype=np.float64).ravel()
    ft = np.asarray(frame_t, dtype=np.float64).ravel()
    if ft.size == 0:
        return []
    if gt.size == 0:
        return [(float(ft[0]), float(ft[-1]))]
    k = np.searchsorted(gt, ft, side="right") - 1
    age = np.where(k >= 0, ft - gt[np.clip(k, 0, None)], np.inf)
    stale = age > max_age_s
    spans = []
    i = 0
    n = len(ft)
    while i < n:
        if not stale[i]:
            i += 1
            continue
        j = i
        while j < n and stale[j]:
            j += 1
        spans.append((float(ft[i]), float(ft[j - 1])))
        i = j
    return spans


def frame_gaps(frame_t, params: GapParams) -> list[str]:
    """Missing frames, seen as pauses in frames.csv time stamps."""
    t = np.asarray(frame_t, dtype=np.float64).ravel()
    if t.size < 2:
        return []
    dt = np.diff(t)
    med = float(np.median(dt))
    lim = params.frame_factor * med
    out = []
    for k in np.flatnonzero(dt > lim):
        missing = int(round(dt[k] / med)) - 1 if med > 0 else 0
        out.append(f"frames: {dt[k]:.2f} s pause after t {t[k]:.2f} s (about {missing} frames missing)")
    return out


def find_gaps(rf, params: GapParams = GapParams()) -> list[str]:
    """Every gap of a :class:`tinyloc.runfolder.RunFolder`: the reader's warnings, then stream gaps."""
    out = [f"reader: {w}" for w in rf.warnings]
    ft = rf.frame_t
    t0 = float(ft[0]) if len(ft) else None
    t1 = float(ft[-1]) if len(ft) else None
    out += frame_gaps(ft, params)
    out += stream_gaps(rf.imu[:, 0], "imu.csv", params, t_first=t0, t_last=t1)
    out += stream_gaps(rf.odometry[:, 0], "odometry.csv", params, t_first=t0, t_last=t1)
    for a, b in gnss_outages(rf.gnss[:, 0], ft, params.gnss_max_age_s):
        out.append(f"gnss.csv: outage, no fix younger than {params.gnss_max_age_s:g} s from t {a:.2f} to {b:.2f} s "
                   f"({b - a:.2f} s)")
    if rf.truth is not None:
        out += stream_gaps(rf.truth[:, 0], "truth.csv", params, t_first=t0, t_last=t1)
    return out
