"""Sensor models of the simulated rover: accelerometer, wheel odometry and a consumer GNSS receiver.

Each model is a frozen parameter dataclass and a pure function of the true
:class:`~tinyloc.sim.rover.Trajectory` and a seeded generator.

- IMU (:func:`imu_samples`): specific force in the FLU base frame,
  ``f = R^T (a + g_up)`` with ``R`` = world_from_base; level and at rest it
  reads (0, 0, +g). Constant per-axis bias, a slow bias random walk, white
  noise and vibration that grows with speed.
- Wheel odometry (:func:`odometry_samples`): integrates the true distance
  and rotation of each step with a distance scale error, random slip, a
  rotation scale error and a heading drift per metre. Common practice: wheel
  odometry drifts by 1-5 % of the distance travelled.
- GNSS (:func:`gnss_samples`): a slowly wandering bias (first-order
  Gauss-Markov process per axis), white noise, and multipath near tall
  buildings: the share of the sky blocked above ``mask_deg`` scales an extra
  wandering error and the rate of jumps. The reported accuracy follows the
  open-sky figure and the blockage, but in multipath it is sometimes
  optimistic (the receiver does not know). Deep in a street canyon some epochs
  give no fix at all.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..classes import BUILDING
from ..frames import rpy_to_matrix
from .rover import Trajectory
from .world import B_CLS, B_CX, B_CY, B_HX, B_HY, B_YAW, B_Z1, World

G0 = 9.80665  # standard gravity, m/s^2 (CGPM 1901 conventional value)


@dataclass(frozen=True)
class ImuParams:
    """Accelerometer model (m/s^2, seconds)."""

    rate_hz: float = 100.0
    noise_std: float = 0.03        # white noise per sample
    bias_std: float = 0.04         # constant bias per axis, drawn per run
    bias_walk: float = 0.002       # bias random walk, m/s^2 per sqrt(s)
    vibration_std: float = 0.15    # extra noise at 1 m/s, scales with speed


@dataclass(frozen=True)
class OdometryParams:
    """Wheel-odometry model. ``scale_error`` is the distance error as a fraction of distance travelled."""

    rate_hz: float = 50.0
    scale_error: float = 0.02          # +2 %: wheels a little smaller than configured
    slip_std: float = 0.01             # relative distance noise, correlated over ~1 s
    yaw_scale_error: float = 0.01      # rotation scale error (track width error)
    yaw_drift_deg_per_m: float = 0.01  # heading drift per metre travelled
    yaw_walk_deg_per_sqrt_m: float = 0.1  # heading random walk (deg per sqrt(m) travelled)


@dataclass(frozen=True)
class GnssParams:
    """Consumer GNSS receiver model (metres, seconds, degrees)."""

    rate_hz: float = 1.0
    bias_sigma_m: float = 1.5          # stationary std of the wandering bias, per axis (east, north)
    bias_tau_s: float = 60.0           # its correlation time
    white_sigma_m: float = 0.4         # per-fix white noise, per axis
    height_factor: float = 1.8         # vertical errors are this much larger
    mask_deg: float = 25.0             # buildings above this elevation block the sky
    multipath_sigma_m: float = 4.0     # extra wandering error at a fully blocked sky, per axis
    jump_rate_per_s: float = 0.08      # jump rate at a fully blocked sky
    jump_sigma_m: float = 6.0          # size of a jump, per axis
    jump_s: tuple = (2.0, 8.0)         # how long a jump lasts
    optimistic_prob: float = 0.4       # in multipath: chance an epoch reports the open-sky accuracy
    outage_prob: float = 0.25          # chance of no fix at an epoch, at a fully blocked sky (scales with it)
    antenna_height_m: float = 0.9


def _gauss_markov(rng, n, dt, sigma, tau):
    """First-order Gauss-Markov sequence: stationary std ``sigma``, correlation time ``tau``."""
    a = math.exp(-dt / tau)
    q = sigma * math.sqrt(1.0 - a * a)
    out = np.empty(n)
    x = rng.normal(0.0, sigma)
    for k in range(n):
        out[k] = x
        x = a * x + rng.normal(0.0, q)
    return out


def imu_samples(traj: Trajectory, rng: np.random.Generator, p: ImuParams = ImuParams()):
    """(t, f (N,3)) accelerometer specific force in the FLU base frame (m/s^2)."""
    t = np.arange(traj.t[0], traj.t[-1], 1.0 / p.rate_hz)
    st = traj.at(t)
    n = len(t)
    bias = rng.normal(0.0, p.bias_std, 3)
    walk = np.cumsum(rng.normal(0.0, p.bias_walk * math.sqrt(1.0 / p.rate_hz), (n, 3)), axis=0)
    f = np.empty((n, 3))
    for k in range(n):
        r = rpy_to_matrix(st["roll"][k], st["pitch"][k], st["yaw"][k])
        c, s = math.cos(st["yaw"][k]), math.sin(st["yaw"][k])
        a_w = np.array([c * st["a_long"][k] - s * st["a_lat"][k], s * st["a_long"][k] + c * st["a_lat"][k], G0])
        f[k] = r.T @ a_w
    vib = rng.normal(0.0, 1.0, (n, 3)) * (p.vibration_std * np.abs(st["speed"]))[:, None]
    f += bias + walk + vib + rng.normal(0.0, p.noise_std, (n, 3))
    return t, f


def rest_imu_pair(bias, rng: np.random.Generator, p: ImuParams = ImuParams(), *, seconds: float = 5.0,
                  slope_max_deg: float = 3.0):
    """Two accelerometer recordings at rest on one spot, the robot turned in place by half a turn between them.

    What an operator records for ``tinyloc calibrate imu``: the robot stands on a slope (tilt up to
    ``slope_max_deg``, any direction, drawn from ``rng``) at a random heading, then at that heading + 180
    deg about the ground's normal. Each sample is gravity in the base frame plus the run's constant
    ``bias`` (the same one :func:`imu_samples` drew), its random walk and white noise; no vibration
    (the motors are still).

    Returns
    -------
    list of (t (N,), f (N, 3))
        The two recordings (s, m/s^2 FLU).
    """
    tilt = math.radians(float(rng.uniform(0.0, slope_max_deg)))
    sdir = float(rng.uniform(-math.pi, math.pi))
    yaw0 = float(rng.uniform(-math.pi, math.pi))
    n = max(1, int(round(seconds * p.rate_hz)))
    t = np.arange(n) / p.rate_hz
    normal = np.array([math.sin(tilt) * math.cos(sdir), math.sin(tilt) * math.sin(sdir), math.cos(tilt)])
    out = []
    for yaw in (yaw0, yaw0 + math.pi):
        # base frame: z along the ground's normal, x at heading yaw projected onto the slope
        h = np.array([math.cos(yaw), math.sin(yaw), 0.0])
        x = h - normal * (h @ normal)
        x /= np.linalg.norm(x)
        r = np.stack([x, np.cross(normal, x), normal], axis=1)  # base -> world
        walk = np.cumsum(rng.normal(0.0, p.bias_walk * math.sqrt(1.0 / p.rate_hz), (n, 3)), axis=0)
        f = (r.T @ np.array([0.0, 0.0, G0]))[None, :] + np.asarray(bias)[None, :] + walk \
            + rng.normal(0.0, p.noise_std, (n, 3))
        out.append((t, f))
    return out


def line_odometry_pair(rng: np.random.Generator, p: OdometryParams = OdometryParams(), *, length_m: float = 20.0,
                       speed_mps: float = 0.8, accel_mps2: float = 0.5):
    """Wheel odometry of two drives along one straight measured line, there and back.

    What an operator records for ``tinyloc calibrate wheel``: the robot starts at rest on one mark,
    drives straight to a second mark ``length_m`` away (measured with a tape), stops, and drives back.
    The speed ramps up and down at ``accel_mps2``; the odometry is :func:`odometry_samples` of that
    straight drive (the run's own scale error, slip and heading drift), with 1 s at rest before and after.

    Returns
    -------
    list of (t (N,), pose (N, 3))
        The two recordings (s; x, y m and yaw rad in each recording's own odom frame).
    """
    from .rover import Trajectory

    ramp_t = speed_mps / accel_mps2
    ramp_s = 0.5 * accel_mps2 * ramp_t ** 2
    cruise_t = max(0.0, (length_m - 2.0 * ramp_s) / speed_mps)
    drive_t = 2.0 * ramp_t + cruise_t
    t = np.arange(0.0, drive_t + 2.0, 0.01)
    tau = np.clip(t - 1.0, 0.0, drive_t)
    up = np.minimum(tau, ramp_t)
    down = np.clip(tau - ramp_t - cruise_t, 0.0, ramp_t)
    s = 0.5 * accel_mps2 * up ** 2 + speed_mps * np.clip(tau - ramp_t, 0.0, cruise_t) \
        + speed_mps * down - 0.5 * accel_mps2 * down ** 2
    s *= length_m / float(s[-1])
    z = np.zeros_like(t)
    traj = Trajectory(t, s.copy(), z, z, z, z, np.gradient(s, t), z, z, z, s)
    return [odometry_samples(traj, rng, p) for _ in range(2)]


def odometry_samples(traj: Trajectory, rng: np.random.Generator, p: OdometryParams = OdometryParams()):
    """(t, pose (N,3)) wheel-odometry pose (x, y, yaw) in its own frame, starting at (0, 0, 0)."""
    t = np.arange(traj.t[0], traj.t[-1], 1.0 / p.rate_hz)
    st = traj.at(t)
    ds = np.diff(st["s"], prepend=st["s"][0])
    yaw_true = np.unwrap(st["yaw"])
    dyaw = np.diff(yaw_true, prepend=yaw_true[0])
    n = len(t)
    corr = max(1, int(p.rate_hz))
    slip = np.convolve(rng.normal(0, 1, n + corr), np.ones(corr) / math.sqrt(corr), mode="same")[:n] * p.slip_std
    ds_o = ds * (1.0 + p.scale_error) * (1.0 + slip)
    dyaw_o = dyaw * (1.0 + p.yaw_scale_error) + math.radians(p.yaw_drift_deg_per_m) * ds \
        + rng.normal(0, 1.0, n) * math.radians(p.yaw_walk_deg_per_sqrt_m) * np.sqrt(np.abs(ds))
    yaw_o = np.cumsum(dyaw_o)
    # midpoint heading over each step
    yaw_mid = yaw_o - 0.5 * dyaw_o
    x = np.cumsum(ds_o * np.cos(yaw_mid))
    y = np.cumsum(ds_o * np.sin(yaw_mid))
    return t, np.stack([x, y, np.arctan2(np.sin(yaw_o), np.cos(yaw_o))], axis=1)


def sky_blockage(world: World, x: float, y: float, *, mask_deg: float = 25.0, antenna_h: float = 0.9,
                 n_az: int = 36, max_range_m: float = 80.0) -> float:
    """Fraction of azimuths (0..1) where a building rises above ``mask_deg`` seen from (x, y)."""
    b = world.boxes[world.boxes[:, B_CLS] == BUILDING] if len(world.boxes) else world.boxes
    if len(b) == 0:
        return 0.0
    d = np.hypot(b[:, B_CX] - x, b[:, B_CY] - y)
    b = b[d - np.hypot(b[:, B_HX], b[:, B_HY]) < max_range_m]
    if len(b) == 0:
        return 0.0
    az = np.arange(n_az) * (2 * math.pi / n_az)
    dx, dy = np.cos(az)[:, None], np.sin(az)[:, None]
    c, s = np.cos(b[:, B_YAW])[None], np.sin(b[:, B_YAW])[None]
    px, py = x - b[:, B_CX][None], y - b[:, B_CY][None]
    lx, ly = c * px + s * py, -s * px + c * py
    ldx, ldy = c * dx + s * dy, -s * dx + c * dy
    with np.errstate(divide="ignore", invalid="ignore"):
        t1 = (-b[:, B_HX][None] - lx) / ldx
        t2 = (b[:, B_HX][None] - lx) / ldx
        t3 = (-b[:, B_HY][None] - ly) / ldy
        t4 = (b[:, B_HY][None] - ly) / ldy
    tmin = np.maximum(np.minimum(t1, t2), np.minimum(t3, t4))
    tmax = np.minimum(np.maximum(t1, t2), np.maximum(t3, t4))
    hit = (tmax >= np.maximum(tmin, 0.0)) & np.isfinite(tmin)
    dist = np.where(hit, np.maximum(tmin, 0.1), np.inf)
    elev = np.degrees(np.arctan2(b[:, B_Z1][None] - antenna_h, dist))
    blocked = np.any(hit & (elev > mask_deg), axis=1)
    return float(np.mean(blocked))


def gnss_samples(traj: Trajectory, world: World, rng: np.random.Generator, p: GnssParams = GnssParams()):
    """GNSS fixes at ``rate_hz``.

    Returns
    -------
    dict with arrays ``t``, ``x``, ``y`` (ENU fix, m), ``h`` (height above the origin's, m),
    ``acc_m`` (reported per-axis 1-sigma horizontal accuracy), ``err_x``, ``err_y`` (true errors), ``blocked``
    (sky blockage 0..1 at each fix); epochs without a fix are left out.
    """
    dt = 1.0 / p.rate_hz
    t = np.arange(math.ceil(traj.t[0]), traj.t[-1], dt)
    st = traj.at(t)
    n = len(t)
    blocked = np.array([sky_blockage(world, st["x"][k], st["y"][k], mask_deg=p.mask_deg,
                                     antenna_h=p.antenna_height_m) for k in range(n)])
    bx = _gauss_markov(rng, n, dt, p.bias_sigma_m, p.bias_tau_s)
    by = _gauss_markov(rng, n, dt, p.bias_sigma_m, p.bias_tau_s)
    bz = _gauss_markov(rng, n, dt, p.bias_sigma_m * p.height_factor, p.bias_tau_s)
    mx = _gauss_markov(rng, n, dt, 1.0, 20.0)
    my = _gauss_markov(rng, n, dt, 1.0, 20.0)
    wx, wy = rng.normal(0, p.white_sigma_m, n), rng.normal(0, p.white_sigma_m, n)
    wz = rng.normal(0, p.white_sigma_m * p.height_factor, n)
    jx, jy = np.zeros(n), np.zeros(n)
    k = 0
    while k < n:
        if rng.random() < p.jump_rate_per_s * blocked[k] * dt:
            length = int(rng.uniform(*p.jump_s) / dt)
            jx[k:k + length] += rng.normal(0, p.jump_sigma_m)
            jy[k:k + length] += rng.normal(0, p.jump_sigma_m)
            k += length
        k += 1
    mp = p.multipath_sigma_m * blocked
    ex = bx + wx + mp * mx + jx
    ey = by + wy + mp * my + jy
    open_sky = math.sqrt(p.bias_sigma_m ** 2 + p.white_sigma_m ** 2)
    honest = np.sqrt(open_sky ** 2 + mp ** 2)
    optimistic = (blocked > 0) & (rng.random(n) < p.optimistic_prob)
    acc = np.where(optimistic, open_sky, honest) * np.exp(rng.normal(0, 0.1, n))
    fix = rng.random(n) >= p.outage_prob * blocked  # epochs without a fix write no row
    out = {"t": t, "x": st["x"] + ex, "y": st["y"] + ey, "h": bz + wz, "acc_m": acc,
           "err_x": ex, "err_y": ey, "blocked": blocked}
    return {k: v[fix] for k, v in out.items()}
