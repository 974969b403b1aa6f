"""Simulated rover and sensors: IMU against SciPy rotations, measured odometry drift and GNSS error statistics."""

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from tinyloc.classes import BUILDING
from tinyloc.frames import gravity_to_roll_pitch
from tinyloc.sim.rover import DriveParams, Trajectory, drive
from tinyloc.sim.sensors import (G0, GnssParams, ImuParams, OdometryParams, gnss_samples, imu_samples,
                                 odometry_samples, sky_blockage)
from tinyloc.sim.site import DEMO_PARAMS, generate_site
from tinyloc.sim.world import NB, NC, NM, NS, World


def _empty_world(boxes=None):
    return World((0.0, 0.0, 0.0), (-100, -100, 100, 100), np.zeros((0, NB)) if boxes is None else boxes,
                 np.zeros((0, NC)), np.zeros((0, NS)), np.zeros((0, NM)), [], {"seed": 1, "grid_yaw_rad": 0.0})


def _still(duration_s, x=0.0, y=0.0, roll=0.0, pitch=0.0, yaw=0.0, rate=10.0):
    t = np.arange(0.0, duration_s, 1.0 / rate)
    z = np.zeros_like(t)
    return Trajectory(t, z + x, z + y, z + yaw, z + roll, z + pitch, z, z, z, z, z)


@pytest.fixture(scope="module")
def demo_site():
    return generate_site(11, DEMO_PARAMS)


def test_imu_specific_force_matches_scipy_rotation():
    """f = R^T (0, 0, g) for a still, tilted rover; R from SciPy's intrinsic Z-Y-X Euler angles."""
    quiet = ImuParams(noise_std=0.0, bias_std=0.0, bias_walk=0.0, vibration_std=0.0)
    for roll, pitch, yaw in ((0.0, 0.0, 0.0), (0.05, -0.03, 1.0), (-0.1, 0.08, -2.5)):
        t, f = imu_samples(_still(1.0, roll=roll, pitch=pitch, yaw=yaw), np.random.default_rng(0), quiet)
        ref = Rotation.from_euler("ZYX", [yaw, pitch, roll]).inv().apply([0.0, 0.0, G0])
        assert np.abs(f - ref).max() < 1e-12
        r, p = gravity_to_roll_pitch(f[0])
        assert abs(r - roll) < 1e-12 and abs(p - pitch) < 1e-12
    # level and at rest: (0, 0, +g), the reaction to gravity
    _, f = imu_samples(_still(1.0), np.random.default_rng(0), quiet)
    assert np.abs(f - [0, 0, G0]).max() < 1e-12


def test_imu_noise_and_bias_statistics():
    p = ImuParams(bias_walk=0.0, vibration_std=0.0)
    biases = []
    for seed in range(40):
        _, f = imu_samples(_still(20.0), np.random.default_rng(seed), p)
        resid = f - [0, 0, G0]
        biases.append(resid.mean(axis=0))
        assert abs(np.std(resid - resid.mean(axis=0)) - p.noise_std) < 0.1 * p.noise_std
    b = np.array(biases).ravel()
    assert abs(b.std() - p.bias_std) < 0.3 * p.bias_std  # 120 draws: about +-13 % 2-sigma


def test_imu_sees_acceleration_on_a_drive(demo_site):
    tr = drive(demo_site.world, np.random.default_rng(4), 60.0)
    quiet = ImuParams(noise_std=0.0, bias_std=0.0, bias_walk=0.0, vibration_std=0.0)
    t, f = imu_samples(tr, np.random.default_rng(0), quiet)
    st = tr.at(t)
    # forward axis reads the along-track acceleration (plus gravity through the pitch)
    pred = st["a_long"] * np.cos(st["pitch"]) - G0 * np.sin(st["pitch"])  # FLU, pitch > 0 = nose down
    assert np.abs(f[:, 0] - pred).max() < 0.02
    assert np.abs(st["a_long"]).max() > 0.3  # the rover does accelerate and brake


def test_drive_profile(demo_site):
    p = DriveParams()
    tr = drive(demo_site.world, np.random.default_rng(2), 120.0, p)
    assert tr.t[-1] >= 120.0
    assert tr.speed.max() <= p.speed_mps * (1 + p.speed_jitter) + 1e-9
    assert np.abs(tr.a_long).max() <= max(p.accel_mps2, p.decel_mps2) + 0.05
    assert np.abs(np.degrees(tr.roll)).max() < 4.0 and np.abs(np.degrees(tr.pitch)).max() < 4.0
    assert np.mean(tr.speed < 0.05) > 0.005  # starts from rest (and usually stops)
    # the trajectory is consistent: integrated speed gives the travelled distance
    assert abs(np.trapezoid(tr.speed, tr.t) - (tr.s[-1] - tr.s[0])) < 0.01 * tr.s[-1] + 0.1
    tr2 = drive(demo_site.world, np.random.default_rng(2), 120.0, p)
    assert np.array_equal(tr.x, tr2.x) and np.array_equal(tr.roll, tr2.roll)


def test_drive_stays_on_the_sidewalks(demo_site):
    """The route keeps the rover on sidewalk or crossings (road), never inside buildings."""
    from tinyloc.classes import PARKING, ROAD, SIDEWALK
    from tinyloc.sim.world import GROUND_CLASS, ground_raster

    g = ground_raster(demo_site.world, res_m=0.1)
    tr = drive(demo_site.world, np.random.default_rng(6), 150.0)
    c = ((tr.x - g.x_min) / g.res_m).astype(int)
    r = ((g.y_max - tr.y) / g.res_m).astype(int)
    cls = GROUND_CLASS[g.data[r, c]]
    assert np.mean(cls == SIDEWALK) > 0.75
    assert np.all(np.isin(cls, [SIDEWALK, ROAD, PARKING]))


@pytest.mark.parametrize("scale", [0.01, 0.03, -0.02])
def test_odometry_drift_equals_configured_scale_error(scale):
    """Straight 150 m: endpoint error / distance = the configured scale error (slip and drift off)."""
    n = 15000
    t = np.arange(n) * 0.01
    s = np.linspace(0, 150.0, n)
    z = np.zeros(n)
    tr = Trajectory(t, s, z, z, z, z, z + 1.0, z, z, z, s)
    p = OdometryParams(scale_error=scale, slip_std=0.0, yaw_scale_error=0.0, yaw_drift_deg_per_m=0.0,
                       yaw_walk_deg_per_sqrt_m=0.0)
    _, pose = odometry_samples(tr, np.random.default_rng(0), p)
    err = math.hypot(pose[-1, 0] - tr.at(t[-1] - 0.01 * (t[-1] % 0.02 > 0))["x"], pose[-1, 1])
    d = tr.at(np.arange(t[0], t[-1], 1 / p.rate_hz))["s"][-1]
    assert abs(pose[-1, 0] / d - 1.0 - scale) < 1e-9
    assert abs(err / d - abs(scale)) < 1e-3


def test_odometry_drift_on_a_real_drive(demo_site):
    """Default model on a 5-minute drive: measured distance ratio and heading drift match the config."""
    tr = drive(demo_site.world, np.random.default_rng(8), 300.0)
    p = OdometryParams()
    t, pose = odometry_samples(tr, np.random.default_rng(9), p)
    st = tr.at(t)
    d_true = st["s"][-1] - st["s"][0]
    d_odo = np.sum(np.hypot(*np.diff(pose[:, :2], axis=0).T))
    ratio = d_odo / d_true - 1.0
    # slip is zero-mean, correlated over ~1 s: its share of the ratio is about slip_std / sqrt(duration)
    assert abs(ratio - p.scale_error) < 0.004, ratio
    dyaw_true = np.unwrap(st["yaw"])
    drift = (np.unwrap(pose[:, 2]) - dyaw_true) - (pose[0, 2] - dyaw_true[0])
    turned = np.sum(np.abs(np.diff(dyaw_true)))
    expected = math.radians(p.yaw_drift_deg_per_m) * d_true
    # the rotation scale error adds up to yaw_scale_error x total turn; the heading random walk
    # adds yaw_walk_deg_per_sqrt_m x sqrt(distance) (1 sigma): allow 3 sigma of it
    walk = math.radians(p.yaw_walk_deg_per_sqrt_m) * math.sqrt(d_true)
    assert abs(drift[-1] - expected) <= p.yaw_scale_error * turned + 3 * walk
    # position drift as a share of distance lies in the 1-5 % band common practice quotes
    r_enu = np.array([st["x"] - st["x"][0], st["y"] - st["y"][0]])
    c, s = math.cos(st["yaw"][0]), math.sin(st["yaw"][0])
    truth_odom = np.array([c * r_enu[0] + s * r_enu[1], -s * r_enu[0] + c * r_enu[1]])
    end_err = math.hypot(pose[-1, 0] - pose[0, 0] - truth_odom[0, -1], pose[-1, 1] - pose[0, 1] - truth_odom[1, -1])
    assert 0.002 < end_err / d_true < 0.05, end_err / d_true


def test_gnss_open_sky_statistics():
    """Open sky, a long still log: mean ~ 0, per-axis std = sqrt(bias^2 + white^2), acc ~ 1 sigma."""
    p = GnssParams()
    tr = _still(20000.0, rate=1.0)
    g = gnss_samples(tr, _empty_world(), np.random.default_rng(5), p)
    sigma = math.sqrt(p.bias_sigma_m ** 2 + p.white_sigma_m ** 2)
    n_eff = len(g["t"]) / (2 * p.bias_tau_s)  # independent samples of a Gauss-Markov process
    for e in (g["err_x"], g["err_y"]):
        assert abs(e.mean()) < 3 * sigma / math.sqrt(n_eff)
        assert abs(e.std() - sigma) < 0.1 * sigma
    assert np.all(g["blocked"] == 0)
    assert abs(np.median(g["acc_m"]) - sigma) < 0.05 * sigma
    within = np.mean(np.abs(g["err_x"]) < g["acc_m"])
    assert abs(within - 0.683) < 0.05  # a 1-sigma figure holds ~68 % of a Gaussian's mass


def test_gnss_worse_and_jumpier_near_tall_buildings():
    """A street canyon: blocked sky, larger errors, more optimistic reports than in open sky."""
    boxes = np.zeros((2, NB))
    for k, y in enumerate((9.0, -9.0)):
        boxes[k, :7] = (0.0, y, 60.0, 4.0, 0.0, 0.0, 24.0)
        boxes[k, 7] = BUILDING
    world = _empty_world(boxes)
    assert sky_blockage(world, 0.0, 0.0) > 0.5 and sky_blockage(_empty_world(), 0.0, 0.0) == 0.0
    p = GnssParams()
    tr = _still(8000.0, rate=1.0)
    g_open = gnss_samples(tr, _empty_world(), np.random.default_rng(1), p)
    g_canyon = gnss_samples(tr, world, np.random.default_rng(1), p)
    e_open = np.hypot(g_open["err_x"], g_open["err_y"])
    e_can = np.hypot(g_canyon["err_x"], g_canyon["err_y"])
    assert np.sqrt(np.mean(e_can ** 2)) > 1.5 * np.sqrt(np.mean(e_open ** 2))
    assert np.median(g_canyon["acc_m"]) > np.median(g_open["acc_m"])
    # jumps: large step changes between consecutive fixes happen in the canyon, hardly in the open
    step_open = np.hypot(np.diff(g_open["err_x"]), np.diff(g_open["err_y"]))
    step_can = np.hypot(np.diff(g_canyon["err_x"]), np.diff(g_canyon["err_y"]))
    assert np.sum(step_can > 4.0) > 10 * max(1, np.sum(step_open > 4.0))
    # outages: epochs without a fix in the canyon, none in the open
    n = int(tr.t[-1] - tr.t[0])  # epochs at 1 Hz over the still log
    assert len(g_open["t"]) == n  # open sky: a fix at every epoch
    expect = n * p.outage_prob * g_canyon["blocked"][0]
    assert abs((n - len(g_canyon["t"])) - expect) < 4 * np.sqrt(expect)
    # optimistic reports: error beyond 3x the reported per-axis sigma
    opt_open = np.mean(np.abs(g_open["err_x"]) > 3 * g_open["acc_m"])
    opt_can = np.mean(np.abs(g_canyon["err_x"]) > 3 * g_canyon["acc_m"])
    assert opt_can > 5 * max(opt_open, 1e-3)


def test_sensors_are_deterministic(demo_site):
    tr = drive(demo_site.world, np.random.default_rng(3), 30.0)
    a = gnss_samples(tr, demo_site.world, np.random.default_rng(7))
    b = gnss_samples(tr, demo_site.world, np.random.default_rng(7))
    assert all(np.array_equal(a[k], b[k]) for k in a)
    c = gnss_samples(tr, demo_site.world, np.random.default_rng(8))
    assert not np.array_equal(a["x"], c["x"])
    p = replace(OdometryParams(), slip_std=0.0)
    assert np.array_equal(odometry_samples(tr, np.random.default_rng(1), p)[1],
                          odometry_samples(tr, np.random.default_rng(1), p)[1])
