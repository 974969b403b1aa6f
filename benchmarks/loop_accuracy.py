"""Accuracy of the live loop on freshly generated drives: the table for the README.

    python benchmarks/loop_accuracy.py [--seeds 1 2 3 4 5] [--frames 300] [--work /tmp/tinyloc-acc] [--json]

For each seed: ``tinyloc sim site --seed S`` (map errors on, the simulator's default scale) and
``tinyloc sim run SITE --seed S --frames N``, then the run goes through the same loop as
``tinyloc run`` / ``tinyloc demo``, twice:

- ``segmenter``: tinyloc's own classical segmenter (the full product);
- ``labels``: the renderer's true class labels fed in as an external segmenter's output
  (``loop.external_labels``), which isolates tracking and matching from segmentation errors;
- ``mapcut``: bird's-eye evidence cut out of the packed map itself at the true pose (with noise
  and dropout, ``tinyloc.correlate.synth.cut_bev``): no segmentation, no projection and no map
  errors, but the run's own odometry, IMU and satellite fixes, the real correlator and tracker.
  It shows what the loop does with evidence that agrees with the map.

``--imu-cal`` first calibrates each drive's accelerometer bias the way an operator would
(``tinyloc calibrate imu`` on the two recordings at rest the simulator writes beside the drive,
docs/camera.md step 3) and runs the loop with it; without it the loop runs uncalibrated.
``--wheel-cal`` likewise calibrates the wheel-odometry factor (``tinyloc calibrate wheel`` on the
two drives along a measured 20 m line the simulator writes, docs/camera.md step 4); without it the
loop starts from 1 and only learns the factor online.

Figures per run (definitions in tinyloc/runtime/summary.py): recall within 1 m and 3 deg after
the first 30 m, median position and heading error, the satellite receiver's median error on
the same frames and the ratio, the share inside the reported 95 % ellipse, median frame time,
and the share of frames flagged "tracking" that are more than 1 m / 3 deg off (after the first 30 m,
and over the whole drive: the lock-on stretch is where a confident wrong mode shows). Generated sites and runs are kept in --work and reused.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tinyloc.runtime.config import load_config  # noqa: E402
from tinyloc.runtime.loop import Localizer  # noqa: E402
from tinyloc.runtime.sources import RunFolderSource  # noqa: E402
from tinyloc.runtime.summary import gnss_at_frames, summarize  # noqa: E402


def _sim(*cmd):
    r = subprocess.run([sys.executable, "-W", "ignore", "-m", "tinyloc", "sim", *cmd], capture_output=True, text=True)
    if r.returncode != 0:
        raise RuntimeError(f"tinyloc sim {' '.join(cmd)} failed: {r.stderr.strip()[-300:]}")


def ensure_drive(work: Path, seed: int, size: str = "demo", frames: int = 300) -> tuple[Path, Path]:
    """The generated site and run of ``seed`` in ``work`` (made with ``tinyloc sim`` if missing)."""
    site = work / f"site{seed}"
    run = work / f"run{seed}_{frames}"
    if not (site / "site.tlm").is_file():
        _sim("site", "--seed", str(seed), "--size", size, "-o", str(site))
    if not (run / "run.json").is_file():
        _sim("run", str(site), "--seed", str(seed), "--frames", str(frames), "-o", str(run))
    return site, run


def _fresh_map(site: Path) -> Path:
    """The site's packed map, packed again from its GeoJSON if this tinyloc no longer reads it."""
    from tinyloc.errors import MapFormatError
    from tinyloc.maps.packfile import PackedMap

    tlm = site / "site.tlm"
    try:
        PackedMap.open(tlm).close()
    except MapFormatError:
        r = subprocess.run([sys.executable, "-W", "ignore", "-m", "tinyloc", "map", "pack", str(site / "site.geojson"),
                            "-o", str(tlm), "-q"], capture_output=True, text=True)
        if r.returncode != 0:
            raise RuntimeError(f"map pack failed: {r.stderr.strip()[-300:]}")
    return tlm


class _MapCut:
    """Stand-in perception: the packed map's own evidence at the true pose of each frame."""

    def __init__(self, pm, truth):
        import numpy as np

        self.pm, self.truth = pm, truth
        self.full = pm.read_all()
        self.rng = np.random.default_rng(0)
        self.i = 0

    def perceive(self, image, gravity, labels=None):
        from tinyloc.correlate.synth import cut_bev

        x, y, yaw = self.truth[self.i]
        r, c = self.pm.cell_of(x, y)
        return cut_bev(self.full, r, c, yaw, self.rng, noise=0.15, dropout=0.2)


def evaluate(run: Path, site_map: Path, overrides, skip_m: float, mode: str = "segmenter"):
    from tinyloc.maps.packfile import PackedMap

    cfg = load_config(None, overrides)
    src = RunFolderSource(run, labels=cfg.loop.external_labels)
    pm = PackedMap.open(site_map)
    truth = src.truth_xy(pm.frame)
    perc = _MapCut(pm, truth) if mode == "mapcut" else None
    loc = Localizer(pm, src.camera, cfg, perceiver=perc)
    gnss = gnss_at_frames(src.rf, loc.frame_enu)
    poses = []
    for f in src:
        if perc is not None:
            perc.i = f.index
        poses.append(loc.step(f))
    loc.close()
    s = summarize(poses, truth, gnss, skip_m=skip_m)
    s["gnss_ratio"] = s["gnss_median_error_m"] / s["median_error_m"] if s["median_error_m"] > 0 else math.nan
    s["tracking_wrong"] = _tracking_wrong(poses, truth, skip_m)
    # the lock-on stretch is where a confident wrong mode is most likely, and skip_m hides it
    s["tracking_wrong_whole_drive"] = _tracking_wrong(poses, truth, 0.0)
    return s


def _tracking_wrong(poses, truth, skip_m: float) -> float:
    """Share of counted frames flagged "tracking" whose estimate is NOT within 1 m and 3 deg (the dangerous case)."""
    import numpy as np

    from tinyloc.frames import wrap_angle

    n = len(poses)
    t = np.asarray(truth, dtype=np.float64)[:n]
    step = np.zeros(n)
    if n > 1:
        d = np.hypot(np.diff(t[:, 0]), np.diff(t[:, 1]))
        step[1:] = np.where(np.isfinite(d), d, 0.0)
    counted = np.all(np.isfinite(t), axis=1) & (np.cumsum(step) >= skip_m)
    if not counted.any():
        return math.nan
    est = np.array([[p.x, p.y, p.yaw] for p in poses], dtype=np.float64).reshape(-1, 3)
    with np.errstate(invalid="ignore"):
        good = (np.hypot(est[:, 0] - t[:, 0], est[:, 1] - t[:, 1]) <= 1.0) & \
            (np.degrees(np.abs(wrap_angle(est[:, 2] - t[:, 2]))) <= 3.0)
    trk = np.array([p.quality == "tracking" for p in poses])
    return float(np.sum(counted & trk & ~good) / counted.sum())


def _imu_cal(run: Path) -> list[str]:
    """Loop overrides with the accelerometer bias from the run's recordings at rest (made if missing)."""
    from dataclasses import fields

    from tinyloc.camera.imu_rest import calibrate_from_files
    from tinyloc.sim.runs import IMU_REST_FILES, write_imu_rest
    from tinyloc.sim.sensors import ImuParams

    paths = [run / rel for rel in IMU_REST_FILES]
    if not all(p.is_file() for p in paths):
        sim = json.loads((run / "run.json").read_text())["simulated"]
        names = {f.name for f in fields(ImuParams)}
        write_imu_rest(run, int(sim["seed"]), ImuParams(**{k: v for k, v in sim["imu"].items() if k in names}))
    bias = calibrate_from_files(*paths).bias
    return [f"loop.accel_bias_{ax}={float(v)!r}" for ax, v in zip("xyz", bias)]


def _wheel_cal(run: Path) -> list[str]:
    """Loop override with the wheel factor from the run's straight-line drives (made if missing)."""
    from tinyloc.camera.wheel_line import calibrate_from_files
    from tinyloc.sim.runs import WHEEL_LINE_M, ensure_wheel_line

    return [f"track.odometry_scale={calibrate_from_files(ensure_wheel_line(run), WHEEL_LINE_M).factor!r}"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3, 4, 5])
    ap.add_argument("--frames", type=int, default=300)
    ap.add_argument("--size", default="demo", help="site size for tinyloc sim site (demo, small, town)")
    ap.add_argument("--work", default="/tmp/tinyloc-acc")
    ap.add_argument("--skip-m", type=float, default=30.0)
    ap.add_argument("--modes", nargs="+", default=["segmenter", "labels", "mapcut"])
    ap.add_argument("--set", action="append", default=[])
    ap.add_argument("--imu-cal", action="store_true",
                    help="calibrate each drive's accelerometer first, as an operator would (tinyloc calibrate imu on "
                         "the run's two recordings at rest, calibration/imu_rest_*.csv; made for older cached runs), "
                         "and run the loop with that bias")
    ap.add_argument("--wheel-cal", action="store_true",
                    help="calibrate each drive's wheel-odometry factor first, as an operator would (tinyloc calibrate "
                         "wheel on the run's two drives along a measured 20 m line, calibration/wheel_line_*.csv; made "
                         "for older cached runs), and start the loop with it (it is still learnt online)")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    work = Path(a.work)
    work.mkdir(parents=True, exist_ok=True)
    rows = []
    for seed in a.seeds:
        site, run = ensure_drive(work, seed, a.size, a.frames)
        cal = (_imu_cal(run) if a.imu_cal else []) + (_wheel_cal(run) if a.wheel_cal else [])
        for mode in a.modes:
            ov = list(a.set) + cal + (["loop.external_labels=true"] if mode == "labels" else [])
            try:
                s = evaluate(run, _fresh_map(site), ov, a.skip_m, mode)
            except Exception as e:  # one bad seed must not hide the others
                print(f"seed {seed} {mode}: failed: {type(e).__name__}: {e}", file=sys.stderr, flush=True)
                continue
            s.update(seed=seed, mode=mode, imu_cal=bool(a.imu_cal), wheel_cal=bool(a.wheel_cal))
            rows.append(s)
            print(f"seed {seed} {mode:<9} recall {s['recall_1m_3deg']:.2f}  median {s['median_error_m']:.2f} m "
                  f"{s['median_heading_error_deg']:.2f} deg  gnss {s['gnss_median_error_m']:.2f} m "
                  f"({s['gnss_ratio']:.1f}x)  in95 {s['inside_95_ellipse']:.2f} (d2 {s['mahalanobis_d2_median']:.2f})  wrong-tracking {s['tracking_wrong']:.2f} "
                  f"(whole drive {s['tracking_wrong_whole_drive']:.2f})  "
                  f"{s['frame_ms_median']:.0f} ms  "
                  f"[{s['frames_counted']}/{s['frames']} frames counted, {s['distance_m']:.0f} m]",
                  file=sys.stderr, flush=True)
    for mode in a.modes:
        ms = [s for s in rows if s["mode"] == mode]
        if ms:
            n95 = sum(s.get("inside_95_tested", 0) for s in ms)
            in95 = sum(s["inside_95_ellipse"] * s.get("inside_95_tested", 0) for s in ms
                       if s.get("inside_95_tested")) / n95 if n95 else math.nan
            print(f"all {mode:<9} mean recall {np.mean([s['recall_1m_3deg'] for s in ms]):.3f}  "
                  f"mean median {np.mean([s['median_error_m'] for s in ms]):.3f} m  "
                  f"pooled in95 {in95:.3f} over {n95} frames  ({len(ms)} drives)", file=sys.stderr, flush=True)
    if a.json:
        print(json.dumps(rows, default=lambda v: None))
        return 0
    print("| seed | perception | recall 1 m/3 deg | median error | median heading error | GNSS-only median | "
          "GNSS / tinyloc | inside 95 % ellipse | wrong while tracking | frame ms |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for s in rows:
        print(f"| {s['seed']} | {s['mode']} | {100 * s['recall_1m_3deg']:.0f} % | {s['median_error_m']:.2f} m | "
              f"{s['median_heading_error_deg']:.2f} deg | {s['gnss_median_error_m']:.2f} m | {s['gnss_ratio']:.1f}x | "
              f"{100 * s['inside_95_ellipse']:.0f} % | {100 * s['tracking_wrong']:.0f} % | {s['frame_ms_median']:.0f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
