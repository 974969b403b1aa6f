"""Whole simulated runs: drive a rover through a site, render its camera, model its sensors, write a run folder.

:func:`make_run` is what ``tinyloc sim run`` calls. It is deterministic for a
(world, seed, parameters) triple: the same inputs write byte-identical files.
Random streams are split per purpose (route, IMU, odometry, GNSS, appearance)
with ``numpy.random.SeedSequence``, so changing, say, the frame count does not
change the route.
"""

from __future__ import annotations

import json
import math
import sys
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path

import numpy as np

from ..camera.model import CameraModel, Mount
from ..errors import InputError
from ..runfolder import RunWriter
from .render import Renderer, RenderParams
from .rover import DriveParams, drive
from .sensors import (G0, GnssParams, ImuParams, OdometryParams, gnss_samples, imu_samples, line_odometry_pair,
                      odometry_samples, rest_imu_pair)
from .world import World

# The simulator's default camera: VGA, about 70 degrees across, mild barrel distortion, 0.8 m up, 8 deg down.
DEFAULT_CAMERA = CameraModel(width=640, height=480, fx=450.0, fy=450.0, cx=319.5, cy=239.5,
                             dist=(-0.08, 0.015, 0.0, 0.0, 0.0), mount=Mount(height_m=0.8, pitch_deg=8.0))


AE_TARGET = 105.0  # auto-exposure target: mean 8-bit level of a frame


@dataclass(frozen=True)
class RunParams:
    """Everything that shapes a simulated run, besides the world and the seed."""

    frames: int = 100
    frame_rate_hz: float = 5.0
    image_ext: str = ".png"
    jpeg_quality: int = 90
    write_labels: bool = True
    exposure_drift: float = 0.12       # 1-sigma of the log exposure drift
    wb_drift: float = 0.04             # 1-sigma of the white-balance channel gains
    sun_el_deg: tuple = (25.0, 60.0)   # range drawn per run
    cloud_cover: tuple = (0.1, 0.95)   # range drawn per run (above 0.5 the sun fades: overcast)
    saturation: tuple = (0.55, 0.95)   # camera colour saturation, drawn per run
    exposure: tuple = (0.7, 1.05)      # nominal exposure gain, drawn per run
    auto_exposure: bool = True         # the camera's auto exposure (one frame late, as real ones are)
    drive: DriveParams = field(default_factory=DriveParams)
    imu: ImuParams = field(default_factory=ImuParams)
    odometry: OdometryParams = field(default_factory=OdometryParams)
    gnss: GnssParams = field(default_factory=GnssParams)
    render: RenderParams = field(default_factory=RenderParams)


def _ou(rng, n, sigma, corr_steps):
    a = math.exp(-1.0 / max(corr_steps, 1e-9))
    q = sigma * math.sqrt(1 - a * a)
    x = rng.normal(0, sigma)
    out = np.empty(n)
    for k in range(n):
        out[k] = x
        x = a * x + rng.normal(0, q)
    return out


def make_run(world: World, out_dir, *, seed: int, params: RunParams = RunParams(),
             camera: CameraModel | None = None, progress=None, name: str = "") -> dict:
    """Simulate one drive and write it as a run folder.

    Parameters
    ----------
    world : World
    out_dir : path
        The run folder to create (must be new or empty).
    seed : int
    params : RunParams
    camera : CameraModel, optional
        Defaults to :data:`DEFAULT_CAMERA`.
    progress : callable(done, total), optional
        Called after each frame.
    name : str
        run.json name (default: the folder name).

    Returns
    -------
    dict
        Summary figures (distance, duration, frames, mean render time, odometry drift, GNSS error).
    """
    import time

    if params.frames < 1:
        raise InputError("--frames must be at least 1")
    if not 0.1 <= params.frame_rate_hz <= 60.0:
        raise InputError(f"frame rate {params.frame_rate_hz} Hz is out of range (0.1 .. 60)")
    cam = camera or DEFAULT_CAMERA
    r_route, r_imu, r_odo, r_gnss, r_look = _streams(seed)
    t0 = 1.5
    duration = t0 + (params.frames - 1) / params.frame_rate_hz + 1.0
    traj = drive(world, r_route, duration, params.drive)
    t_imu, f_imu = imu_samples(traj, r_imu, params.imu)
    t_odo, odo = odometry_samples(traj, r_odo, params.odometry)
    gn = gnss_samples(traj, world, r_gnss, params.gnss)
    frame = world.frame
    sun_az = float(r_look.uniform(0.0, 360.0))
    sun_el = float(r_look.uniform(*params.sun_el_deg))
    t_frames = t0 + np.arange(params.frames) / params.frame_rate_hz
    st = traj.at(t_frames)
    n = params.frames
    cloud = float(r_look.uniform(*params.cloud_cover))
    sat = float(r_look.uniform(*params.saturation))
    expo0 = float(r_look.uniform(*params.exposure))
    expo = expo0 * np.exp(_ou(r_look, n, params.exposure_drift, 3.0 * params.frame_rate_hz))
    wb = 1.0 + np.stack([_ou(r_look, n, params.wb_drift, 5.0 * params.frame_rate_hz) for _ in range(3)], axis=1)
    wb[:, 1] = 1.0  # white balance drifts red and blue against green
    rparams = replace(params.render, cloud_cover=cloud, saturation=sat)
    renderer = Renderer(world, cam, rparams, sun_az_deg=sun_az, sun_el_deg=sun_el, seed=int(seed))
    meta = {"simulated": {"seed": int(seed), "site": world.meta.get("name"), "site_seed": world.meta.get("seed"),
                          "sun_az_deg": sun_az, "sun_el_deg": sun_el, "cloud_cover": cloud, "saturation": sat,
                          "exposure": expo0, "frame_rate_hz": params.frame_rate_hz,
                          "odometry": asdict(params.odometry), "gnss": asdict(params.gnss), "imu": asdict(params.imu)}}
    lat_f, lon_f = frame.to_latlon(st["x"], st["y"])
    lat_g, lon_g = frame.to_latlon(gn["x"], gn["y"])
    render_ms = []
    ae = 1.0  # auto exposure: steers the frame's mean level towards AE_TARGET, reacting one frame late
    with RunWriter(out_dir, camera=cam, origin=world.origin, name=name, source="tinyloc sim run",
                   extra=meta, image_ext=params.image_ext, jpeg_quality=params.jpeg_quality) as w:
        for k in range(n):
            pose = (st["x"][k], st["y"][k], st["roll"][k], st["pitch"][k], st["yaw"][k])
            a = time.perf_counter()
            bgr, lab = renderer.render(pose, t_s=float(t_frames[k]), frame_index=k, exposure=float(expo[k]) * ae,
                                       white_balance=tuple(wb[k]), rates=(st["yaw_rate"][k], 0.0, st["speed"][k]))
            render_ms.append((time.perf_counter() - a) * 1e3)
            if params.auto_exposure:
                level = float(bgr[::8, ::8].mean()) + 1.0
                ae = float(np.clip(ae * (AE_TARGET / level) ** 0.6, 0.5, 2.5))
            w.add_frame(float(t_frames[k]), bgr, label=lab if params.write_labels else None)
            w.add_truth(float(t_frames[k]), float(lat_f[k]), float(lon_f[k]), float(st["yaw"][k]),
                        float(st["x"][k]), float(st["y"][k]))
            if progress is not None:
                progress(k + 1, n)
        for k in range(len(t_imu)):
            w.add_imu(round(float(t_imu[k]), 6), *(float(v) for v in f_imu[k]))
        for k in range(len(t_odo)):
            w.add_odometry(round(float(t_odo[k]), 6), *(float(v) for v in odo[k]))
        for k in range(len(gn["t"])):
            w.add_gnss(float(gn["t"][k]), float(lat_g[k]), float(lon_g[k]), float(world.origin[2] + gn["h"][k]),
                       float(gn["acc_m"][k]))
    write_imu_rest(out_dir, seed, params.imu)
    write_wheel_line(out_dir, seed, params.odometry)
    dist = float(traj.s[-1])
    d_odo = float(np.sum(np.hypot(*np.diff(odo[:, :2], axis=0).T)))
    return {"frames": n, "duration_s": float(traj.t[-1]), "distance_m": dist,
            "render_ms_median": float(np.median(render_ms)), "odometry_length_ratio": d_odo / max(dist, 1e-9),
            "gnss_rms_m": float(np.sqrt(np.mean(gn["err_x"] ** 2 + gn["err_y"] ** 2))),
            "gnss_blocked_mean": float(np.mean(gn["blocked"])), "gravity": G0}


def _streams(seed: int) -> list:
    """The run's independent random streams: route, IMU, odometry, GNSS, look (in that order)."""
    ss = np.random.SeedSequence([int(seed), 0x52554E])
    return [np.random.default_rng(s) for s in ss.spawn(5)]


IMU_REST_FILES = ("calibration/imu_rest_a.csv", "calibration/imu_rest_b.csv")


def write_imu_rest(run_dir, seed: int, imu: ImuParams = ImuParams()) -> list[Path]:
    """Write the run's two IMU recordings at rest (``IMU_REST_FILES``), for ``tinyloc calibrate imu``.

    The accelerometer bias is the one the run's IMU stream drew first (:func:`imu_samples`), so a
    calibration from these files applies to the drive; the recordings' own noise, slope and headings
    come from a stream of their own, so adding them changes nothing else in the run. Runs made before
    these files existed get them by calling this with the run's seed and IMU parameters (run.json
    ``simulated``).
    """
    bias = _streams(seed)[1].normal(0.0, imu.bias_std, 3)  # imu_samples' first draw
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x52554E, 0x494D55]))
    paths = []
    for rel, (t, f) in zip(IMU_REST_FILES, rest_imu_pair(bias, rng, imu)):
        p = Path(run_dir) / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        with open(p, "w") as fh:
            fh.write("# simulated recording at rest for tinyloc calibrate imu (docs/camera.md, step 3)\nt,fx,fy,fz\n")
            for k in range(len(t)):
                fh.write(f"{t[k]:.3f},{f[k, 0]:.5f},{f[k, 1]:.5f},{f[k, 2]:.5f}\n")
        paths.append(p)
    return paths


WHEEL_LINE_FILES = ("calibration/wheel_line_a.csv", "calibration/wheel_line_b.csv")
WHEEL_LINE_M = 20.0  # the measured line's length, as the operator's tape says


def write_wheel_line(run_dir, seed: int, odometry: OdometryParams = OdometryParams()) -> list[Path]:
    """Write the robot's two drives along a measured straight line (``WHEEL_LINE_FILES``, ``WHEEL_LINE_M``).

    For ``tinyloc calibrate wheel``: the same wheel model as the drive (its scale error, slip, heading
    drift), from a random stream of its own, so adding the files changes nothing else in the run. Runs
    made before these files existed get them by calling this with the run's seed and odometry
    parameters (run.json ``simulated``).
    """
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x52554E, 0x574C]))
    paths = []
    for rel, (t, pose) in zip(WHEEL_LINE_FILES, line_odometry_pair(rng, odometry, length_m=WHEEL_LINE_M)):
        p = Path(run_dir) / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        with open(p, "w") as fh:
            fh.write(f"# simulated drive along a straight line measured {WHEEL_LINE_M:g} m, for tinyloc calibrate "
                     "wheel (docs/camera.md)\nt,x,y,yaw\n")
            for k in range(len(t)):
                fh.write(f"{t[k]:.3f},{pose[k, 0]:.4f},{pose[k, 1]:.4f},{pose[k, 2]:.5f}\n")
        paths.append(p)
    return paths


def ensure_wheel_line(run_dir) -> list[Path]:
    """The run's straight-line drives (``WHEEL_LINE_FILES``), written first when the run predates them.

    They are made from the run's own seed and wheel model as recorded in run.json (``simulated``).
    """
    paths = [Path(run_dir) / rel for rel in WHEEL_LINE_FILES]
    if not all(p.is_file() for p in paths):
        sim = json.loads((Path(run_dir) / "run.json").read_text(encoding="utf-8"))["simulated"]
        names = {f.name for f in fields(OdometryParams)}
        write_wheel_line(run_dir, int(sim["seed"]),
                         OdometryParams(**{k: v for k, v in sim["odometry"].items() if k in names}))
    return paths


def stderr_progress(label: str):
    """A progress callback printing ``label k/n`` on one rewritten stderr line."""
    def cb(done, total):
        end = "\n" if done == total else ""
        print(f"\r{label} {done}/{total}", end=end, file=sys.stderr, flush=True)
    return cb


def site_world_path(site_dir) -> Path:
    """world.json inside a site folder (or the file itself)."""
    p = Path(site_dir)
    return p / "world.json" if p.is_dir() else p
