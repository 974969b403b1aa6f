"""The localizer loop: one object that owns every buffer, created once, stepped once per frame.

Per frame: sensors in (odometry increment, gravity, latest satellite fix), the image
segmented and projected into a bird's-eye grid, matched against the map (a small
tracking window around the estimate, or the whole search window when the tracker
asks for a global search), the grid filter updated, one :class:`PoseEstimate` out.
Failures inside the loop are data: a bad frame, a missing sensor, a damaged map tile
each give a pose whose ``quality`` and ``status`` say what happened; nothing raises.

The same object runs live (:mod:`tinyloc.runtime.runner`) and offline (replay drives
:meth:`Localizer.step` with the rows of a run folder).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
import math
import time

import numpy as np

from ..frames import relative2
from ..track.gridfilter import LikelihoodVolume, MapGeometry, Tracker
from .config import LoopConfig


@dataclass
class PoseEstimate:
    """One pose out of the loop (docs/interfaces.md, "Pose output").

    Attributes
    ----------
    t : float
        Sensor time of the frame (s).
    x, y : float
        ENU metres at the map's origin (NaN when ``quality`` is "no-fix").
    yaw : float
        rad, counter-clockwise from east, (-pi, pi].
    lat, lon : float
        WGS84 degrees.
    cov : ndarray (3, 3)
        Covariance over (x, y, yaw): m^2, m rad, rad^2.
    quality : str
        "no-fix", "searching", "tracking" or "degraded".
    modes : list of (x, y, yaw, weight)
        Top posterior modes (weight = share of the probability near the mode).
    frame_ms : float
        Processing time of this frame (ms).
    status : str
        What happened on this frame, in a few words ("ok" when nothing worth saying).
    """

    t: float
    x: float
    y: float
    yaw: float
    lat: float
    lon: float
    cov: np.ndarray
    quality: str
    modes: list = field(default_factory=list)
    frame_ms: float = 0.0
    status: str = "ok"

    def as_dict(self) -> dict:
        """Plain-JSON form (NaN becomes None)."""
        def f(v):
            v = float(v)
            return v if math.isfinite(v) else None
        return {"t": f(self.t), "x": f(self.x), "y": f(self.y), "yaw": f(self.yaw), "lat": f(self.lat),
                "lon": f(self.lon), "cov": [[f(v) for v in row] for row in np.asarray(self.cov)],
                "quality": self.quality, "modes": [[f(v) for v in m] for m in self.modes],
                "frame_ms": f(self.frame_ms), "status": self.status}


@dataclass
class Frame:
    """What the loop takes per frame (replay's ``ReplayFrame`` has the same fields).

    ``imu`` (k, 4) rows t,fx,fy,fz; ``odometry`` (k, 4) rows t,x,y,yaw (odom frame); ``gnss`` (k, 5)
    rows t,lat,lon,h,acc_m: the sensor rows with time in (previous frame time, this frame's time].
    ``image`` is BGR (or gray) uint8, or None when it could not be read (``image_fault`` says why).
    ``labels`` (optional) is another segmenter's class-index image for the frame (used with
    ``loop.external_labels``).
    """

    index: int
    t: float
    image: np.ndarray | None
    image_fault: str = ""
    imu: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))
    odometry: np.ndarray = field(default_factory=lambda: np.zeros((0, 4)))
    gnss: np.ndarray = field(default_factory=lambda: np.zeros((0, 5)))
    labels: np.ndarray | None = None


def _rows(a, k: int) -> list:
    """Sensor rows as a list of k-float lists (a frame carries a handful: plain Python beats NumPy here)."""
    if a is None:
        return []
    if not (isinstance(a, np.ndarray) and a.ndim == 2 and a.shape[1] == k):
        a = np.asarray(a, dtype=np.float64).reshape(-1, k)
    return a.tolist()


def _finite(row) -> bool:
    for v in row:
        if not math.isfinite(v):
            return False
    return True


class SensorState:
    """Latest odometry pose, gravity and satellite fix, with their times (fixed size)."""

    def __init__(self, frame, geom_to_xy):
        self.frame = frame  # LocalFrame of the map
        self.to_xy = geom_to_xy
        self.odo_prev = None  # odometry pose used at the previous frame (x, y, yaw)
        self.odo_last = None
        self.odo_t = -math.inf
        self.gravity = np.full(3, np.nan)
        self.gravity_t = -math.inf
        self.fix = None  # (x, y, acc, t)
        self.grav_est = None  # GravityEstimator, made at the first frame from the loop settings
        self.counters = {"imu_bad_rows": 0, "odometry_bad_rows": 0, "gnss_bad_rows": 0,
                         "gravity_uncompensated": 0}
        self.bad_now = [0, 0, 0]  # bad rows in the last frame: imu, odometry, gnss

    def take(self, fr, p) -> tuple:
        """Digest one frame's sensor rows; returns (odometry increment or None, gravity or None, fix or None).

        Rows with a NaN or infinite value (and IMU rows above 1000 m/s^2, GNSS rows off the globe)
        are skipped and counted, in ``counters`` and, for this frame, in ``bad_now``. Gravity is the
        :class:`~tinyloc.perception.gravity.GravityEstimator`'s (``loop.gravity_window_s``,
        ``loop.gravity_motion_comp``, ``loop.accel_bias_*``); frames where compensation was on but could not be applied are
        counted in ``counters["gravity_uncompensated"]``.
        """
        ge = self.grav_est
        if ge is None:
            from ..perception.gravity import GravityEstimator

            bias = tuple(getattr(p, f"accel_bias_{a}", 0.0) for a in "xyz")
            ge = self.grav_est = GravityEstimator(getattr(p, "gravity_window_s", 0.4),
                                                  getattr(p, "gravity_motion_comp", True), bias=bias)
        t = float(fr.t)
        bad = self.bad_now
        bad[0] = bad[1] = bad[2] = 0
        last = None
        for r in _rows(fr.odometry, 4):
            if _finite(r):
                last = r
                ge.add_odometry(r[0], r[1], r[2], r[3])
            else:
                bad[1] += 1
        if last is not None:
            self.odo_last = (last[1], last[2], last[3])
            self.odo_t = last[0]
        inc = None
        if self.odo_last is not None and t - self.odo_t <= p.odometry_timeout_s:
            if self.odo_prev is None:
                inc = (0.0, 0.0, 0.0)
            else:
                inc = relative2(self.odo_prev, self.odo_last)
            self.odo_prev = self.odo_last
        elif self.odo_last is not None:
            # stale odometry: the motion since the previous frame is unknown
            self.odo_prev = None
            ge.forget_odometry()
        n = 0
        tg = None
        for r in _rows(fr.imu, 4):
            if _finite(r) and abs(r[1]) < 1e3 and abs(r[2]) < 1e3 and abs(r[3]) < 1e3:
                ge.add_imu(r[0], r[1], r[2], r[3])
                n += 1
                tg = r[0]
            else:
                bad[0] += 1
        if n and ge.estimate(self.gravity):
            self.gravity_t = tg
            if ge.compensate and ge.status != "compensated":
                self.counters["gravity_uncompensated"] += 1
        grav = self.gravity if (t - self.gravity_t) <= p.imu_timeout_s else None
        if self.frame is not None:
            last = None
            for r in _rows(fr.gnss, 5):
                if _finite(r[:3]) and abs(r[1]) <= 90.0 and abs(r[2]) <= 180.0:
                    last = r
                else:
                    bad[2] += 1
            if last is not None:
                x, y = self.frame.to_enu_xy(last[1], last[2])
                self.fix = (float(x), float(y), float(last[4]), float(last[0]))
        c = self.counters
        c["imu_bad_rows"] += bad[0]
        c["odometry_bad_rows"] += bad[1]
        c["gnss_bad_rows"] += bad[2]
        return inc, grav, self.fix

    def notes(self, out: list) -> None:
        """Say in the pose status which sensor rows of this frame were skipped."""
        for n, what in zip(self.bad_now, ("IMU", "odometry", "GNSS")):
            if n:
                out.append(f"{n} bad {what} row(s) skipped")


def kernel_cache_stats() -> tuple[int, int]:
    """(compiled in this process, loaded from numba's on-disk cache) over tinyloc's kernels used so far.

    A kernel is compiled when its cache entry is missing or stale (the first start after an install or
    an update); the compiler's memory stays with the process (measured on the demo: 482 MB resident
    after a start that compiled all 57 specialisations, 234 MB after one that loaded them from the
    cache), so a robot should be restarted once after such a start, or the cache filled beforehand.
    """
    import sys

    try:
        from numba.core.registry import CPUDispatcher
    except ImportError:  # pragma: no cover - numba is a dependency
        return 0, 0
    seen = set()
    compiled = cached = 0
    for name, mod in list(sys.modules.items()):
        if mod is None or not name.startswith("tinyloc."):
            continue
        for v in list(vars(mod).values()):
            if isinstance(v, CPUDispatcher) and id(v) not in seen:
                seen.add(id(v))
                st = v.stats
                compiled += sum(st.cache_misses.values())
                cached += sum(st.cache_hits.values())
    return compiled, cached


class Localizer:
    """The loop object: perception, matcher and tracker, with every buffer allocated at creation.

    Parameters
    ----------
    packed_map : PackedMap
        The site map (``tinyloc.maps.packfile.PackedMap``), already open.
    camera : CameraModel
        Calibration and mount of the camera.
    config : LoopConfig
        Settings (defaults: :class:`LoopConfig`).
    perceiver, matcher : objects, optional
        Replace the default segment+project stage or the map matcher (for tests and for users who
        bring their own segmenter). A perceiver has ``perceive(image, gravity) -> BevGrid``; a
        matcher has ``global_search(bev, x, y) -> LikelihoodVolume`` and
        ``track(bev, x, y, yaw) -> LikelihoodVolume`` (see :mod:`tinyloc.runtime.match`).
    """

    def __init__(self, packed_map, camera, config: LoopConfig | None = None, *, perceiver=None, matcher=None):
        self.cfg = config or LoopConfig()
        self.map = packed_map
        self.camera = camera
        m = packed_map.meta
        self.geom = MapGeometry(float(m.x_min), float(m.y_max), float(m.res_m))
        self.frame_enu = packed_map.frame
        from .match import default_matcher, default_perceiver

        self.perceiver = perceiver if perceiver is not None else default_perceiver(camera, self.cfg, self.geom)
        self.matcher = (matcher if matcher is not None else
                        default_matcher(packed_map, self.cfg, self.geom, getattr(self.perceiver, "grid", None)))
        self.tracker = Tracker(self.geom, self._track_params())
        self.sensors = SensorState(self.frame_enu, None)
        self.frames = 0
        self.health_counters = {"frames": 0, "unusable_frames": 0, "global_searches": 0, "overruns": 0,
                                "map_damaged_tiles": 0}
        self.last_pose: PoseEstimate | None = None
        self._vis_mask = None
        # last frame (ms): perceive, match (+ predict), filter update + estimate, sensor rows, pose output
        self.stage_ms = [0.0, 0.0, 0.0, 0.0, 0.0]
        if self.cfg.loop.warmup:
            self.warmup()
        self.kernels_compiled, self.kernels_cached = kernel_cache_stats()

    def _track_params(self):
        """The tracker's parameters; an uncalibrated accelerometer (every loop.accel_bias_* 0) widens the
        covariance floor to ``track.model_sigma_uncal_m`` (docs/tracking.md, "Covariance calibration")."""
        lp, tp = self.cfg.loop, self.cfg.track
        if lp.accel_bias_x == 0.0 and lp.accel_bias_y == 0.0 and lp.accel_bias_z == 0.0:
            return replace(tp, model_sigma_m=max(tp.model_sigma_m, tp.model_sigma_uncal_m))
        return tp

    @classmethod
    def from_files(cls, map_path, camera, config: LoopConfig | None = None, **kw) -> "Localizer":
        """Open the packed map (path; tile cache bounded by ``loop.map_cache_mb``) and the camera (path to
        camera.toml, or a CameraModel)."""
        from ..camera.model import CameraModel, load_camera
        from ..maps.packfile import PackedMap

        cam = camera if isinstance(camera, CameraModel) else load_camera(camera)
        cfg = config or LoopConfig()
        pm = PackedMap.open(map_path, cache_bytes=int(cfg.loop.map_cache_mb * 2 ** 20))
        return cls(pm, cam, cfg, **kw)

    # ---- start-up -----------------------------------------------------------------------------
    def warmup(self) -> None:
        """Run every stage once on dummy data so kernels are compiled/loaded before the first frame."""
        for obj in (self.perceiver, self.matcher):
            w = getattr(obj, "warmup", None)
            if w is not None:
                w()
        tr = Tracker(self.geom, self.cfg.track)
        x, y = self.geom.xy_of(self.map.meta.rows / 2.0, self.map.meta.cols / 2.0)
        A, n = self.cfg.track.headings, self.cfg.track.window_cells
        tr.step(0.0, None, None, gnss=(x, y, 3.0, 0.0))
        vol = LikelihoodVolume(np.zeros((8, n, n), np.float32), tr.filter.row0, tr.filter.col0, 0.0, 2 * math.pi / A)
        tr.step(0.1, (0.1, 0.0, 0.01), vol, is_global=True, gnss=(x, y, 3.0, 0.1))
        tr.step(0.2, (0.1, 0.0, 0.01), vol, gnss=None)
        # paths the three steps above do not reach (a long gap without odometry, a search after layers
        # went idle), and the map's tile decoder: a kernel first met mid-run is loaded (or, after an
        # update, compiled: seconds, and tens of MB that stay) in the middle of a frame
        tr.filter.add_noise(1.0, 0.01, now=True)
        tr.filter.active[1:] = 0  # (this tracker is thrown away)
        tr.filter.activate_all()
        m = self.map.meta
        probe = np.zeros((m.n_channels, 1, 1), np.float32)
        self.map.read_window(m.rows // 2, m.cols // 2, probe)  # a damaged tile is counted, never raised

    # ---- one frame ----------------------------------------------------------------------------
    def step(self, frame) -> PoseEstimate:
        """Process one frame (any object with the :class:`Frame` fields); never raises on bad data."""
        t0 = time.perf_counter()
        p = self.cfg
        self.frames += 1
        hc = self.health_counters
        hc["frames"] += 1
        t = float(frame.t)
        tr = self.tracker
        notes = []
        try:
            inc, grav, fix = self.sensors.take(frame, p.loop)
            self.sensors.notes(notes)
        except Exception as e:  # malformed sensor rows: carry on without them
            inc, grav, fix = None, None, self.sensors.fix
            notes.append(f"sensor rows unreadable: {type(e).__name__}")
        img = getattr(frame, "image", None)
        bev = None
        t1 = time.perf_counter()
        if img is None:
            notes.append(getattr(frame, "image_fault", "") or "no image")
        else:
            try:
                lab = getattr(frame, "labels", None)
                bev = (self.perceiver.perceive(img, grav, lab) if lab is not None
                       else self.perceiver.perceive(img, grav))
            except Exception as e:  # a stage bug must not stop the robot: report it in the status
                notes.append(f"perception failed: {type(e).__name__}: {e}"[:120])
            if bev is not None:
                st = getattr(bev, "status", "ok")
                nvis = self._visible_cells(bev.visible) if st == "ok" else 0
                if st != "ok":
                    notes.append(st)
                    bev = None
                elif nvis < p.match.min_visible_cells:
                    notes.append(f"too little ground seen ({nvis} cells)")
                    bev = None
        t2 = time.perf_counter()
        tr.begin(t, inc, fix, have_frame=bev is not None)
        vol = self._match(bev, notes) if bev is not None else None
        t3 = time.perf_counter()
        if vol is None:
            hc["unusable_frames"] += 1
        out = tr.finish(vol, frame_status="; ".join(notes) if notes else "ok")
        t4 = time.perf_counter()
        ms = (t4 - t0) * 1e3
        st = self.stage_ms
        st[0], st[1], st[2], st[3] = (t2 - t1) * 1e3, (t3 - t2) * 1e3, (t4 - t3) * 1e3, (t1 - t0) * 1e3
        status = out.status
        if notes and vol is not None:
            status = "; ".join(notes + ([status] if status != "ok" else []))
        if ms > p.loop.watchdog_ms:
            hc["overruns"] += 1
            status = f"{status}; slow frame {ms:.0f} ms" if status != "ok" else f"slow frame {ms:.0f} ms"
        if math.isfinite(out.x):
            lat, lon = self.frame_enu.to_latlon(out.x, out.y)
        else:
            lat = lon = math.nan
        pose = PoseEstimate(t, out.x, out.y, out.yaw, lat, lon, out.cov, out.quality, out.modes, ms, status)
        self.last_pose = pose
        st[4] = (time.perf_counter() - t4) * 1e3
        return pose

    def _visible_cells(self, visible) -> int:
        """Cells seen with visibility > 0.5 (into a mask kept between frames: no per-frame array)."""
        m = self._vis_mask
        if m is None or m.shape != visible.shape:
            m = self._vis_mask = np.empty(visible.shape, bool)
        np.greater(visible, 0.5, out=m)
        return int(np.count_nonzero(m))

    def _match(self, bev, notes):
        """Correlate the bird's-eye grid: a global search first when the tracker asks, then the tracking box."""
        tr = self.tracker
        m = self.matcher
        try:
            if tr.wants_global():
                self.health_counters["global_searches"] += 1
                c = tr.search_centre()
                if c is None:
                    c = self.geom.xy_of(self.map.meta.rows / 2.0, self.map.meta.cols / 2.0)
                ev = m.global_search(bev, c[0], c[1])
                if ev is None:
                    notes.append(f"global search failed: {getattr(m, 'status', '?')}")
                    return None
                if getattr(m, "status", "ok") not in ("ok", ""):
                    notes.append(m.status)
                x, y, yaw = tr.consider_global(ev)
            else:
                x, y, yaw = tr.track_centre()
            vol = m.track(bev, x, y, yaw)
            if vol is None:
                notes.append(f"matching failed: {getattr(m, 'status', '?')}")
            elif getattr(m, "status", "ok") not in ("ok", ""):
                notes.append(m.status)
            return vol
        except Exception as e:  # see above: failure is data inside the loop
            notes.append(f"matching failed: {type(e).__name__}: {e}"[:120])
            return None

    # ---- health -------------------------------------------------------------------------------
    def health(self) -> dict:
        """Counters of the loop, the tracker and the sensors (plain ints), the current quality, and
        ``odometry_scale``: the factor the tracker applies to wheel-odometry distances now (float; learnt
        online, docs/tracking.md; a value to copy into ``[track] odometry_scale`` after a good drive)."""
        h = dict(self.health_counters)
        h.update({f"track_{k}": v for k, v in self.tracker.counters.items()})
        h.update(self.sensors.counters)
        h["quality"] = self.tracker.state
        h["kernels_compiled_at_start"] = self.kernels_compiled
        osc = getattr(self.tracker, "odo_scale", None)
        if osc is not None:
            h["odometry_scale"] = float(osc.scale)
        dt = getattr(self.map, "tiles_damaged", None)
        if dt is not None:
            h["map_damaged_tiles"] = int(dt() if callable(dt) else dt)
        return h

    def close(self) -> None:
        """Release the map file."""
        c = getattr(self.map, "close", None)
        if c is not None:
            c()
