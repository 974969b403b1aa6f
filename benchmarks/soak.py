"""Soak the live loop: resident memory over many frames (default 10,000) must not grow.

    python benchmarks/soak.py [--frames 10000] [--warmup 500] [--run RUN --map SITE.tlm]
                              [--without-scipy] [--json]

What runs is the product's own loop, exactly as ``tinyloc run`` drives it: a
:class:`~tinyloc.runtime.runner.Runner` stepping a :class:`~tinyloc.runtime.loop.Localizer`
(tinyloc's segmenter and overhead projector, the correlator, the grid filter) over the
bundled demo drive's 640 x 480 camera frames, each frame read from disk and decoded as it
comes, with a run log and a UDP message-pack sink on loopback.

A drive of 10,000 frames is not shipped, so the short recorded drive is played back and
forth: frames 0, 1, ..., N-1, N-2, ..., 1, 0, 1, ... (the robot reverses along the same
path at each end). Every frame keeps its own picture, wheel-odometry pose, gravity rows and
satellite fixes, so odometry stays consistent with the pictures (driving backwards is just
motion with a negative forward increment); only the timestamps are renumbered to keep time
monotonic at the drive's own frame interval.

Resident memory (VmRSS in ``/proc/self/status``) is sampled every ``--sample-every``
frames. The figures: growth from the end of the warm-up to the end (pass mark < 1 MB), the
least-squares slope over the samples after the warm-up (MB per 10,000 frames), the largest
VmRSS after the warm-up (the steady-state peak) and VmHWM (the process's high-water mark,
start-up included).

``--without-scipy`` measures what a robot install (numpy, numba, OpenCV, msgpack, pyserial:
no SciPy) holds: numba imports SciPy at start-up whenever it is installed, which costs
about 15-18 MB on this machine although tinyloc's loop never uses it.
"""

from __future__ import annotations

import sys

if "--without-scipy" in sys.argv:  # before numba is imported (it imports SciPy when present)
    sys.modules["scipy"] = None

import argparse  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import os  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tinyloc.frames import wrap_angle  # noqa: E402
from tinyloc.runtime.config import load_config  # noqa: E402
from tinyloc.runtime.loop import Frame, Localizer  # noqa: E402
from tinyloc.runtime.runner import Runner  # noqa: E402
from tinyloc.runtime.sinks import open_sink  # noqa: E402


def proc_status_mb(*keys: str) -> dict:
    """Fields of /proc/self/status in MB (VmRSS: resident now, VmHWM: resident high-water mark)."""
    out = {}
    with open("/proc/self/status") as f:
        for line in f:
            k, _, v = line.partition(":")
            if k in keys:
                out[k] = int(v.split()[0]) / 1024.0
    return out


def rss_mb() -> float:
    return proc_status_mb("VmRSS")["VmRSS"]


def pingpong(k: int, n: int) -> int:
    """Frame index of step ``k`` when a drive of ``n`` frames is played forwards, backwards, forwards..."""
    if n < 2:
        return 0
    m = k % (2 * n - 2)
    return m if m < n else 2 * n - 2 - m


class PingPongSource:
    """A recorded run folder played back and forth for ``frames`` frames (see the module notes).

    Each frame is read and decoded from the folder when it is due (as
    :class:`~tinyloc.runtime.sources.RunFolderSource` does); the sensor rows of recorded frame
    ``i`` (those in its interval (t[i-1], t[i]]) travel with it, re-stamped to the new time
    base. The rows are copied into fixed buffers, so the source allocates no growing state.
    """

    def __init__(self, path, frames: int):
        from tinyloc.runfolder import RunFolder

        self.rf = RunFolder.open(path, strict=False)
        self.camera = self.rf.camera
        self.n = len(self.rf.frame_t)
        self.frames = int(frames)
        self.dropped = 0
        ft = self.rf.frame_t
        self.dt = float(np.median(np.diff(ft))) if self.n > 1 else 0.1
        self.rows = []  # per recorded frame: (imu, odometry, gnss) rows with time relative to the frame
        for i in range(self.n):
            lo = ft[i - 1] if i else -math.inf
            per = []
            for tab, k in ((self.rf.imu, 4), (self.rf.odometry, 4), (self.rf.gnss, 5)):
                if tab is None or not len(tab):
                    per.append(np.zeros((0, k)))
                    continue
                sel = tab[(tab[:, 0] > lo) & (tab[:, 0] <= ft[i])].copy()
                # keep each row's offset before its frame, inside one frame interval
                sel[:, 0] = np.clip(sel[:, 0] - ft[i], -0.999 * self.dt, 0.0)
                per.append(sel)
            self.rows.append(tuple(per))
        self._bufs = [np.zeros((max(len(r[j]) for r in self.rows) or 1, 4 if j < 2 else 5)) for j in range(3)]
        self.truth = None

    def __len__(self) -> int:
        return self.frames

    def recorded_index(self, k: int) -> int:
        return pingpong(k, self.n)

    def __iter__(self):
        for k in range(self.frames):
            i = pingpong(k, self.n)
            t = (k + 1) * self.dt
            views = []
            for j, r in enumerate(self.rows[i]):
                b = self._bufs[j][:len(r)]
                b[:] = r
                b[:, 0] += t
                views.append(b)
            fault = ""
            try:
                image = self.rf.load_frame(i)
            except (OSError, ValueError) as e:
                image, fault = None, str(e)
            yield Frame(k, t, image, fault, *views)

    def close(self) -> None:
        pass


PREFILL = """
import sys
from tinyloc.runtime import Localizer
from tinyloc.runtime.sources import RunFolderSource
src = RunFolderSource(sys.argv[2], max_frames=60)  # real frames reach kernels the warm-up does not
loc = Localizer.from_files(sys.argv[1], src.camera)
for f in src:
    loc.step(f)
loc.close()
"""


def slope_mb_per_10k(samples: np.ndarray) -> float:
    """Least-squares slope of RSS (MB) against frame number, per 10,000 frames."""
    if len(samples) < 2:
        return math.nan
    k, m = samples[:, 0], samples[:, 1]
    k = k - k.mean()
    return float((k * (m - m.mean())).sum() / max((k * k).sum(), 1e-12) * 1e4)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--frames", type=int, default=10000, help="frames to run (default 10000)")
    ap.add_argument("--warmup", type=int, default=500, help="frames before the memory baseline (default 500)")
    ap.add_argument("--sample-every", type=int, default=100, help="frames between memory samples (default 100)")
    ap.add_argument("--run", metavar="RUN", help="run folder (default: the bundled demo drive)")
    ap.add_argument("--map", metavar="SITE.tlm", help="packed map (default: the bundled demo site)")
    ap.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", help="loop config override")
    ap.add_argument("--without-scipy", action="store_true",
                    help="hide SciPy from numba, as on a robot install (see the notes)")
    ap.add_argument("--json", action="store_true", help="one JSON object on stdout instead of a table")
    ap.add_argument("--quiet", action="store_true", help="no progress line on stderr")
    ap.add_argument("--no-prefill", action="store_true",
                    help="do not fill numba's kernel cache in a separate process first")
    a = ap.parse_args(argv)
    if a.frames <= a.warmup:
        ap.error("--frames must be larger than --warmup")
    if a.run and a.map:
        map_path, run_path = Path(a.map), Path(a.run)
    else:
        from tinyloc.cli.cmd_demo import find_demo

        dm, dr = find_demo()
        map_path, run_path = Path(a.map or dm), Path(a.run or dr)
    if not a.no_prefill:
        # numba compiles into this process's memory when its on-disk cache is stale (after an edit of a
        # kernel), and that memory stays: fill the cache in a throw-away process first, as a robot's
        # first start does once.
        import subprocess

        r = subprocess.run([sys.executable, "-W", "ignore", "-c", PREFILL, str(map_path), str(run_path)],
                           capture_output=True, text=True, cwd=str(Path(__file__).resolve().parents[1]))
        if r.returncode != 0:
            print(f"soak: cache fill failed: {r.stderr.strip().splitlines()[-1:]}", file=sys.stderr)
            return 1
    mem_start = proc_status_mb("VmRSS", "VmHWM")
    src = PingPongSource(run_path, a.frames)
    cfg = load_config(None, a.set)
    t_build = time.perf_counter()
    loc = Localizer.from_files(map_path, src.camera, cfg)
    build_s = time.perf_counter() - t_build
    mem_built = proc_status_mb("VmRSS", "VmHWM")
    from tinyloc.runtime.sources import RunFolderSource

    truth = RunFolderSource(run_path).truth_xy(loc.frame_enu)  # (N, 3) x, y, yaw per recorded frame, or None
    n_samples = a.frames // a.sample_every + 2
    samples = np.full((n_samples, 2), np.nan)
    frame_ms = np.zeros(a.frames)
    hits = np.zeros(a.frames, bool)
    quals = {"no-fix": 0, "searching": 0, "tracking": 0, "degraded": 0}
    state = {"ns": 0, "hwm_warm": math.nan, "t0": time.perf_counter()}

    def on_pose(p, f):
        k = f.index
        frame_ms[k] = p.frame_ms
        quals[p.quality] = quals.get(p.quality, 0) + 1
        if truth is not None and p.quality != "no-fix":
            tx, ty, tyaw = truth[src.recorded_index(k)]
            hits[k] = (math.hypot(p.x - tx, p.y - ty) <= 1.0
                       and abs(math.degrees(wrap_angle(p.yaw - tyaw))) <= 3.0)
        if k == a.warmup - 1:
            state["hwm_warm"] = proc_status_mb("VmHWM")["VmHWM"]
        if k % a.sample_every == 0 or k == a.frames - 1:
            samples[state["ns"]] = (k, rss_mb())
            state["ns"] += 1
            if not a.quiet:
                el = time.perf_counter() - state["t0"]
                print(f"\rframe {k + 1}/{a.frames}  rss {samples[state['ns'] - 1, 1]:.1f} MB  {p.quality:<9} "
                      f"{el / (k + 1) * 1e3:.0f} ms/frame", end="", file=sys.stderr, flush=True)

    with tempfile.TemporaryDirectory() as d:
        sinks = [open_sink(f"log:{d}/soak.tlog", header={"map": str(map_path), "run": str(run_path)}),
                 open_sink("udp://127.0.0.1:59999")]
        runner = Runner(loc, src, sinks, on_pose=on_pose, status_every_s=cfg.loop.status_every_s)
        summary = runner.run()
        log_bytes = os.path.getsize(f"{d}/soak.tlog")
    wall = time.perf_counter() - state["t0"]
    if not a.quiet:
        print("", file=sys.stderr)
    s = samples[:state["ns"]]
    after = s[s[:, 0] >= a.warmup]
    base = float(after[0, 1]) if len(after) else float(s[-1, 1])
    mem_end = proc_status_mb("VmRSS", "VmHWM")
    done = summary["frames"]
    counted = slice(a.warmup, done)
    res = {
        "frames": done,
        "warmup_frames": a.warmup,
        "run": str(run_path),
        "recorded_frames": src.n,
        "without_scipy": bool(a.without_scipy),
        "scipy_loaded": sys.modules.get("scipy") is not None,
        "rss_imports_mb": mem_start["VmRSS"],
        "rss_built_mb": mem_built["VmRSS"],
        "hwm_built_mb": mem_built["VmHWM"],
        "build_s": build_s,
        "cache_prefilled": not a.no_prefill,
        "rss_after_warmup_mb": base,
        "rss_end_mb": float(s[-1, 1]),
        "rss_growth_mb": float(s[-1, 1]) - base,
        "rss_slope_mb_per_10k_frames": slope_mb_per_10k(after),
        "rss_max_after_warmup_mb": float(after[:, 1].max()) if len(after) else math.nan,
        "hwm_at_warmup_end_mb": state["hwm_warm"],
        "hwm_end_mb": mem_end["VmHWM"],
        "ms_per_frame_wall": wall / max(done, 1) * 1e3,
        "frame_ms_median": float(np.median(frame_ms[counted])) if done > a.warmup else math.nan,
        "frame_ms_p99": float(np.percentile(frame_ms[counted], 99)) if done > a.warmup else math.nan,
        "within_1m_3deg_share": float(hits[counted].mean()) if truth is not None and done > a.warmup else math.nan,
        "quality_counts": quals,
        "global_searches": summary["health"].get("global_searches"),
        "unusable_frames": summary["health"].get("unusable_frames"),
        "overruns": summary["health"].get("overruns"),
        "sink_failed": [summary["health"].get(f"sink{i}_failed") for i in range(2)],
        "runlog_bytes": log_bytes,
        "stopped_by": summary["stopped_by"],
        "load_avg_1min_end": os.getloadavg()[0],
        "pass_growth_below_1mb": (float(s[-1, 1]) - base) < 1.0,
    }
    if a.json:
        print(json.dumps(res, sort_keys=True))
    else:
        for k, v in res.items():
            print(f"{k:<30} {round(v, 3) if isinstance(v, float) else v}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
