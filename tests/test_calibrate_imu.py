"""``tinyloc calibrate imu``: accelerometer bias by the two-position method, end to end.

Readings are made with SciPy's ``Rotation`` (an independent attitude library): the robot stands on
a slope (tilt and slope direction known), at a heading and at that heading + 180 deg about the
ground's normal; the accelerometer reads R^T (0, 0, g) + bias + noise. The two-position method
(common practice) must give the bias back; the checks on each recording reject a robot that moved,
a short recording and two different spots.
"""

import json

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from tinyloc.cli.main import main
from tinyloc.runtime.config import load_config

G = 9.80665
BIAS = np.array([0.045, -0.030, 0.020])


def _rest_csv(path, yaw_deg, *, tilt_deg=2.0, slope_dir_deg=30.0, n=300, noise=0.03, push=0.0, seed=0):
    rng = np.random.default_rng(seed)
    # ground normal tilted by tilt_deg towards slope_dir; the robot turns about that normal
    slope = Rotation.from_euler("zyz", [slope_dir_deg, tilt_deg, -slope_dir_deg], degrees=True)
    att = slope * Rotation.from_euler("z", yaw_deg, degrees=True)  # base -> world
    f = att.inv().apply([0.0, 0.0, G]) + BIAS
    rows = f + rng.normal(0.0, noise, (n, 3))
    rows[n // 2:, 0] += push
    t = np.arange(n) * 0.01
    with open(path, "w") as fh:
        fh.write("# robot at rest\nt,fx,fy,fz\n")
        for k in range(n):
            fh.write(f"{t[k]:.3f},{rows[k, 0]:.5f},{rows[k, 1]:.5f},{rows[k, 2]:.5f}\n")
    return path


def test_bias_recovered_and_written_into_the_loop_config(tmp_path, capsys):
    a = _rest_csv(tmp_path / "a.csv", 10.0, seed=1)
    b = _rest_csv(tmp_path / "b.csv", 190.0, seed=2)
    cfg = tmp_path / "loop.toml"
    cfg.write_text("[loop]\nlate_ms = 80.0\n")
    assert main(["calibrate", "imu", str(a), str(b), "-o", str(cfg), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    # 300 samples of 0.03 m/s^2 noise each: the means carry about 0.002 m/s^2
    assert np.max(np.abs(np.array(rep["bias_mps2"]) - BIAS)) < 0.01
    assert abs(rep["tilt_deg"] - 2.0) < 0.1
    loop = load_config(cfg).loop
    assert loop.late_ms == 80.0  # the file's other values are kept
    assert np.max(np.abs(np.array([loop.accel_bias_x, loop.accel_bias_y, loop.accel_bias_z]) - BIAS)) < 0.01


def test_one_line_errors(tmp_path, capsys):
    a = _rest_csv(tmp_path / "a.csv", 0.0, seed=1)
    cases = [
        (_rest_csv(tmp_path / "moved.csv", 180.0, push=0.8), "not at rest"),
        (_rest_csv(tmp_path / "short.csv", 180.0, n=20), "need at least 50"),
        # a different slope shows only in the vertical part (g (cos t1 - cos t2)): 2 vs 14 deg is 0.29 m/s^2
        (_rest_csv(tmp_path / "other.csv", 180.0, tilt_deg=14.0), "same spot"),
        (tmp_path / "missing.csv", "no such file"),
    ]
    bad = tmp_path / "garbled.csv"
    bad.write_text("t,fx,fy,fz\n0.0,1,2,3\n0.01,abc,2,3\n0.02,1,2,3\n")
    cases.append((bad, "'abc' is not a number"))
    for path, why in cases:
        assert main(["calibrate", "imu", str(a), str(path)]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and why in err and path.name in err, err
    assert main(["calibrate", "imu", str(a), str(a), "--g", "1.0"]) == 2
    assert "--g" in capsys.readouterr().err


@pytest.mark.parametrize("yaw", [0.0, 77.0, -135.0])
def test_any_heading_and_a_run_folder(tmp_path, capsys, yaw):
    ra, rb = tmp_path / "ra", tmp_path / "rb"
    ra.mkdir()
    rb.mkdir()
    _rest_csv(ra / "imu.csv", yaw, slope_dir_deg=-60.0, seed=3)
    _rest_csv(rb / "imu.csv", yaw + 180.0, slope_dir_deg=-60.0, seed=4)
    assert main(["calibrate", "imu", str(ra), str(rb), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert np.max(np.abs(np.array(rep["bias_mps2"]) - BIAS)) < 0.01


def test_a_recording_named_like_another_run_file_is_read_by_its_columns(tmp_path, capsys):
    # gnss.csv in a run folder has latitude checks; a recording of accelerometer rows must not get them
    a = _rest_csv(tmp_path / "gnss.csv", 10.0, seed=1)
    b = _rest_csv(tmp_path / "truth.csv", 190.0, seed=2)
    assert main(["calibrate", "imu", str(a), str(b), "--json"]) == 0
    assert np.max(np.abs(np.array(json.loads(capsys.readouterr().out)["bias_mps2"]) - BIAS)) < 0.01
