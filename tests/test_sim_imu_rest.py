"""The simulator's IMU recordings at rest (``tinyloc.sim.runs.write_imu_rest``) carry the drive's own bias.

A simulated operator calibrates the accelerometer as docs/camera.md (step 3) says; the figures of the
accuracy benchmark's calibrated mode rely on the recordings' bias being the one the drive's IMU stream
used. Checked two ways: the stream's bias read back from :func:`imu_samples` on a level robot at rest
with the noise terms off, and the two-position calibration (``tinyloc calibrate imu``) on the files.
"""

import json

import numpy as np

from tinyloc.cli.main import main
from tinyloc.sim.runs import IMU_REST_FILES, _streams, write_imu_rest
from tinyloc.sim.rover import Trajectory
from tinyloc.sim.sensors import G0, ImuParams, imu_samples


def _still(n=50):
    z = np.zeros(n)
    return Trajectory(np.arange(n) * 0.01, z, z, z, z, z, z, z, z, z, z)


def test_rest_recordings_carry_the_drives_bias(tmp_path, capsys):
    for seed in (3, 11):
        quiet = ImuParams(noise_std=0.0, bias_walk=0.0, vibration_std=0.0)
        _, f = imu_samples(_still(), _streams(seed)[1], quiet)  # the drive's IMU stream, noise off
        bias = f[0] - np.array([0.0, 0.0, G0])
        assert np.max(np.abs(f - f[0])) < 1e-12 and np.max(np.abs(bias)) > 1e-3
        run = tmp_path / f"run{seed}"
        a, b = write_imu_rest(run, seed)
        assert [str(p.relative_to(run)) for p in (a, b)] == list(IMU_REST_FILES)
        assert main(["calibrate", "imu", str(a), str(b), "--json"]) == 0
        got = np.array(json.loads(capsys.readouterr().out)["bias_mps2"])
        # 500 samples of 0.03 m/s^2 white noise each, plus the slow walk: a few mm/s^2
        assert np.max(np.abs(got[:2] - bias[:2])) < 0.01 and abs(got[2] - bias[2]) < 0.02


def test_rest_recordings_are_reproducible(tmp_path):
    a1, _ = write_imu_rest(tmp_path / "x", 5)
    a2, _ = write_imu_rest(tmp_path / "y", 5)
    assert a1.read_text() == a2.read_text()
