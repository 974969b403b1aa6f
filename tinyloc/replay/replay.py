"""Replay one recorded drive through a localizer, as fast as the CPU allows, and score it.

The run folder is read leniently (bad rows dropped and reported, see
:mod:`tinyloc.runfolder`); ground truth, the GNSS-only and the dead-reckoning-only
baselines are put on the frame times; the localizer is stepped frame by frame with
the sensor rows that arrived since the previous frame; every pose goes into
fixed-size per-frame records (:class:`~tinyloc.replay.records.FrameRecords`).
Failures inside the loop are data: a frame that cannot be decoded is passed on as
``image=None`` and its status says why.

All positions are scored in one world frame: the map's ENU frame when a map is
given (truth and GNSS are converted from latitude/longitude when the run's origin
differs from the map's), otherwise the run's own origin.
"""

from __future__ import annotations

from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
import math
import time
from typing import Callable, Protocol

import numpy as np

from ..errors import RunFolderError
from ..geo import LocalFrame
from ..runfolder import RowSlicer, RunFolder
from . import metrics as M
from .gaps import GapParams, find_gaps
from .records import FrameRecords


@dataclass(frozen=True)
class ReplayParams:
    """Settings of one replay.

    Parameters
    ----------
    metrics : MetricParams
        What counts as good and lost (see :mod:`tinyloc.replay.metrics`).
    gaps : GapParams
        When a pause in a stream is reported as a gap.
    worst_frames : int
        How many of the worst frames the report shows.
    prefetch : int
        Frames decoded ahead on a helper thread (0: decode in line).
    max_frames : int or None
        Stop after this many frames (None: the whole run).
    """

    metrics: M.MetricParams = field(default_factory=M.MetricParams)
    gaps: GapParams = field(default_factory=GapParams)
    worst_frames: int = 4
    max_frames: int | None = None
    prefetch: int = 2


@dataclass
class ReplayFrame:
    """What the localizer gets for one frame.

    ``imu`` (k, 4) t,fx,fy,fz; ``odometry`` (k, 4) t,x,y,yaw; ``gnss`` (k, 5) t,lat,lon,h,acc_m:
    the rows with time in (previous frame time, this frame time], views into the run's arrays.
    ``image`` is BGR uint8 or None when the file could not be decoded (``image_fault`` says why).
    """

    index: int
    t: float
    image: np.ndarray | None
    image_fault: str
    imu: np.ndarray
    odometry: np.ndarray
    gnss: np.ndarray


class Localizer(Protocol):
    """What replay drives: one call per frame, returning a pose with the ``PoseEstimate`` fields
    (``x``, ``y``, ``yaw``, ``lat``, ``lon``, ``cov``, ``quality``, ``frame_ms``, ``status``)."""

    def step(self, frame: ReplayFrame): ...


@dataclass
class ReplayResult:
    """Everything one replay produced (the CLI writes it to disk)."""

    name: str
    records: FrameRecords
    metrics: dict
    gaps: list[str]
    worst: list[int]
    world: LocalFrame | None
    wall_s: float
    run_folder: RunFolder | None = None
    localizer: object = None


def _same_origin(a: LocalFrame | None, b: LocalFrame | None) -> bool:
    if a is None or b is None:
        return a is b
    return (abs(a.lat0_deg - b.lat0_deg) < 1e-9 and abs(a.lon0_deg - b.lon0_deg) < 1e-9)


def _pose_f(pose, name: str, default=math.nan) -> float:
    v = getattr(pose, name, default)
    try:
        return float(v)
    except (TypeError, ValueError):
        return default


def prepare_records(rf: RunFolder, world: LocalFrame | None, params: ReplayParams) -> FrameRecords:
    """Per-frame records with truth, GNSS and dead-reckoning columns filled, estimates empty.

    Parameters
    ----------
    rf : RunFolder
    world : LocalFrame or None
        The scoring frame (the map's); None uses the run's origin.
    """
    n = len(rf.frame_t) if params.max_frames is None else min(len(rf.frame_t), params.max_frames)
    rec = FrameRecords(n)
    ft = rf.frame_t[:n]
    rec.t[:] = ft
    rec.file[:] = rf.frame_files[:n]
    world = world or rf.frame
    mp = params.metrics
    truth = None
    if rf.truth is not None and len(rf.truth):
        tt = rf.truth
        if world is not None and not _same_origin(world, rf.frame):
            tx, ty = world.to_enu_xy(tt[:, 1], tt[:, 2])
        else:
            tx, ty = tt[:, 4], tt[:, 5]
        truth = M.interp_pose(tt[:, 0], np.stack([tx, ty, tt[:, 3]], 1), ft, max_gap_s=mp.truth_max_gap_s)
        rec.truth_x[:], rec.truth_y[:], rec.truth_yaw[:] = truth[:, 0], truth[:, 1], truth[:, 2]
    if len(rf.gnss) and world is not None:
        gx, gy = world.to_enu_xy(rf.gnss[:, 1], rf.gnss[:, 2])
        gxy, gacc, _ = M.gnss_at_frames(rf.gnss[:, 0], np.stack([gx, gy], 1), rf.gnss[:, 4], ft,
                                        max_age_s=mp.gnss_max_age_s)
        rec.gnss_x[:], rec.gnss_y[:], rec.gnss_acc_m[:] = gxy[:, 0], gxy[:, 1], gacc
    if len(rf.odometry) and truth is not None:
        od = M.interp_pose(rf.odometry[:, 0], rf.odometry[:, 1:4], ft, max_gap_s=max(1.0, mp.truth_max_gap_s))
        dr = M.dead_reckoning(od, truth)
        rec.dr_x[:], rec.dr_y[:], rec.dr_yaw[:] = dr[:, 0], dr[:, 1], dr[:, 2]
    return rec


def _load(rf: RunFolder, i: int):
    try:
        return rf.load_frame(i), ""
    except (RunFolderError, OSError) as e:
        return None, str(e)


def drive(rf: RunFolder, localizer: Localizer, rec: FrameRecords, *,
          progress: Callable[[int, int], None] | None = None, prefetch: int = 2) -> None:
    """Step ``localizer`` through every frame of ``rec`` and fill its estimate columns in place.

    Parameters
    ----------
    prefetch : int
        Frames decoded ahead on a helper thread while the loop works (image decoding releases
        the GIL, so it overlaps with the loop); 0 decodes in line. Memory: ``prefetch + 1`` images.
    """
    imu, odo, gnss = RowSlicer(rf.imu, 4), RowSlicer(rf.odometry, 4), RowSlicer(rf.gnss, 5)
    n = rec.n
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="replay-decode") if prefetch > 0 else None
    ahead: deque = deque()
    nxt = 0
    try:
        for i in range(n):
            if pool is None:
                image, fault = _load(rf, i)
            else:
                while nxt < n and nxt <= i + prefetch:
                    ahead.append(pool.submit(_load, rf, nxt))
                    nxt += 1
                image, fault = ahead.popleft().result()
            _step(localizer, rf, rec, i, image, fault, imu, odo, gnss)
            if progress is not None:
                progress(i + 1, n)
    finally:
        if pool is not None:
            for f in ahead:
                f.cancel()
            pool.shutdown(wait=True)


def _step(localizer, rf, rec, i, image, fault, imu, odo, gnss) -> None:
    """One frame: hand it to the localizer, put its pose into the records."""
    t = float(rec.t[i])
    frame = ReplayFrame(i, t, image, fault, imu.upto(t), odo.upto(t), gnss.upto(t))
    t0 = time.perf_counter()
    try:
        pose = localizer.step(frame)
    except Exception as e:  # noqa: BLE001 - a localizer that trips on one frame is data, the run goes on
        pose = None
        fault = (fault + "; " if fault else "") + f"localizer raised {type(e).__name__}: {e}"[:160]
    wall_ms = (time.perf_counter() - t0) * 1e3
    rec.x[i], rec.y[i], rec.yaw[i] = _pose_f(pose, "x"), _pose_f(pose, "y"), _pose_f(pose, "yaw")
    rec.lat[i], rec.lon[i] = _pose_f(pose, "lat"), _pose_f(pose, "lon")
    cov = getattr(pose, "cov", None)
    if cov is not None:
        c = np.asarray(cov, dtype=np.float64)
        if c.shape == (3, 3):
            rec.cov[i] = c
    q = str(getattr(pose, "quality", "no-fix"))
    rec.quality[i] = q if q in M.QUALITIES else "no-fix"
    if rec.quality[i] == "no-fix":
        # A no-fix pose is not an estimate, whatever numbers it carries.
        rec.x[i] = rec.y[i] = rec.yaw[i] = math.nan
    fms = _pose_f(pose, "frame_ms")
    rec.frame_ms[i] = fms if math.isfinite(fms) else wall_ms
    status = str(getattr(pose, "status", "") or "")
    if "localizer raised" in fault:
        rec.status[i] = fault[fault.index("localizer raised"):][:200]
    else:
        rec.status[i] = (f"image unreadable; {status}" if fault else status)[:200]


def worst_frames(rec: FrameRecords, k: int) -> list[int]:
    """Indices of the ``k`` frames with the largest position error (heading breaks ties), in time order.

    Frames with a wrong estimate come first (they show why the loop was wrong); frames without
    an estimate fill the remaining places.
    """
    err, yerr, *_ = rec.errors()
    fin = np.isfinite(err)
    score = np.where(fin, err + 0.01 * np.nan_to_num(yerr, nan=0.0, posinf=0.0), -1.0)
    order = [int(i) for i in np.argsort(-score, kind="stable") if fin[i]][:k]
    misses = [int(i) for i in np.flatnonzero(np.isinf(err))]
    if len(order) < k and misses:
        # Spread the misses over the run rather than taking the first few in a row.
        take = np.linspace(0, len(misses) - 1, min(k - len(order), len(misses))).round().astype(int)
        order += [misses[j] for j in take]
    return sorted(set(order))


def replay_run(run, localizer_factory: Callable[[RunFolder], Localizer], *, world: LocalFrame | None = None,
               params: ReplayParams = ReplayParams(), progress=None) -> ReplayResult:
    """Replay one run folder and score it.

    Parameters
    ----------
    run : str or Path
        The run folder.
    localizer_factory : callable
        ``factory(run_folder) -> Localizer``; built after the folder is read (it may need
        the camera calibration).
    world : LocalFrame, optional
        Scoring frame (the map's ENU frame); default the run's origin.
    params : ReplayParams
    progress : callable(done, total), optional

    Raises
    ------
    RunFolderError
        Only for faults that leave nothing to replay (no run.json, no camera, no frames).
    """
    rf = RunFolder.open(run, strict=False)
    if len(rf.frame_t) == 0:
        raise RunFolderError(f"{rf.path}/frames.csv: no usable frames to replay")
    gaps = find_gaps(rf, params.gaps)
    rec = prepare_records(rf, world, params)
    loc = localizer_factory(rf)
    t0 = time.perf_counter()
    drive(rf, loc, rec, progress=progress, prefetch=params.prefetch)
    wall = time.perf_counter() - t0
    unreadable = [f"frame {i} ({rec.file[i]}): image unreadable" for i in range(rec.n)
                  if str(rec.status[i]).startswith("image unreadable")]
    raised = [i for i in range(rec.n) if str(rec.status[i]).startswith("localizer raised")]
    if raised and len(raised) == rec.n:
        raise RunFolderError(f"{rf.path}: the localizer failed on every frame ({rec.status[raised[0]]})")
    gaps = gaps + unreadable + [f"frame {i} ({rec.file[i]}): {rec.status[i]}" for i in raised]
    m = M.compute_metrics(rec, params.metrics)
    m["replay"] = {"wall_s": wall, "frames_per_s": (rec.n / wall) if wall > 0 else None}
    m["gaps"] = {"count": len(gaps), "list": gaps[:200]}
    m["run"] = {"name": rf.name, "path": str(rf.path), "frames_in_run": len(rf.frame_t),
                "truth": rf.truth is not None, "complete": bool(rf.meta.get("complete", True))}
    return ReplayResult(rf.name, rec, m, gaps, worst_frames(rec, params.worst_frames), world or rf.frame, wall,
                        run_folder=rf, localizer=loc)
