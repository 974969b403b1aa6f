"""Per-frame records of a replay: fixed-size column arrays, and the per-frame CSV (docs/replay.md).

The arrays are allocated once for the number of frames in the run and filled in
place, so the replay loop does not grow lists. Angles are radians in the arrays
and the CSV (``yaw``, ``truth_yaw``, ``dr_yaw``); only the ``*_deg`` error columns
are in degrees.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from ..errors import InputError

# Column order of frames.csv. The first block is what the bag exporter reads.
CSV_COLUMNS: tuple[str, ...] = (
    "t", "x", "y", "yaw", "lat", "lon",
    "cov_xx", "cov_xy", "cov_xyaw", "cov_yy", "cov_yyaw", "cov_yawyaw", "quality",
    "frame", "file", "status", "frame_ms",
    "truth_x", "truth_y", "truth_yaw", "err_m", "err_yaw_deg",
    "gnss_x", "gnss_y", "gnss_acc_m", "gnss_err_m",
    "dr_x", "dr_y", "dr_yaw", "dr_err_m", "dr_err_yaw_deg",
)
_FLOAT_COLS = ("t", "x", "y", "yaw", "lat", "lon", "frame_ms", "truth_x", "truth_y", "truth_yaw",
               "gnss_x", "gnss_y", "gnss_acc_m", "dr_x", "dr_y", "dr_yaw")
_COV_INDEX = {"cov_xx": (0, 0), "cov_xy": (0, 1), "cov_xyaw": (0, 2),
              "cov_yy": (1, 1), "cov_yyaw": (1, 2), "cov_yawyaw": (2, 2)}


class FrameRecords:
    """Column arrays for ``n`` frames (NaN / empty string until filled).

    Attributes are the float columns of :data:`CSV_COLUMNS` (float64, shape (n,)),
    ``cov`` (n, 3, 3), ``quality``, ``status``, ``file`` (object arrays of str) and
    ``frame`` (int64 index of the frame in the run's frames.csv). Indexing by name
    (``rec["x"]``) returns the same arrays, so a record set is a mapping for
    :func:`tinyloc.replay.metrics.compute_metrics`.
    """

    def __init__(self, n: int):
        self.n = int(n)
        for name in _FLOAT_COLS:
            setattr(self, name, np.full(self.n, np.nan))
        self.cov = np.full((self.n, 3, 3), np.nan)
        self.quality = np.full(self.n, "no-fix", dtype=object)
        self.status = np.full(self.n, "", dtype=object)
        self.file = np.full(self.n, "", dtype=object)
        self.frame = np.arange(self.n, dtype=np.int64)

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, name: str):
        return getattr(self, name)

    def truncate(self, n: int) -> None:
        """Keep the first ``n`` frames (a replay stopped early)."""
        for name in (*_FLOAT_COLS, "cov", "quality", "status", "file", "frame"):
            setattr(self, name, getattr(self, name)[:n])
        self.n = int(n)

    def errors(self):
        """(err_m, err_yaw_deg, gnss_err_m, dr_err_m, dr_err_yaw_deg) per frame (see metrics conventions)."""
        from .metrics import heading_errors_deg, position_errors

        txy = np.stack([self.truth_x, self.truth_y], axis=1)
        return (position_errors(np.stack([self.x, self.y], axis=1), txy),
                heading_errors_deg(self.yaw, self.truth_yaw),
                position_errors(np.stack([self.gnss_x, self.gnss_y], axis=1), txy),
                position_errors(np.stack([self.dr_x, self.dr_y], axis=1), txy),
                heading_errors_deg(self.dr_yaw, self.truth_yaw))


def _fmt(v: float, nd: int) -> str:
    if not math.isfinite(v):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    return f"{v:.{nd}f}"


def write_csv(rec: FrameRecords, path) -> Path:
    """Write the per-frame CSV (header row, one line per frame). Returns the path."""
    path = Path(path)
    err, yerr, gerr, drerr, dryerr = rec.errors()
    derived = {"err_m": err, "err_yaw_deg": yerr, "gnss_err_m": gerr, "dr_err_m": drerr, "dr_err_yaw_deg": dryerr}
    digits = {"lat": 9, "lon": 9, "t": 6, "frame_ms": 3}
    with open(path, "w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(CSV_COLUMNS)
        for i in range(rec.n):
            row = []
            for c in CSV_COLUMNS:
                if c in _COV_INDEX:
                    r, k = _COV_INDEX[c]
                    row.append(repr(float(rec.cov[i, r, k])) if math.isfinite(rec.cov[i, r, k]) else "nan")
                elif c in ("quality", "status", "file"):
                    row.append(str(getattr(rec, c)[i]))
                elif c == "frame":
                    row.append(str(int(rec.frame[i])))
                elif c in derived:
                    row.append(_fmt(float(derived[c][i]), 4))
                else:
                    row.append(_fmt(float(getattr(rec, c)[i]), digits.get(c, 4)))
            w.writerow(row)
    return path


def read_csv(path) -> FrameRecords:
    """Read a per-frame CSV written by :func:`write_csv` (extra columns ignored)."""
    path = Path(path)
    try:
        with open(path, newline="") as f:
            rows = [r for r in csv.reader(f) if r and not r[0].startswith("#")]
    except OSError as e:
        raise InputError(f"{path}: cannot read ({e.strerror or e})") from None
    if not rows:
        raise InputError(f"{path}: empty file (no header row)")
    head = rows[0]
    missing = [c for c in ("t", "x", "y", "yaw", "quality") if c not in head]
    if missing:
        raise InputError(f"{path}: missing columns {', '.join(missing)}")
    col = {c: i for i, c in enumerate(head)}
    body = [r for r in rows[1:] if len(r) == len(head)]
    rec = FrameRecords(len(body))
    for i, r in enumerate(body):
        try:
            for c in _FLOAT_COLS:
                if c in col:
                    getattr(rec, c)[i] = float(r[col[c]])
            for c, (a, b) in _COV_INDEX.items():
                if c in col:
                    rec.cov[i, a, b] = rec.cov[i, b, a] = float(r[col[c]])
            if "frame" in col:
                rec.frame[i] = int(r[col["frame"]])
        except ValueError:
            raise InputError(f"{path}: line {i + 2}: not a number") from None
        for c in ("quality", "status", "file"):
            if c in col:
                getattr(rec, c)[i] = r[col[c]]
    return rec
