"""Where frames come from: a run folder, a live camera with the serial bridge, or a folder of images.

Every source is an iterator of :class:`~tinyloc.runtime.loop.Frame` with a ``dropped`` counter
(frames skipped because the loop was late: a late frame is dropped, never queued) and
``close()``. Opening a source validates it and raises a one-line
:class:`~tinyloc.errors.InputError`; once iterating, faults become frames with ``image=None``
and an ``image_fault`` text.

``open_source(spec)``: an existing directory with ``run.json`` is a run folder; another
directory is a folder of images; ``camera:INDEX`` or ``camera:URL`` (anything
``cv2.VideoCapture`` opens) is a live camera.
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import numpy as np

from ..errors import InputError, RunFolderError
from ..runfolder import RowSlicer
from .loop import Frame

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp")


class _Pacer:
    """Real-time pacing of a recorded source: wait for a frame's due time, drop it if already late."""

    def __init__(self, realtime: bool, late_ms: float):
        self.realtime = realtime
        self.late_s = late_ms / 1e3
        self.t0_wall = None
        self.t0_sensor = None

    def admit(self, t: float) -> bool:
        if not self.realtime:
            return True
        now = time.monotonic()
        if self.t0_wall is None:
            self.t0_wall, self.t0_sensor = now, t
            return True
        due = self.t0_wall + (t - self.t0_sensor)
        if now < due:
            time.sleep(due - now)
            return True
        return (now - due) <= self.late_s


class RunFolderSource:
    """Frames of a recorded run folder, with the sensor rows that arrived since the previous frame.

    Parameters
    ----------
    path : str or Path
    realtime : bool
        Pace the frames at their recorded times (and drop those the loop is too late for).
    late_ms : float
        In real-time mode, a frame more than this late is dropped.
    max_frames : int, optional
        Stop after this many frames.
    """

    def __init__(self, path, *, realtime: bool = False, late_ms: float = 100.0, max_frames: int | None = None,
                 labels: bool = False):
        from ..runfolder import RunFolder

        self.rf = RunFolder.open(path, strict=False)
        if len(self.rf.frame_t) == 0:
            raise RunFolderError(f"{self.rf.path}/frames.csv: no usable frames")
        self.name = self.rf.name
        self.camera = self.rf.camera
        self.labels = labels
        if labels and not self.rf.has_labels:
            raise RunFolderError(f"{self.rf.path}: external labels asked for, but the run has no labels/ folder")
        self.realtime = realtime
        self.late_ms = late_ms
        self.max_frames = max_frames
        self.dropped = 0
        self.n = len(self.rf.frame_t) if max_frames is None else min(max_frames, len(self.rf.frame_t))

    def __len__(self) -> int:
        return self.n

    def __iter__(self):
        rf = self.rf
        imu, odo, gnss = RowSlicer(rf.imu, 4), RowSlicer(rf.odometry, 4), RowSlicer(rf.gnss, 5)
        pacer = _Pacer(self.realtime, self.late_ms)
        for i in range(self.n):
            t = float(rf.frame_t[i])
            rows = (imu.upto(t), odo.upto(t), gnss.upto(t))
            if not pacer.admit(t):
                self.dropped += 1
                continue
            fault = ""
            try:
                image = rf.load_frame(i)
            except (RunFolderError, OSError, ValueError) as e:
                image, fault = None, str(e)
            lab = None
            if self.labels:
                try:
                    lab = rf.load_label(i)
                except (RunFolderError, OSError, ValueError):
                    lab = None
            yield Frame(i, t, image, fault, *rows, labels=lab)

    def truth_xy(self, world=None) -> np.ndarray | None:
        """Ground truth (x, y, yaw) per frame in ``world`` (a LocalFrame; default the run's own), or None."""
        from ..replay.metrics import interp_pose

        tt = self.rf.truth
        if tt is None or not len(tt):
            return None
        if world is not None and self.rf.frame is not None and (
                abs(world.lat0_deg - self.rf.frame.lat0_deg) > 1e-12 or abs(world.lon0_deg - self.rf.frame.lon0_deg) > 1e-12):
            x, y = world.to_enu_xy(tt[:, 1], tt[:, 2])
        else:
            x, y = tt[:, 4], tt[:, 5]
        return interp_pose(tt[:, 0], np.stack([x, y, tt[:, 3]], 1), self.rf.frame_t[:self.n], max_gap_s=1.0)

    def close(self) -> None:
        pass


class ImageFolderSource:
    """The images of a folder in name order, at a nominal rate, without other sensors."""

    def __init__(self, path, *, fps: float = 10.0, realtime: bool = False, late_ms: float = 100.0,
                 max_frames: int | None = None):
        import cv2

        self._cv2 = cv2
        p = Path(path)
        if not p.is_dir():
            raise InputError(f"{p}: not a directory")
        self.files = sorted(f for f in p.iterdir() if f.suffix.lower() in IMAGE_SUFFIXES)
        if not self.files:
            raise InputError(f"{p}: no images ({', '.join(IMAGE_SUFFIXES)})")
        if not (fps > 0 and math.isfinite(fps)):
            raise InputError(f"--fps {fps}: must be a positive number")
        if max_frames is not None:
            self.files = self.files[:max_frames]
        self.name = p.name
        self.fps = fps
        self.realtime = realtime
        self.late_ms = late_ms
        self.dropped = 0
        self.camera = None

    def __len__(self):
        return len(self.files)

    def __iter__(self):
        pacer = _Pacer(self.realtime, self.late_ms)
        for i, f in enumerate(self.files):
            t = i / self.fps
            if not pacer.admit(t):
                self.dropped += 1
                continue
            img = self._cv2.imread(str(f), self._cv2.IMREAD_COLOR)
            yield Frame(i, t, img, "" if img is not None else f"{f.name}: cannot decode image")

    def close(self):
        pass


class CameraSource:
    """A live camera (``cv2.VideoCapture`` index or URL), with odometry/IMU from a link endpoint.

    Frames carry host monotonic time (s since the source opened); sensor messages from the link
    are stamped with their arrival time on the same clock. When a frame takes longer than the
    camera period the frames that queued up in the driver are grabbed and dropped, so the
    loop always works on the newest picture.
    """

    def __init__(self, spec, *, link=None, fps: float = 0.0, reopen_after: int = 10):
        import cv2

        self._cv2 = cv2
        self.spec = spec
        self.link = link
        self.name = f"camera {spec}"
        self.dropped = 0
        self.read_failures = 0
        self.reopen_after = reopen_after
        self.camera = None
        self.cap = self._open()
        f = fps or float(self.cap.get(cv2.CAP_PROP_FPS) or 0.0)
        self.period = 1.0 / f if f > 0 else 0.0
        self.t0 = time.monotonic()
        self._imu = np.full((64, 4), np.nan)
        self._odo = np.full((64, 4), np.nan)

    def _open(self):
        src = int(self.spec) if str(self.spec).isdigit() else str(self.spec)
        cap = self._cv2.VideoCapture(src)
        if not cap.isOpened():
            raise InputError(f"camera {self.spec}: cannot open (cv2.VideoCapture)")
        return cap

    def _sensor_rows(self, t):
        ni = no = 0
        if self.link is not None:
            for msg in self.link.poll():
                name = getattr(msg, "NAME", "")
                if name == "imu" and ni < len(self._imu):
                    self._imu[ni] = (t, msg.fx, msg.fy, msg.fz)
                    ni += 1
                elif name == "odometry" and no < len(self._odo):
                    self._odo[no] = (t, msg.x, msg.y, msg.yaw)
                    no += 1
        return self._imu[:ni], self._odo[:no]

    def __iter__(self):
        i = 0
        last_end = None
        while True:
            if last_end is not None and self.period > 0:
                behind = time.monotonic() - last_end
                for _ in range(int(behind / self.period)):
                    self.cap.grab()
                    self.dropped += 1
            ok, img = self.cap.read()
            t = time.monotonic() - self.t0
            imu, odo = self._sensor_rows(t)
            if not ok:
                self.read_failures += 1
                if self.read_failures % self.reopen_after == 0:
                    try:
                        self.cap.release()
                        self.cap = self._open()
                    except InputError:
                        pass
                yield Frame(i, t, None, "camera read failed", imu, odo, np.zeros((0, 5)))
                time.sleep(0.05)
            else:
                yield Frame(i, t, img, "", imu, odo, np.zeros((0, 5)))
            last_end = time.monotonic()
            i += 1

    def close(self):
        try:
            self.cap.release()
        except Exception:
            pass


def open_source(spec: str, *, realtime: bool = False, late_ms: float = 100.0, max_frames: int | None = None,
                fps: float = 10.0, link=None, labels: bool = False):
    """Open a frame source from its command-line spec (see the module notes)."""
    s = str(spec)
    if s.startswith("camera:"):
        return CameraSource(s[len("camera:"):], link=link)
    p = Path(s)
    if p.is_dir() and (p / "run.json").is_file():
        return RunFolderSource(p, realtime=realtime, late_ms=late_ms, max_frames=max_frames, labels=labels)
    if p.is_dir():
        return ImageFolderSource(p, fps=fps, realtime=realtime, late_ms=late_ms, max_frames=max_frames)
    raise InputError(f"--source {s}: not a run folder (no run.json), an image folder or camera:INDEX|URL")
