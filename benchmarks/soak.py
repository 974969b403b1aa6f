"""Soak the live loop: resident memory over many frames (default 10,000) must not grow.

    python benchmarks/soak.py [--frames 10000] [--warmup 500] [--json]

The loop runs as in ``tinyloc bench loop`` (real segmenter and projector on a 640 x 480
frame, tracking-mode correlation, the filter, a run log and a UDP sink on loopback), driving
back and forth along a street of a generated site. Resident memory (``/proc/self/statm``) is
sampled every 100 frames; the figure is its growth from the end of the warm-up to the end, and
the pass mark is < 1 MB. Peak resident memory is reported too.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tinyloc.bench.loop import _TimedPerceiver, _frame_image, _scene  # noqa: E402
from tinyloc.camera.model import CameraModel  # noqa: E402
from tinyloc.correlate.synth import cut_bev  # noqa: E402
from tinyloc.maps.packfile import PackedMap  # noqa: E402
from tinyloc.runtime.config import load_config  # noqa: E402
from tinyloc.runtime.loop import Frame, Localizer  # noqa: E402
from tinyloc.runtime.sinks import open_sink  # noqa: E402

PAGE = os.sysconf("SC_PAGE_SIZE")


def rss_mb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * PAGE / 2 ** 20


def path_pose(k, y, span=80.0, speed=0.1, turn_frames=10):
    """Back and forth along y = const between x = -span/2 and +span/2, turning in place at the ends."""
    leg = int(span / speed)
    period = 2 * (leg + turn_frames)
    m = k % period
    if m < leg:
        return -span / 2 + speed * m, y, 0.0, speed, 0.0
    if m < leg + turn_frames:
        f = (m - leg + 1) / turn_frames
        return span / 2, y, math.pi * f, 0.0, math.pi / turn_frames
    m2 = m - leg - turn_frames
    if m2 < leg:
        return span / 2 - speed * m2, y, math.pi, speed, 0.0
    f = (m2 - leg + 1) / turn_frames
    return -span / 2, y, math.pi * (1 + f), 0.0, math.pi / turn_frames


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--frames", type=int, default=10000)
    ap.add_argument("--warmup", type=int, default=500)
    ap.add_argument("--set", action="append", default=[])
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    cam = CameraModel()
    with tempfile.TemporaryDirectory() as d:
        path, cov = _scene(Path(d))
        pm = PackedMap.open(path)
        road = cov[1]
        mid = road.shape[0] // 2
        row = mid - 40 + int(np.argmax(road[mid - 40:mid + 40].sum(1)))
        y = pm.xy_of(row + 0.5, 0)[1]
        rng = np.random.default_rng(4)
        holder = [None]
        perc = _TimedPerceiver(cam, holder)
        perc.i = 0
        cfg = load_config(None, ["track.likelihood_weight=1.0"] + a.set)
        loc = Localizer(pm, cam, cfg, perceiver=perc)
        sinks = [open_sink(f"log:{d}/soak.tlog"), open_sink("udp://127.0.0.1:59999")]
        img = _frame_image(cam)
        ox = oy = oyaw = 0.0
        samples = []
        t_start = time.perf_counter()
        quals = {}
        for k in range(a.frames):
            x, yy, yaw, step, dyaw = path_pose(k, y)
            ox += step * math.cos(oyaw)
            oy += step * math.sin(oyaw)
            oyaw = math.remainder(oyaw + dyaw, 2 * math.pi)
            r, c = pm.cell_of(x, yy)
            holder[0] = cut_bev(cov, r, c, yaw, rng, noise=0.15, dropout=0.2)
            t = 0.1 * k
            lat, lon = pm.frame.to_latlon(x + rng.normal(0, 2), yy + rng.normal(0, 2))
            f = Frame(k, t, img, "", np.array([[t, 0.0, 0.0, 9.81]]), np.array([[t, ox, oy, oyaw]]),
                      np.array([[t, lat, lon, 500.0, 1.5]]))
            p = loc.step(f)
            quals[p.quality] = quals.get(p.quality, 0) + 1
            for s in sinks:
                s.send(p)
            if k % 100 == 0 or k == a.frames - 1:
                samples.append((k, rss_mb()))
                if not a.json:
                    print(f"\rframe {k + 1}/{a.frames}  rss {samples[-1][1]:.1f} MB  {p.quality:<9} "
                          f"{(time.perf_counter() - t_start) / (k + 1) * 1e3:.0f} ms/frame", end="",
                          file=sys.stderr, flush=True)
        for s in sinks:
            s.close()
    if not a.json:
        print("", file=sys.stderr)
    after = [m for k, m in samples if k >= a.warmup]
    base = after[0] if after else samples[-1][1]
    res = {
        "frames": a.frames,
        "warmup_frames": a.warmup,
        "rss_after_warmup_mb": base,
        "rss_end_mb": samples[-1][1],
        "rss_growth_mb": samples[-1][1] - base,
        "rss_max_after_warmup_mb": max(after) if after else math.nan,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
        "ms_per_frame": (time.perf_counter() - t_start) / a.frames * 1e3,
        "quality_counts": quals,
        "pass_growth_below_1mb": (samples[-1][1] - base) < 1.0,
    }
    if a.json:
        print(json.dumps(res, sort_keys=True))
    else:
        for k, v in res.items():
            print(f"{k:<26} {v}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
