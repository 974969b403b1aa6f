"""Simulated runs end to end: valid run folders, byte-identical for a seed, and the 'tinyloc sim' commands."""

import json
import math
from pathlib import Path

import numpy as np
import pytest

from tinyloc.camera.model import save_camera
from tinyloc.cli.main import main
from tinyloc.frames import gravity_to_roll_pitch
from tinyloc.runfolder import RunFolder
from tinyloc.sim.runs import DEFAULT_CAMERA, RunParams, make_run
from tinyloc.sim.site import DEMO_PARAMS, generate_site

SMALL = DEFAULT_CAMERA.scaled(160, 120)


@pytest.fixture(scope="module")
def world():
    return generate_site(21, DEMO_PARAMS).world


def _files(root: Path):
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_run_folder_is_valid_and_consistent(world, tmp_path):
    s = make_run(world, tmp_path / "run", seed=3, params=RunParams(frames=6, frame_rate_hz=2.0), camera=SMALL)
    rf = RunFolder.open(tmp_path / "run")
    assert rf.warnings == [] and len(rf) == 6 and rf.meta["complete"] is True
    assert rf.camera == SMALL
    assert rf.load_frame(0).shape == (120, 160, 3) and rf.load_label(5).shape == (120, 160)
    np.testing.assert_allclose(np.diff(rf.frame_t), 0.5)
    assert rf.truth.shape == (6, 6) and np.array_equal(rf.truth[:, 0], rf.frame_t)
    # truth lat/lon and x/y agree through the run's origin
    lat, lon = rf.frame.to_latlon(rf.truth[:, 4], rf.truth[:, 5])
    assert np.abs(lat - rf.truth[:, 1]).max() < 1e-9 and np.abs(lon - rf.truth[:, 2]).max() < 1e-9
    # the first second at rest: the accelerometer reads about +g up, roll/pitch within a degree of level
    rest = rf.imu[rf.imu[:, 0] < 0.9]
    assert abs(rest[:, 3].mean() - 9.80665) < 0.2
    r, p = gravity_to_roll_pitch(rest[:, 1:].mean(axis=0))
    assert abs(math.degrees(r)) < 1.5 and abs(math.degrees(p)) < 1.5
    assert len(rf.gnss) >= 3 and np.all(rf.gnss[:, 4] > 0)
    assert len(rf.odometry) > 100 and np.abs(rf.odometry[0, 1:]).max() < 1e-3  # odom frame starts at the start
    # sensor times cover the frames
    for a in (rf.imu, rf.odometry):
        assert a[0, 0] <= rf.frame_t[0] and a[-1, 0] >= rf.frame_t[-1]
    assert s["frames"] == 6 and s["distance_m"] > 0


def test_same_seed_byte_identical_different_seed_differs(world, tmp_path):
    p = RunParams(frames=2, frame_rate_hz=2.0)
    make_run(world, tmp_path / "a", seed=5, params=p, camera=SMALL)
    make_run(world, tmp_path / "b", seed=5, params=p, camera=SMALL)
    make_run(world, tmp_path / "c", seed=6, params=p, camera=SMALL)
    fa, fb, fc = _files(tmp_path / "a"), _files(tmp_path / "b"), _files(tmp_path / "c")
    ja, jb = json.loads(fa.pop("run.json")), json.loads(fb.pop("run.json"))
    assert ja.pop("name") == "a" and jb.pop("name") == "b" and ja == jb  # only the folder name differs
    assert fa == fb
    fc.pop("run.json")
    for k in ("frames/000000.png", "imu.csv", "odometry.csv", "gnss.csv", "truth.csv"):
        assert fa[k] != fc[k], k


def test_cli_site_and_run(tmp_path, capsys):
    cam = tmp_path / "camera.toml"
    save_camera(cam, SMALL)
    assert main(["sim", "site", "--seed", "4", "--size", "demo", "-o", str(tmp_path / "site"), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    for f in ("site.geojson", "world.json", "site.tlm", "site.json"):
        assert (tmp_path / "site" / f).is_file(), f
    assert summary["packed_map"]["bytes"] > 1000
    rc = main(["sim", "run", str(tmp_path / "site"), "--seed", "2", "--frames", "3", "--camera", str(cam),
               "-o", str(tmp_path / "run"), "--jpeg", "--json"])
    assert rc == 0
    out = capsys.readouterr()
    assert "3/3" in out.err  # progress on stderr
    assert json.loads(out.out)["frames"] == 3
    rf = RunFolder.open(tmp_path / "run")
    assert rf.frame_files[0].endswith(".jpg")
    # writing into the same (now non-empty) folder is refused with one line
    rc = main(["sim", "run", str(tmp_path / "site"), "--seed", "2", "--frames", "3", "-o", str(tmp_path / "run")])
    assert rc == 2 and "not empty" in capsys.readouterr().err


def test_cli_bad_site_folder(tmp_path, capsys):
    rc = main(["sim", "run", str(tmp_path), "--seed", "1", "-o", str(tmp_path / "r")])
    err = capsys.readouterr().err
    assert rc == 2 and "world.json: no such file" in err and "\n" == err[-1] and err.count("\n") == 1


def test_site_folder_byte_identical_for_a_seed(tmp_path):
    from tinyloc.cli.cmd_sim import write_site

    write_site(12, tmp_path / "a", size="demo")
    write_site(12, tmp_path / "b", size="demo")
    write_site(13, tmp_path / "c", size="demo")
    fa, fb, fc = _files(tmp_path / "a"), _files(tmp_path / "b"), _files(tmp_path / "c")
    assert set(fa) == {"site.geojson", "world.json", "site.tlm", "site.json"}
    assert fa == fb
    assert all(fa[k] != fc[k] for k in fa)


def test_bundled_demo_data_is_complete_and_consistent():
    """The shipped demo: a readable packed map and run folder sharing one origin (regenerate with
    python -m tinyloc.sim.demo if the packed-map format changes)."""
    from tinyloc.maps.packfile import PackedMap
    from tinyloc.sim.demo import demo_paths

    p = demo_paths()
    rf = RunFolder.open(p["run"])
    assert rf.warnings == [] and len(rf) >= 100 and rf.truth is not None and rf.has_labels
    pm = PackedMap.open(p["map"])
    m = pm.meta
    assert (m.lat0_deg, m.lon0_deg) == (rf.frame.lat0_deg, rf.frame.lon0_deg)
    # the drive stays inside the map
    row, col = pm.cell_of(rf.truth[:, 4], rf.truth[:, 5])
    assert np.all((row >= 0) & (row < m.rows) & (col >= 0) & (col < m.cols))
    total = sum(f.stat().st_size for f in p["run"].rglob("*") if f.is_file()) + p["map"].stat().st_size
    # small enough to ship in the wheel: 239 JPEG frames at 4 Hz with their labels are 9.2 MB (at 2 Hz the demo
    # was 4.3 MB, but half the frame rate doubled its median error: tinyloc/sim/demo.py)
    assert total < 10e6


def test_bundled_demo_config_is_the_calibration_of_its_recordings(tmp_path):
    """The demo robot's loop.toml holds what tinyloc calibrate imu makes of the run's recordings at rest."""
    from tinyloc.cli.main import main
    from tinyloc.runtime.config import load_config
    from tinyloc.sim.demo import demo_paths
    from tinyloc.sim.runs import IMU_REST_FILES

    run = demo_paths()["run"]
    out = tmp_path / "loop.toml"
    assert main(["calibrate", "imu", *(str(run / rel) for rel in IMU_REST_FILES), "-o", str(out)]) == 0
    want, got = load_config(out).loop, load_config(run.parent / "loop.toml").loop
    for ax in "xyz":
        assert abs(getattr(got, f"accel_bias_{ax}") - getattr(want, f"accel_bias_{ax}")) < 1e-4
