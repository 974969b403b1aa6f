"""Gravity for levelling with the robot's own acceleration taken out (tinyloc.perception.gravity.GravityEstimator).

References:
- An accelerometer measures specific force: gravity's reaction plus the body's acceleration,
  ``f = R^T (a + g_up)`` (common practice; strapdown inertial navigation texts).
- Planar motion without side-slip: acceleration ``dv/dt`` along the heading and ``v * omega``
  across it; on a circle of radius r at speed v that is the centripetal ``v^2 / r`` towards the
  centre (a fact of mechanics, from memory).
- Attitudes are built with ``scipy.spatial.transform.Rotation`` (intrinsic Z-Y-X), independently of
  tinyloc.frames.
"""

from __future__ import annotations

import math
import tracemalloc

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from tinyloc.frames import gravity_to_roll_pitch
from tinyloc.perception.gravity import G0, GravityEstimator
from tinyloc.runtime.config import LoopParams
from tinyloc.runtime.loop import Frame, SensorState


def specific_force(roll, pitch, a_fwd, a_left):
    """What an ideal accelerometer reads (FLU base): R^T (a + g_up), R = level_from_base by scipy."""
    r = Rotation.from_euler("ZYX", [0.0, pitch, roll]).as_matrix()
    return r.T @ np.array([a_fwd, a_left, G0])


def feed(est, t_imu, f_imu, t_odo, odo):
    for t, f in zip(t_imu, f_imu):
        est.add_imu(float(t), *map(float, f))
    for t, p in zip(t_odo, odo):
        est.add_odometry(float(t), *map(float, p))


def circle(t, r_m, v_mps):
    """Odometry poses of a drive at signed speed v on a circle of radius r, centre on the robot's left."""
    th = (v_mps / r_m) * t  # angle of the robot around the centre
    return np.stack([r_m * np.sin(th), r_m * (1.0 - np.cos(th)), th], axis=1)


def tilt_deg(f):
    r, p = gravity_to_roll_pitch(f)
    return math.degrees(r), math.degrees(p)


@pytest.mark.parametrize("v", [2.0, -1.5])
def test_constant_turn_centripetal_is_taken_out(v):
    """Level robot on a 5 m circle at 2 m/s: the reading leans 4.7 deg outwards; compensated it is level."""
    r_m = 5.0
    t_imu = np.arange(0.0, 1.0, 0.01)
    t_odo = np.arange(0.0, 1.0 + 1e-9, 0.02)
    a_c = v * v / r_m  # 0.8 m/s^2 at 2 m/s: v^2 / r towards the centre (left), also when reversing
    f = np.tile(specific_force(0.0, 0.0, 0.0, a_c), (len(t_imu), 1))
    raw, comp = GravityEstimator(0.4, False), GravityEstimator(0.4, True)
    out = np.zeros(3)
    feed(raw, t_imu, f, t_odo, circle(t_odo, r_m, v))
    raw.estimate(out)
    roll_raw, _ = tilt_deg(out)
    assert abs(roll_raw - math.degrees(math.atan2(a_c, G0))) < 1e-9  # the uncorrected lean
    feed(comp, t_imu, f, t_odo, circle(t_odo, r_m, v))
    assert comp.estimate(out) and comp.status == "compensated"
    assert abs(comp.accel[1] - a_c) < 1e-3 and abs(comp.accel[0]) < 1e-3
    roll, pitch = tilt_deg(out)
    assert max(abs(roll), abs(pitch)) < 0.01
    assert abs(np.linalg.norm(out) - G0) < 2e-3


def test_constant_forward_acceleration_is_taken_out():
    """0.5 m/s^2 forward on a straight: the reading pitches 2.9 deg nose-up; compensated it is level."""
    a = 0.5
    t_imu = np.arange(1.0, 2.0, 0.01)
    t_odo = np.arange(0.0, 2.0 + 1e-9, 0.02)
    s = 0.5 * a * t_odo ** 2
    odo = np.stack([s, np.zeros_like(s), np.zeros_like(s)], axis=1)
    f = np.tile(specific_force(0.0, 0.0, a, 0.0), (len(t_imu), 1))
    out = np.zeros(3)
    est = GravityEstimator(0.4, False)
    feed(est, t_imu, f, t_odo, odo)
    est.estimate(out)
    assert abs(tilt_deg(out)[1] - math.degrees(math.asin(-a / math.hypot(a, G0)))) < 1e-9  # -2.92 deg
    est = GravityEstimator(0.4, True)
    feed(est, t_imu, f, t_odo, odo)
    est.estimate(out)
    assert est.status == "compensated"
    assert abs(est.accel[0] - a) < 1e-6
    assert max(abs(v) for v in tilt_deg(out)) < 1e-4


def test_tilted_turning_and_accelerating_recovers_the_attitude():
    """Roll 3 deg, pitch -2 deg, accelerating 0.4 m/s^2 through a 6 m turn: the tilt comes back to 0.01 deg."""
    roll, pitch = math.radians(3.0), math.radians(-2.0)
    r_m, a, v0 = 6.0, 0.4, 1.0
    t_odo = np.arange(0.0, 2.0 + 1e-9, 0.005)
    s = v0 * t_odo + 0.5 * a * t_odo ** 2
    th = s / r_m
    odo = np.stack([r_m * np.sin(th), r_m * (1.0 - np.cos(th)), th], axis=1)
    t_imu = np.arange(1.0, 2.0, 0.01)
    v = v0 + a * t_imu
    f = np.array([specific_force(roll, pitch, a, vk * vk / r_m) for vk in v])
    out = np.zeros(3)
    raw = GravityEstimator(0.4, False)
    feed(raw, t_imu, f, t_odo, odo)
    raw.estimate(out)
    assert abs(tilt_deg(out)[0] - 3.0) > 1.0  # uncorrected: more than a degree off
    est = GravityEstimator(0.4, True, speed_span_s=0.02)
    feed(est, t_imu, f, t_odo, odo)
    est.estimate(out)
    r_deg, p_deg = tilt_deg(out)
    # left: the speed span's lag (half of 0.02 s at 0.4 m/s^2 changes v^2/r by ~1e-3 m/s^2)
    assert abs(r_deg - 3.0) < 0.01 and abs(p_deg + 2.0) < 0.01


def test_window_zero_is_the_mean_since_the_last_estimate():
    rng = np.random.default_rng(3)
    est = GravityEstimator(0.0, False)
    out = np.zeros(3)
    t = 0.0
    for _ in range(5):
        rows = rng.normal([0.1, -0.2, 9.8], 0.3, (7, 3))
        for f in rows:
            t += 0.01
            est.add_imu(t, *f)
        assert est.estimate(out)
        assert np.max(np.abs(out - rows.mean(axis=0))) < 1e-12
    assert not est.estimate(out)  # nothing new: no estimate


def test_window_keeps_the_last_seconds_only():
    est = GravityEstimator(0.305, False)
    out = np.zeros(3)
    for k in range(100):  # 1 s at 100 Hz; x reads the sample's index
        est.add_imu(0.01 * (k + 1), float(k), 0.0, G0)
    est.estimate(out)
    # samples with t > 1.0 - 0.305: t = 0.70 .. 1.00, indices 69 .. 99
    assert abs(out[0] - np.mean(np.arange(69, 100))) < 1e-9


def test_odometry_jump_and_implausible_accelerations_are_not_used():
    t_imu = np.arange(0.0, 1.0, 0.01)
    f = np.tile(np.array([0.3, 0.0, G0]), (len(t_imu), 1))
    out = np.zeros(3)
    # a 10 m jump in the middle of the window: the history is forgotten, too little left to compensate
    t_odo = np.arange(0.0, 1.0 + 1e-9, 0.02)
    x = np.where(t_odo < 0.9, t_odo, t_odo + 10.0)
    est = GravityEstimator(0.4, True)
    feed(est, t_imu, f, t_odo, np.stack([x, 0 * x, 0 * x], axis=1))
    est.estimate(out)
    assert est.status.startswith("uncompensated")
    assert np.max(np.abs(out - f[0])) < 1e-12
    # wheel spin: speed from 0 to 4 m/s within 0.1 s is not believed
    s = np.where(t_odo < 0.8, 0.0, 4.0 * (t_odo - 0.8))
    est = GravityEstimator(0.4, True)
    feed(est, t_imu, f, t_odo, np.stack([s, 0 * s, 0 * s], axis=1))
    est.estimate(out)
    assert "not believed" in est.status
    assert np.max(np.abs(out - f[0])) < 1e-12
    # no odometry at all
    est = GravityEstimator(0.4, True)
    feed(est, t_imu, f, [], [])
    est.estimate(out)
    assert est.status.startswith("uncompensated") and np.max(np.abs(out - f[0])) < 1e-12


def test_sensor_digest_hands_the_perceiver_the_compensated_vector():
    """SensorState over five 5 Hz frames of the 5 m / 2 m/s circle, rows arriving per frame."""
    r_m, v = 5.0, 2.0
    f = specific_force(0.0, 0.0, 0.0, v * v / r_m)
    on = LoopParams(gravity_window_s=0.4, gravity_motion_comp=True)
    off = LoopParams(gravity_window_s=0.0, gravity_motion_comp=False)  # the mean since the previous frame
    res = {}
    for name, p in (("on", on), ("off", off)):
        ss = SensorState(None, None)
        for k in range(5):
            t1 = 0.2 * (k + 1)
            ti = np.arange(0.2 * k + 0.01, t1 + 1e-9, 0.01)
            to = np.arange(0.2 * k + 0.02, t1 + 1e-9, 0.02)
            imu = np.column_stack([ti, np.tile(f, (len(ti), 1))])
            odo = np.column_stack([to, circle(to, r_m, v)])
            _, g, _ = ss.take(Frame(k, t1, None, "", imu, odo, np.zeros((0, 5))), p)
        res[name] = tilt_deg(g)
        # the first two frames: the window plus the speed span reach back before the first odometry row
        assert ss.counters["gravity_uncompensated"] == (2 if name == "on" else 0)
    assert abs(res["off"][0] - math.degrees(math.atan2(0.8, G0))) < 1e-9
    assert max(abs(a) for a in res["on"]) < 0.01


def test_steady_state_keeps_no_memory():
    est = GravityEstimator(0.4, True)
    out = np.zeros(3)
    t = 0.0

    def frame():
        nonlocal t
        for _ in range(10):
            t += 0.02
            est.add_odometry(t, t, 0.0, 0.0)
            est.add_imu(t - 0.01, 0.0, 0.0, G0)
            est.add_imu(t, 0.0, 0.0, G0)
        est.estimate(out)

    for _ in range(300):  # fill both rings
        frame()
    tracemalloc.start()
    before = tracemalloc.get_traced_memory()[0]
    for _ in range(500):
        frame()
    grown = tracemalloc.get_traced_memory()[0] - before
    tracemalloc.stop()
    assert grown < 2048
    assert est.status == "compensated"


def test_two_position_bias_on_a_slope_against_the_simulated_accelerometer():
    """At rest on a 1.4 deg slope, 5 s at a heading and 5 s turned by 180 deg, with the simulator's
    accelerometer model (bias, bias walk, white noise): the two-position mean recovers the bias
    within 0.003 m/s^2 without the bias walk and 0.015 m/s^2 (0.09 deg of tilt) with it; a single
    reading would be off by g sin(slope) = 0.24."""
    from tinyloc.perception.gravity import accel_bias_two_position
    from tinyloc.sim.rover import Trajectory
    from tinyloc.sim.sensors import ImuParams, imu_samples

    t = np.arange(0.0, 10.0, 0.01)
    psi = np.where(t < 5.0, 0.7, 0.7 + math.pi)
    gx, gy = math.radians(1.0), math.radians(-1.0)  # ground gradient dz/dx, dz/dy: 1.4 deg of slope
    pitch = -(gx * np.cos(psi) + gy * np.sin(psi))  # as tinyloc.sim.rover: nose down going downhill
    roll = -gx * np.sin(psi) + gy * np.cos(psi)
    z = np.zeros_like(t)
    traj = Trajectory(t, z + 3.0, z - 2.0, psi, roll, pitch, z, z, z, z, z)
    from dataclasses import replace

    for p, tol in ((replace(ImuParams(), bias_walk=0.0), 0.003), (ImuParams(), 0.015)):
        # without the bias walk only white noise is left (0.03 / sqrt(400) per reading); with it the
        # bias itself wanders by about 0.002 sqrt(5) m/s^2 between the two readings
        ti, f = imu_samples(traj, np.random.default_rng(7), p)
        bias = np.random.default_rng(7).normal(0.0, p.bias_std, 3)  # the model draws its bias first
        a = f[(ti > 0.5) & (ti < 4.5)].mean(axis=0)
        b = f[(ti > 5.5) & (ti < 9.5)].mean(axis=0)
        est = accel_bias_two_position(a, b)
        assert np.max(np.abs(est - bias)) < tol
    # one position alone: the slope's share (g sin 1.4 deg = 0.24 m/s^2) is far larger than the bias
    assert math.hypot(a[0] - bias[0], a[1] - bias[1]) > 0.2
    # the estimator then levels the first position to the true slope
    ge = GravityEstimator(0.4, False, bias=est)
    out = np.zeros(3)
    for tk, fk in zip(ti[(ti > 0.5) & (ti < 4.5)], f[(ti > 0.5) & (ti < 4.5)]):
        ge.add_imu(tk, *fk)
    ge.estimate(out)
    r_deg, p_deg = tilt_deg(out)
    assert abs(r_deg - math.degrees(roll[100])) < 0.05 and abs(p_deg - math.degrees(pitch[100])) < 0.05


def _random_bev(seed):
    """A 40 x 30 grid (0.5 m cells, robot at row 20, column 3) of random evidence, all visible, and copies."""
    from tinyloc.perception.overhead import BevGrid

    rng = np.random.default_rng(seed)
    bev = BevGrid.empty(40, 30, res_m=0.5, origin_row=20.0, origin_col=3.0)
    bev.evidence[...] = rng.random(bev.evidence.shape)
    bev.free[...] = rng.random(bev.free.shape)
    bev.visible[...] = 1.0
    return bev, (bev.evidence.copy(), bev.free.copy())


def _cells():
    """Every cell (i, j) of that grid with its centre's distance from the robot, worked cell by cell (m)."""
    for i in range(40):
        for j in range(30):
            yield i, j, math.hypot(i + 0.5 - 20.0, j + 0.5 - 3.0) * 0.5


def test_tracking_range_cut_matches_a_per_cell_reference():
    """loop.search_full_range: the grid is cut at bev_range_m before the tracking match (per-cell loop as reference)."""
    from types import SimpleNamespace

    from tinyloc.runtime._adapters import CorrelatorAdapter

    bev, ref = _random_bev(5)
    holder = SimpleNamespace(track_range_m=6.0, _range_mask=None)
    CorrelatorAdapter._cut_range(holder, bev)
    for i, j, r in _cells():
        inside = r <= 6.0
        assert bev.visible[i, j] == (1.0 if inside else 0.0)
        assert np.array_equal(bev.evidence[:, i, j], ref[0][:, i, j] if inside else np.zeros(bev.evidence.shape[0]))
        assert bev.free[i, j] == (ref[1][i, j] if inside else 0.0)
    assert 0 < int(bev.visible.sum()) < 40 * 30


def test_building_taper_matches_a_per_cell_reference():
    """loop.building_taper_m: only the building evidence is weighed, by 1 / (1 + (r / r0)^4) (per-cell loop as reference)."""
    from types import SimpleNamespace

    from tinyloc.runtime._adapters import CorrelatorAdapter

    bev, ref = _random_bev(7)
    holder = SimpleNamespace(building_taper_m=4.0, _taper=None)
    CorrelatorAdapter._taper_buildings(holder, bev)
    for i, j, r in _cells():
        w = 1.0 / (1.0 + (r / 4.0) ** 4)
        assert abs(bev.evidence[0, i, j] - w * ref[0][0, i, j]) < 1e-6
    assert np.array_equal(bev.evidence[1:], ref[0][1:]) and np.array_equal(bev.free, ref[1])
    assert np.all(bev.visible == 1.0)
    # the cell centred 0.25 m across and 3.75 m along: 1 / (1 + (3.758 / 4)^4) = 0.562 (by hand)
    assert abs(holder._taper[20, 10] - 0.562) < 1e-3
