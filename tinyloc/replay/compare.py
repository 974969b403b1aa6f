"""Before / after: the headline figures of a replay beside those of an earlier replay of the same drive.

Used while tuning: replay, change a setting (``--set``), replay again with ``--compare`` pointing at
the first output, read the changes.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from ..errors import InputError

# metrics.json paths compared; in the "figures" dict '/' is written '|' so a figure is one key.
FIGURES: tuple[str, ...] = (
    "recall/0.25m_2deg", "recall/0.5m_2deg", "recall/1m_3deg", "recall/2m_5deg",
    "median_error_m", "p90_error_m", "median_heading_error_deg", "p90_heading_error_deg",
    "inside_95_ellipse", "quality/tracking_but_wrong_share", "first_good_fix/time_s", "lost/spells",
    "lost/total_s", "missed_frames", "frame_ms_median", "latency/p99_ms",
)


def figure_name(path: str) -> str:
    """Key of a figure in ``compare.figures`` (``recall/1m_3deg`` -> ``recall|1m_3deg``)."""
    return path.replace("/", "|")


def load_previous(path, run_name: str | None = None) -> tuple[dict, str]:
    """The earlier metrics: ``path`` is a metrics.json, a replay output folder, or a batch folder
    (then ``run_name``'s sub-folder is used). Returns (metrics, file it came from)."""
    p = Path(path)
    cands = [p] if p.is_file() else [p / "metrics.json"] + ([p / run_name / "metrics.json"] if run_name else [])
    for c in cands:
        if c.is_file():
            try:
                m = json.loads(c.read_text(encoding="utf-8"))
            except (OSError, ValueError) as e:
                raise InputError(f"{c}: not a readable metrics.json ({e})") from None
            if not isinstance(m, dict) or "frames" not in m:
                raise InputError(f"{c}: not a replay's metrics.json (no 'frames')")
            return m, str(c)
    raise InputError(f"--compare: no metrics.json in {p}" + (f" or {p / run_name}" if run_name else ""))


def _value(m: dict, path: str):
    v = m
    for part in path.split("/"):
        if not isinstance(v, dict) or part not in v:
            return None
        v = v[part]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        return None
    return v


def compare(now: dict, before: dict, source: str) -> dict:
    """``{"with": source, "same_frames": bool, "figures": {name: {"before", "now", "change"}}}``.

    ``change`` is now minus before (None when either is missing).
    """
    figs = {}
    for path in FIGURES:
        a, b = _value(before, path), _value(now, path)
        figs[figure_name(path)] = {"before": a, "now": b,
                                   "change": (b - a) if a is not None and b is not None else None}
    return {"with": source, "same_frames": before.get("frames") == now.get("frames"), "figures": figs}
