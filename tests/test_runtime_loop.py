"""The live loop end to end on a generated site and run, with faults injected while it runs.

The site is a seeded street-grid raster packed with the map writer; frames are matched by
tinyloc's real correlator and tracked by the real filter. The camera stage is replaced by a
stand-in that cuts the bird's-eye evidence out of the map at the true pose (with noise and
dropout), so these tests check the loop, the matcher seam and the tracker, not the segmenter.
"""

import math
import tracemalloc

import cv2
import numpy as np
import pytest

from tinyloc.camera.model import CameraModel
from tinyloc.classes import MAP_CLASSES
from tinyloc.correlate.synth import cut_bev, street_map
from tinyloc.errors import InputError
from tinyloc.frames import wrap_angle
from tinyloc.geo import LocalFrame
from tinyloc.maps.packfile import MapMeta, PackedMap, write_packed
from tinyloc.runfolder import RunWriter
from tinyloc.runtime import Frame, Localizer, LoopConfig, load_config
from tinyloc.runtime.runlog import read_runlog
from tinyloc.runtime.runner import Runner
from tinyloc.runtime.sinks import open_sink
from tinyloc.runtime.sources import RunFolderSource

ORIGIN = (46.5, 7.25, 500.0)  # an arbitrary georeference of the invented site
SIZE = 320
CAM = CameraModel(width=64, height=48, fx=50.0, fy=50.0, cx=31.5, cy=23.5)
# smaller than the defaults (64 m search window, 128 headings) to keep the tests quick; the stand-in
# evidence draws fresh noise every frame (real frames share most of their view), so it is not tempered,
# and each frame is one independent frame however far apart they are (no evidence per metre)
FAST = ["match.search_window_cells=128", "match.headings=128", "track.headings=128", "track.likelihood_weight=1.0",
        "track.evidence_max=1.0"]


def _cfg(*more):
    return load_config(None, FAST + list(more))


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    d = tmp_path_factory.mktemp("site")
    cov = street_map(SIZE, 7)
    meta = MapMeta(*ORIGIN, 0.5, -80.0, 80.0, SIZE, SIZE, 64, tuple(c.name for c in MAP_CLASSES),
                   tuple(c.index for c in MAP_CLASSES))
    path = d / "grid.tlm"
    write_packed(path, meta, cov)
    return path, cov


def _road_path(cov, n, *, speed=0.1, row=None):
    """Poses along the most road-covered row near the middle, heading east (x, y, yaw)."""
    road = cov[1]
    if row is None:
        mid = SIZE // 2
        row = mid - 40 + int(np.argmax(road[mid - 40:mid + 40].sum(1)))
    x0 = -80.0 + 0.5 * 100
    y = 80.0 - 0.5 * (row + 0.5)
    return [(x0 + k * speed, y, 0.0) for k in range(n)]


class MapCutPerceiver:
    """Stand-in camera stage: the map's own evidence at the true pose of the frame, with noise."""

    def __init__(self, pm, cov, truth, seed=0):
        self.pm, self.cov, self.truth = pm, cov, truth
        self.rng = np.random.default_rng(seed)
        self.i = 0

    def perceive(self, image, gravity):
        x, y, yaw = self.truth[self.i]
        r, c = self.pm.cell_of(x, y)
        return cut_bev(self.cov, r, c, yaw, self.rng, noise=0.15, dropout=0.2)


class IndexedLocalizer:
    """Passes the frame index to the stand-in perceiver before each step."""

    def __init__(self, loc, perc):
        self.loc, self.perc = loc, perc

    def step(self, frame):
        self.perc.i = int(round(frame.t / 0.1))  # truth by time: a missing frame shifts the indices
        return self.loc.step(frame)

    def health(self):
        return self.loc.health()


def write_run(path, truth, frame_world: LocalFrame, *, corrupt=(), missing=(), imu_nan=(), odo_jump=None,
              gnss_off=(), dt=0.1, rng=None):
    rng = rng or np.random.default_rng(1)
    img = np.full((CAM.height, CAM.width, 3), 100, np.uint8)
    with RunWriter(path, camera=CAM, origin=ORIGIN, name="test-run", source="generated") as w:
        ox = 0.0
        for k, (x, y, yaw) in enumerate(truth):
            t = k * dt
            w.add_frame(t, img)
            w.add_imu(t - 0.01, *(np.nan, np.nan, np.nan) if k in imu_nan else (0.0, 0.0, 9.81))
            ox = ox + (0.1 if k else 0.0)
            w.add_odometry(t - 0.005, ox + (20.0 if (odo_jump is not None and k >= odo_jump) else 0.0), 0.0, 0.0)
            if k not in gnss_off:
                lat, lon = frame_world.to_latlon(x + rng.normal(0, 2.0), y + rng.normal(0, 2.0))
                w.add_gnss(t - 0.002, lat, lon, 500.0, 1.5)
            lat, lon = frame_world.to_latlon(x, y)
            w.add_truth(t, lat, lon, yaw, x, y)
    for k in corrupt:
        (path / "frames" / f"{k:06d}.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"garbage" * 10)
    for k in missing:
        (path / "frames" / f"{k:06d}.png").unlink()
    return path


def _run(site, tmp_path, n, cfg=None, **faults):
    path, cov = site
    pm = PackedMap.open(path)
    truth = _road_path(cov, n)
    run = write_run(tmp_path / "run", truth, pm.frame, **faults)
    perc = MapCutPerceiver(pm, cov, truth)
    loc = Localizer(pm, CAM, cfg or _cfg(), perceiver=perc)
    src = RunFolderSource(run)
    log = tmp_path / "run.tlog"
    runner = Runner(IndexedLocalizer(loc, perc), src, [open_sink(f"log:{log}")])
    poses = []
    runner.on_pose = lambda p, f: poses.append(p)
    summary = runner.run()
    return poses, truth, summary, log, loc


def _err(p, t):
    return math.hypot(p.x - t[0], p.y - t[1]), abs(math.degrees(wrap_angle(p.yaw - t[2])))


def test_loop_locks_on_and_tracks(site, tmp_path):
    poses, truth, summary, log, loc = _run(site, tmp_path, 30)
    assert summary["frames"] == 30 and summary["stopped_by"] == "end of source"
    q = [p.quality for p in poses]
    first = q.index("tracking")
    assert first <= 10
    errs = np.array([_err(p, t) for p, t in zip(poses[first:], truth[first:])])
    assert np.median(errs[:, 0]) < 0.5 and np.median(errs[:, 1]) < 2.0
    recs, problems = read_runlog(log)
    assert problems == []
    kinds = [r["k"] for r in recs]
    assert kinds[0] == "header" and kinds.count("pose") == 30
    assert recs[-1]["k"] == "event" and recs[-1]["text"] == "stopped: end of source"
    assert any(r["k"] == "status" for r in recs)


def test_faults_while_running_keep_the_loop_going(site, tmp_path):
    n = 60
    poses, truth, summary, log, loc = _run(site, tmp_path, n, corrupt=(30,), missing=(35,), imu_nan=(20, 21),
                                           odo_jump=45, gnss_off=set(range(40, 60)))
    # the run-folder reader drops the row of the missing file (and warns): the loop sees a time gap
    assert summary["frames"] == n - 1  # nothing stopped the loop
    by_t = {int(round(p.t / 0.1)): p for p in poses}
    assert 35 not in by_t and 34 in by_t and 36 in by_t
    st = {k: p.status for k, p in by_t.items()}
    assert "000030.png" in st[30]
    assert "odometry jump ignored" in st[45]
    h = loc.health()
    assert h["track_odometry_jumps"] == 1
    assert h["unusable_frames"] == 1  # the corrupt one (the missing one never reached the loop)
    assert 0.95 <= h["odometry_scale"] <= 1.05  # the learnt wheel scale stays within track.odo_scale_max_dev
    # after the faults (and with the satellite fixes gone) it still tracks
    assert poses[-1].quality == "tracking"
    assert max(_err(by_t[k], truth[k])[0] for k in range(50, n)) < 1.0
    recs, problems = read_runlog(log)
    assert problems == [] and sum(r["k"] == "pose" for r in recs) == n - 1


def test_map_window_at_the_map_edge(site, tmp_path):
    path, cov = site
    pm = PackedMap.open(path)
    # drive east along a road until past the east edge of the map: the window reads cells outside it
    road_rows = np.flatnonzero(cov[1][:, -20:].mean(1) > 0.8)
    row = int(road_rows[len(road_rows) // 2])
    y = 80.0 - 0.5 * (row + 0.5)
    truth = [(70.0 + 0.4 * k, y, 0.0) for k in range(30)]  # the map ends at x = 80 m
    perc = MapCutPerceiver(pm, cov, truth)
    # the fixes here are exact and come at 10 Hz; counted as correlated (track.gnss.search_tau_s 4 s: a
    # quarter of a fix per second) the search does not lock on within these 3 s at the edge (it wanders
    # 8-10 m, flagged "searching"); this test is about the window at the edge, so every fix counts
    loc = Localizer(pm, CAM, _cfg("track.gnss.search_tau_s=0"), perceiver=perc)
    g = pm.frame
    poses = []
    for k, tp in enumerate(truth):
        perc.i = k
        lat, lon = g.to_latlon(tp[0], tp[1])
        imu = np.array([[0.1 * k, np.nan, np.nan, np.nan] if k % 10 == 5 else [0.1 * k, 0, 0, 9.81]])
        fr = Frame(k, 0.1 * k, np.zeros((4, 4, 3), np.uint8), "", imu,
                   np.array([[0.1 * k, 0.4 * k, 0.0, 0.0]]), np.array([[0.1 * k, lat, lon, 0.0, 1.5]]))
        poses.append(loc.step(fr))
    assert all(p.quality in ("searching", "tracking", "degraded") for p in poses)
    assert all(np.all(np.isfinite(p.cov)) for p in poses)
    assert loc.matcher.counters["window_moves"] >= 1
    assert loc.health()["imu_bad_rows"] == 3  # NaN gravity rows skipped and counted
    # still right while the robot is inside the map
    inside = [(p, t) for p, t in zip(poses, truth) if t[0] < 76.0 and p.quality == "tracking"]
    assert inside and max(_err(p, t)[0] for p, t in inside) < 1.0


def _parked_on_the_road(site, n):
    """The map, the start of an n-frame road path, and the map's own evidence there (the loop stays tracking)."""
    path, cov = site
    pm = PackedMap.open(path)
    x, y, yaw = _road_path(cov, n)[0]
    r, c = pm.cell_of(x, y)
    return pm, x, y, cut_bev(cov, r, c, yaw, np.random.default_rng(3), noise=0.1, dropout=0.1)


def _standing_frames(pm, x, y, img, n):
    """n frames of a robot standing still at (x, y): level gravity, zero odometry, a fix at its place."""
    lat, lon = pm.frame.to_latlon(x, y)
    return [Frame(k, 0.1 * k, img, "", np.array([[0.1 * k, 0, 0, 9.81]]), np.array([[0.1 * k, 0.0, 0.0, 0.0]]),
                  np.array([[0.1 * k, lat, lon, 0.0, 1.5]])) for k in range(n)]


def _growth_and_peak(loc, frames):
    """Bytes kept and peak temporary bytes (tracemalloc) over frames[10:], traced from frames[0] on."""
    tracemalloc.start()
    for f in frames[:10]:
        loc.step(f)
    base, _ = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    for f in frames[10:]:
        loc.step(f)
    cur, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return cur - base, peak - base


def test_steady_state_allocates_nothing_that_stays(site):
    pm, x, y, bev = _parked_on_the_road(site, 60)

    class Fixed:
        def perceive(self, image, gravity):
            return bev

    loc = Localizer(pm, CAM, _cfg("track.verify_every=1000"), perceiver=Fixed())
    frames = _standing_frames(pm, x, y, np.zeros((4, 4, 3), np.uint8), 60)
    for f in frames[:20]:
        p = loc.step(f)
    assert p.quality == "tracking"
    grown, peak = _growth_and_peak(loc, frames[20:])
    # no growth over 30 frames, and no large temporary (the belief alone is 2 MB here, a map window 0.6 MB)
    assert grown < 64 * 1024, grown
    assert peak < 512 * 1024, peak


def test_config_file_and_overrides(tmp_path):
    f = tmp_path / "loop.toml"
    f.write_text("[track]\nfloor = 0.001\nheadings = 128\n[track.gnss]\nnu = 5.0\n[loop]\nrealtime = true\n")
    cfg = load_config(f, ["track.floor=0.002", "match.track_exact=false"])
    assert cfg.track.floor == 0.002 and cfg.track.headings == 128 and cfg.track.gnss.nu == 5.0
    assert cfg.loop.realtime is True and cfg.match.track_exact is False
    f.write_text("[track]\nflor = 1\n")
    with pytest.raises(InputError, match=r"loop.toml: unknown key 'track.flor'"):
        load_config(f)
    with pytest.raises(InputError, match=r"--set: 'track.headings': expected an integer"):
        load_config(None, ["track.headings=many"])
    with pytest.raises(InputError, match=r"track.window_cells = 2"):
        load_config(None, ["track.window_cells=2"])


def test_kidnapped_mid_run_recovers_within_15_s(site):
    path, cov = site
    pm = PackedMap.open(path)
    road = cov[1]
    rows = [r for r in range(60, SIZE - 60) if road[r, 60:SIZE - 60].mean() > 0.9]
    y1 = 80.0 - 0.5 * (rows[len(rows) // 2] + 0.5)
    perc = MapCutPerceiver(pm, cov, [])
    loc = Localizer(pm, CAM, _cfg(), perceiver=perc)
    img = np.zeros((4, 4, 3), np.uint8)
    rng = np.random.default_rng(9)
    dt, before, after = 0.1, 40, 150
    q_after, back_at = [], None
    for k in range(before + after):
        x = -40.0 + 0.1 * k + (50.0 if k >= before else 0.0)  # 1 m/s east, carried 50 m further at `before`
        y = y1  # (the odometry sees only the driving)
        truth = (x, y, 0.0)
        perc.truth, perc.i = [truth], 0
        t = dt * k
        lat, lon = pm.frame.to_latlon(x + rng.normal(0, 2.0), y + rng.normal(0, 2.0))
        p = loc.step(Frame(k, t, img, "", np.array([[t, 0, 0, 9.81]]), np.array([[t, 0.1 * k, 0.0, 0.0]]),
                           np.array([[t, lat, lon, 0.0, 1.5]])))
        if k == before - 1:
            assert p.quality == "tracking"
        if k >= before:
            q_after.append(p.quality)
            ok = p.quality == "tracking" and _err(p, truth)[0] < 1.0
            if ok and back_at is None and any(q != "tracking" for q in q_after):
                back_at = (k - before) * dt
            if back_at is not None and k - before > back_at / dt + 10:
                assert ok
                break
    assert any(q in ("searching", "degraded") for q in q_after), "quality never dropped"
    assert back_at is not None and back_at <= 15.0, back_at
    assert loc.health()["track_lost"] >= 1
    print(f"kidnapped 50 m: back within 1 m and tracking {back_at:.1f} s later")


class RecordingPerceiver:
    """Stand-in camera stage that records the gravity vector the loop hands it, and sees no ground."""

    def __init__(self):
        self.gravity = []

    def perceive(self, image, gravity):
        self.gravity.append(None if gravity is None else np.array(gravity, dtype=np.float64))
        return None


def test_bad_sensor_rows_are_skipped_counted_and_said(site):
    path, cov = site
    pm = PackedMap.open(path)
    perc = RecordingPerceiver()
    loc = Localizer(pm, CAM, _cfg(), perceiver=perc)
    lat, lon = pm.frame.to_latlon(0.0, 0.0)
    img = np.zeros((4, 4, 3), np.uint8)
    good_imu = [[0.05, 0.2, -0.1, 9.7], [0.08, 0.4, 0.1, 9.9]]
    f0 = Frame(0, 0.1, img, "", np.array(good_imu + [[0.09, np.nan, 0.0, 9.8], [0.095, 5e3, 0.0, 9.8]]),
               np.array([[0.05, 0.0, 0.0, 0.0], [0.09, np.inf, 0.0, 0.0]]),
               np.array([[0.07, lat, lon, 0.0, 1.5], [0.1, 95.0, lon, 0.0, 1.5]]))
    p0 = loc.step(f0)
    assert "2 bad IMU row(s) skipped" in p0.status
    assert "1 bad odometry row(s) skipped" in p0.status
    assert "1 bad GNSS row(s) skipped" in p0.status
    h = loc.health()
    assert (h["imu_bad_rows"], h["odometry_bad_rows"], h["gnss_bad_rows"]) == (2, 1, 1)
    # gravity = the mean of the good rows only (the NaN and the 5000 m/s^2 row left out)
    assert np.max(np.abs(perc.gravity[0] - np.mean(np.array(good_imu)[:, 1:], axis=0))) < 1e-12
    # the fix that was kept is the good one (at the map origin), not the row at latitude 95
    fx, fy, acc, tf = loc.sensors.fix
    assert abs(fx) < 1e-6 and abs(fy) < 1e-6 and tf == 0.07
    # a clean frame says nothing about sensor rows
    p1 = loc.step(Frame(1, 0.2, img, "", np.array([[0.15, 0.0, 0.0, 9.81]]), np.array([[0.15, 0.1, 0.0, 0.0]]),
                        np.zeros((0, 5))))
    assert "row(s) skipped" not in p1.status
    # no usable IMU row for longer than loop.imu_timeout_s: the perceiver gets no gravity (fixed mount)
    t = 0.2 + LoopConfig().loop.imu_timeout_s + 0.5
    loc.step(Frame(2, t, img, "", np.array([[t, np.nan, np.nan, np.nan]]), np.zeros((0, 4)), np.zeros((0, 5))))
    assert perc.gravity[1] is not None and perc.gravity[2] is None


def test_steady_state_with_the_real_perception_allocates_nothing_that_stays(site):
    """As above, with tinyloc's segmenter and projector running on a 160 x 120 colour frame every step."""
    from tinyloc.perception.pipeline import Perception

    pm, x, y, bev = _parked_on_the_road(site, 70)
    cam = CameraModel(width=160, height=120, fx=110.0, fy=110.0, cx=79.5, cy=59.5)

    class Real:
        def __init__(self):
            self.perc = Perception(cam)
            self.grid = self.perc.new_grid()
            self.status = []

        def perceive(self, image, gravity):
            self.status.append(self.perc.process(image, gravity, self.grid))
            return bev  # the map's own evidence, so the loop stays in tracking mode

    perc = Real()
    loc = Localizer(pm, cam, _cfg("track.verify_every=1000"), perceiver=perc)
    rng = np.random.default_rng(5)
    img = np.empty((120, 160, 3), np.uint8)
    img[:40] = (230, 190, 140)
    img[40:] = (105, 105, 105)
    img = np.clip(img.astype(int) + rng.integers(-8, 9, img.shape), 0, 255).astype(np.uint8)
    frames = _standing_frames(pm, x, y, img, 70)
    for f in frames[:20]:
        p = loc.step(f)
    assert p.quality == "tracking" and perc.status[-1] == "ok"
    grown, peak = _growth_and_peak(loc, frames[20:])
    assert perc.status[-1] == "ok"
    assert grown < 64 * 1024, grown
    assert peak < 512 * 1024, peak


def test_map_tile_cache_is_bounded_by_the_loop_config(site, tmp_path):
    """The loop opens the map with its own small tile cache (loop.map_cache_mb), and a drive that moves the
    map window across the site never holds more decoded tiles than that."""
    path, cov = site
    budget_mb = 0.15  # 4 decoded tiles of this map (9 classes x 64 x 64 cells): less than one window needs
    truth = _road_path(cov, 90, speed=1.0)
    truth = [(x - 45.0, y, yaw) for x, y, yaw in truth]  # from x = -75 m to +14 m along the road
    loc = Localizer.from_files(path, CAM, _cfg(f"loop.map_cache_mb={budget_mb}"), perceiver=Fixed0())
    perc = MapCutPerceiver(loc.map, cov, truth)
    loc.perceiver = perc
    used = []
    for k, (x, y, yaw) in enumerate(truth):
        perc.i = k
        lat, lon = loc.map.frame.to_latlon(x, y)
        p = loc.step(Frame(k, 0.1 * k, np.zeros((4, 4, 3), np.uint8), "", np.array([[0.1 * k, 0, 0, 9.81]]),
                           np.array([[0.1 * k, x - truth[0][0], 0.0, 0.0]]), np.array([[0.1 * k, lat, lon, 0.0, 1.5]])))
        used.append(loc.map.cache_used_bytes)
    assert loc.matcher.counters["window_moves"] >= 2
    assert max(used) <= budget_mb * 2 ** 20
    assert p.quality == "tracking" and _err(p, truth[-1])[0] < 1.0  # tiles evicted and read again: still right


class Fixed0:
    def perceive(self, image, gravity):  # replaced right after the loop is built
        return None


WARM_CHECK = r"""
import sys
from numba.core import dispatcher
from tinyloc.runtime import Localizer
from tinyloc.runtime.sources import RunFolderSource
src = RunFolderSource(sys.argv[2], max_frames=int(sys.argv[3]))
loc = Localizer.from_files(sys.argv[1], src.camera)
late = []
orig = dispatcher.Dispatcher.compile
def compile_(self, sig):
    late.append(self.py_func.__module__ + "." + self.py_func.__qualname__)
    return orig(self, sig)
dispatcher.Dispatcher.compile = compile_
qual = [loc.step(f).quality for f in src]
print("late:", ",".join(sorted(set(late))) or "-", "tracking:", qual.count("tracking"),
      "compiled:", loc.health()["kernels_compiled_at_start"], "cached:", loc.kernels_cached)
"""


def test_warm_up_reaches_every_kernel_a_drive_uses():
    """After start-up no numba kernel is first met inside a frame (it would load, or after an update compile:
    seconds and tens of MB in the middle of a drive). Fresh interpreter, the bundled demo map and drive."""
    import subprocess
    import sys
    from pathlib import Path

    from tinyloc.cli.cmd_demo import DATA

    maps, runs = sorted(DATA.rglob("*.tlm")), sorted(p.parent for p in DATA.rglob("run.json"))
    if not maps or not runs:
        pytest.skip(f"bundled demo data not present at {DATA}")
    root = Path(__file__).resolve().parents[1]

    def run():
        r = subprocess.run([sys.executable, "-W", "ignore", "-c", WARM_CHECK, str(maps[0]), str(runs[0]), "80"],
                           capture_output=True, text=True, timeout=600, cwd=root)
        assert r.returncode == 0, r.stderr[-600:]
        f = r.stdout.strip().splitlines()[-1].split()
        return f[1], int(f[3]), int(f[5]), int(f[7])

    late, tracking, compiled, cached = run()
    if compiled:  # the cache was stale (a kernel was edited): this start filled it, the next one must not compile
        late, tracking, compiled, cached = run()
        assert compiled == 0, compiled
    assert late == "-", late  # names the kernels the warm-up missed
    assert tracking > 0  # the drive got as far as tracking (both loop modes ran)
    assert cached >= 30  # every kernel came from numba's on-disk cache (counted by the loop)
