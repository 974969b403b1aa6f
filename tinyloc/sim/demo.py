"""The bundled demo data: a small invented site ("demo_park") and a short drive through it.

``python -m tinyloc.sim.demo`` regenerates, byte for byte (same tinyloc, numpy and
OpenCV versions):

- ``tinyloc/data/demo/demo_park.tlm``          packed map (0.5 m cells)
- ``tinyloc/data/demo/demo_park.geojson``      the map it was packed from (imperfect, as open maps are)
- ``tinyloc/data/demo/demo_park.world.json``   the hidden 3D world (to render more runs)
- ``tinyloc/data/demo/run/``                   a run folder: JPEG frames, labels, IMU, odometry, GNSS, truth
- ``maps_packed/demo_park.tlm`` and ``maps_packed/demo_park.geojson``  copies for the repository's map shelf

Use :func:`demo_paths` to find the bundled files from code.
"""

from __future__ import annotations

import json
import shutil
import sys
from dataclasses import replace
from importlib import resources
from pathlib import Path

from .runs import RunParams, make_run, stderr_progress
from .site import DEMO_PARAMS, generate_site

SITE_SEED = 3
RUN_SEED = 10
FRAMES = 239  # 4 Hz over the same 60 s drive: at 2 Hz (120 frames) the median error was 0.62 m, at 4 Hz 0.35 m
RATE_HZ = 4.0
JPEG_QUALITY = 80


def demo_paths() -> dict:
    """Paths of the bundled demo files: ``map``, ``geojson``, ``world``, ``run`` (pathlib.Path each)."""
    base = Path(str(resources.files("tinyloc") / "data" / "demo"))
    return {"map": base / "demo_park.tlm", "geojson": base / "demo_park.geojson",
            "world": base / "demo_park.world.json", "run": base / "run"}


def write_demo(data_dir, maps_dir=None, *, progress=None, run_seed: int = RUN_SEED) -> dict:
    """Generate the demo site and run into ``data_dir`` (and copy the map into ``maps_dir``)."""
    from ..maps.compile import pack_geojson

    data_dir = Path(data_dir)
    data_dir.mkdir(parents=True, exist_ok=True)
    site = generate_site(SITE_SEED, DEMO_PARAMS)
    gj = data_dir / "demo_park.geojson"
    gj.write_text(json.dumps(site.geojson, separators=(",", ":")) + "\n", encoding="utf-8")
    site.world.save(data_dir / "demo_park.world.json")
    rep = pack_geojson(site.geojson, data_dir / "demo_park.tlm", res_m=0.5)
    run_dir = data_dir / "run"
    if run_dir.exists():
        shutil.rmtree(run_dir)
    params = RunParams(frames=FRAMES, frame_rate_hz=RATE_HZ, image_ext=".jpg", jpeg_quality=JPEG_QUALITY)
    # a fair-weather day: broken clouds, sun, a camera with natural colour
    params = replace(params, drive=replace(params.drive, stop_prob=0.25), cloud_cover=(0.3, 0.4),
                     saturation=(0.85, 0.9))
    summary = make_run(site.world, run_dir, seed=run_seed, params=params, progress=progress, name="demo_park-1")
    # Name the map in run.json so `tinyloc replay RUN` finds it without --map.
    meta_path = run_dir / "run.json"
    meta = json.loads(meta_path.read_text(encoding="utf-8"))
    meta["map"] = "../demo_park.tlm"
    meta_path.write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    write_demo_config(data_dir)
    if maps_dir is not None:
        maps_dir = Path(maps_dir)
        maps_dir.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(data_dir / "demo_park.tlm", maps_dir / "demo_park.tlm")
        shutil.copyfile(gj, maps_dir / "demo_park.geojson")
    return {"site": site.name, "map_bytes": rep.file_bytes, **summary}


def write_demo_config(data_dir) -> Path:
    """The demo robot's loop.toml: its accelerometer bias and wheel factor, calibrated from its recordings.

    What an operator does once per robot (docs/camera.md, steps 3 and 4: ``tinyloc calibrate imu`` and
    ``tinyloc calibrate wheel``), done on the simulated robot's recordings at rest
    (``calibration/imu_rest_*.csv``) and along a measured line (``calibration/wheel_line_*.csv``), written
    with the run (the line drives are made here when the run folder predates them).
    """
    from ..camera.imu_rest import calibrate_from_files
    from ..camera.wheel_line import calibrate_from_files as wheel_from_files
    from ..tomlio import write_toml
    from .runs import IMU_REST_FILES, WHEEL_LINE_M, ensure_wheel_line

    data_dir = Path(data_dir)
    run = data_dir / "run"
    bias = calibrate_from_files(*(run / rel for rel in IMU_REST_FILES)).bias
    factor = wheel_from_files(ensure_wheel_line(run), WHEEL_LINE_M).factor
    out = data_dir / "loop.toml"
    write_toml(out, {"loop": {f"accel_bias_{ax}": round(float(v), 5) for ax, v in zip("xyz", bias)},
                     "track": {"odometry_scale": round(float(factor), 5)}},
               header="The demo robot's loop configuration: its accelerometer bias from\n"
                      "tinyloc calibrate imu run/calibration/imu_rest_a.csv run/calibration/imu_rest_b.csv\n"
                      "and its wheel factor from\n"
                      f"tinyloc calibrate wheel run/calibration/wheel_line_a.csv run/calibration/wheel_line_b.csv "
                      f"--distance {WHEEL_LINE_M:g}")
    return out


def main(argv=None) -> int:
    root = Path(__file__).resolve().parents[2]
    s = write_demo(root / "tinyloc" / "data" / "demo", root / "maps_packed",
                   progress=stderr_progress("demo run: frames"))
    print(json.dumps(s, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
