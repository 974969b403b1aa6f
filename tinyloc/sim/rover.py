"""The simulated rover's drive: a route along the site's sidewalks, a speed profile with stops, and its attitude.

The route is a random walk over the street grid (straight on, left or right at
each crossing), driven on the right-hand sidewalk's centre line; left turns
cross the streets. Corners are rounded with circular arcs. The speed profile
respects an acceleration limit, a lateral-acceleration limit in turns, and
stops for a few seconds at some crossings.

Attitude: roll and pitch come from the body's reaction to acceleration
(pitch up when accelerating, roll outwards in turns), from a gentle slope
field over the site and from small bumps along the way. The renderer draws the
ground as a plane, so slope shows up as a tilt of the rover relative to a
level ground plane (what a gravity-levelling localizer sees on a locally flat
patch); it does not bend the ground.

All angles in radians (yaw CCW from east, roll/pitch as in :mod:`tinyloc.frames`), times in seconds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .world import World


@dataclass(frozen=True)
class DriveParams:
    """Speed, turn and attitude parameters of the drive (SI units)."""

    speed_mps: float = 1.3          # cruise speed
    speed_jitter: float = 0.15      # +- fraction drawn per run
    accel_mps2: float = 0.5
    decel_mps2: float = 0.7
    lat_accel_mps2: float = 0.35    # limit in turns
    corner_radius_m: float = 2.5
    stop_prob: float = 0.35         # chance of a stop at each crossing
    stop_s: tuple = (2.0, 5.0)      # stop duration range
    pitch_per_accel: float = 0.02   # rad per m/s^2 (nose up when accelerating)
    roll_per_accel: float = 0.025   # rad per m/s^2 (outwards in turns)
    slope_max_rad: float = 0.025    # site slope field amplitude (about 1.4 deg)
    bump_rad: float = 0.006         # small bumps along the way (rad, 1-sigma)
    rate_hz: float = 100.0          # trajectory sample rate
    straight_prob: float = 0.5


@dataclass
class Trajectory:
    """The true drive sampled at ``rate_hz``: arrays of equal length (SI units, ENU world frame)."""

    t: np.ndarray
    x: np.ndarray
    y: np.ndarray
    yaw: np.ndarray
    roll: np.ndarray
    pitch: np.ndarray
    speed: np.ndarray
    a_long: np.ndarray
    a_lat: np.ndarray
    yaw_rate: np.ndarray
    s: np.ndarray  # distance travelled (m)

    def at(self, t_s) -> dict:
        """Linear interpolation of every field at times ``t_s`` (yaw unwrapped before interpolating)."""
        t_s = np.asarray(t_s, float)
        out = {}
        for k in ("x", "y", "roll", "pitch", "speed", "a_long", "a_lat", "yaw_rate", "s"):
            out[k] = np.interp(t_s, self.t, getattr(self, k))
        yaw = np.interp(t_s, self.t, np.unwrap(self.yaw))
        out["yaw"] = np.arctan2(np.sin(yaw), np.cos(yaw))
        return out


def _grid_to_enu(meta):
    th = float(meta["grid_yaw_rad"])
    c, s = math.cos(th), math.sin(th)
    return th, (lambda p: np.stack([c * p[..., 0] - s * p[..., 1], s * p[..., 0] + c * p[..., 1]], axis=-1))


def plan_route(world: World, rng: np.random.Generator, length_m: float, params: DriveParams = DriveParams()):
    """A route of at least ``length_m`` metres as a polyline (K, 2) in ENU, corners not yet rounded.

    Raises InputError if the world has no street graph (not made by ``tinyloc sim site``).
    """
    st = world.meta.get("streets")
    if not st:
        raise InputError("world has no street graph (meta.streets); make the site with 'tinyloc sim site'")
    xs, ys = np.array(st["xs"]), np.array(st["ys"])
    sx, sy = st["sx"], st["sy"]
    nx, ny = len(xs), len(ys)
    _, to_enu = _grid_to_enu(world.meta)

    def off(street):
        return street["road"] / 2 + street["verge"] + street["walk"] / 2

    i, j = int(rng.integers(0, nx)), int(rng.integers(0, ny))
    dirs = [(1, 0), (0, 1), (-1, 0), (0, -1)]
    d = dirs[int(rng.integers(0, 4))]
    nodes = [(i, j)]
    total = 0.0
    guard = 0
    while total < length_m + 30.0 and guard < 10000:
        guard += 1
        left = (-d[1], d[0])
        right = (d[1], -d[0])
        r = rng.random()
        if r < params.straight_prob:
            prefs = [d, left, right]
        elif r < params.straight_prob + (1 - params.straight_prob) / 2:
            prefs = [left, d, right]
        else:
            prefs = [right, d, left]
        prefs.append((-d[0], -d[1]))  # a dead end: turn back
        for nd in prefs:
            ni, nj = i + nd[0], j + nd[1]
            if 0 <= ni < nx and 0 <= nj < ny:
                break
        total += abs(xs[ni] - xs[i]) + abs(ys[nj] - ys[j])
        i, j, d = ni, nj, nd
        nodes.append((i, j))
    pts = np.array([[xs[a], ys[b]] for a, b in nodes], float)
    # offset each edge to its right-hand sidewalk, corners where consecutive offset lines meet
    segs = []
    for k in range(len(pts) - 1):
        a, b = pts[k], pts[k + 1]
        dv = (b - a) / np.linalg.norm(b - a)
        street = sx[nodes[k][0]] if abs(dv[1]) > 0.5 else sy[nodes[k][1]]
        n = np.array([dv[1], -dv[0]]) * off(street)
        segs.append((a + n, b + n, dv))
    # start a few metres into the first edge, on the sidewalk rather than in the crossing
    poly = [segs[0][0] + segs[0][2] * min(10.0, 0.3 * float(np.linalg.norm(segs[0][1] - segs[0][0])))]
    for k in range(len(segs) - 1):
        (a0, b0, d0), (a1, b1, d1) = segs[k], segs[k + 1]
        cr = d0[0] * d1[1] - d0[1] * d1[0]
        if abs(cr) < 1e-9:
            if np.dot(d0, d1) > 0:
                poly.append(b0)  # straight on
            else:  # U-turn at a dead end: cross over
                poly.extend([b0 + d0 * 3.0, a1 - d1 * 3.0])
            continue
        # intersection of a0 + u d0 and a1 + w d1
        u = ((a1[0] - a0[0]) * d1[1] - (a1[1] - a0[1]) * d1[0]) / cr
        poly.append(a0 + u * d0)
    poly.append(segs[-1][1])
    return to_enu(np.array(poly))


def _fillet(poly: np.ndarray, radius: float, step: float):
    """Densify a polyline with circular arcs of ``radius`` at the corners; returns (M,2) points."""
    out = [poly[0]]
    for k in range(1, len(poly) - 1):
        p0, p1, p2 = poly[k - 1], poly[k], poly[k + 1]
        d0 = (p1 - p0) / max(np.linalg.norm(p1 - p0), 1e-9)
        d1 = (p2 - p1) / max(np.linalg.norm(p2 - p1), 1e-9)
        turn = math.atan2(d0[0] * d1[1] - d0[1] * d1[0], float(np.dot(d0, d1)))
        if abs(turn) < 1e-6:
            out.append(p1)
            continue
        room = 0.45 * min(np.linalg.norm(p1 - p0), np.linalg.norm(p2 - p1))
        r = min(radius, room / max(math.tan(abs(turn) / 2), 1e-6))
        tl = r * math.tan(abs(turn) / 2)
        a = p1 - d0 * tl
        sgn = 1.0 if turn > 0 else -1.0
        centre = a + sgn * r * np.array([-d0[1], d0[0]])
        n = max(2, int(abs(turn) * r / step))
        phi0 = math.atan2(a[1] - centre[1], a[0] - centre[0])
        for m in range(n + 1):
            ph = phi0 + sgn * abs(turn) * m / n
            out.append(centre + r * np.array([math.cos(ph), math.sin(ph)]))
    out.append(poly[-1])
    return np.array(out)


def _resample(pts: np.ndarray, ds: float):
    seg = np.hypot(*np.diff(pts, axis=0).T)
    keep = np.concatenate([[True], seg > 1e-9])
    pts = pts[keep]
    s = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(pts, axis=0).T))])
    sn = np.arange(0.0, s[-1], ds)
    return np.stack([np.interp(sn, s, pts[:, 0]), np.interp(sn, s, pts[:, 1])], axis=1), sn


def _smooth_noise(rng, n, corr_samples, sigma):
    """Gaussian noise low-pass filtered to a correlation length of ``corr_samples``, scaled to ``sigma``."""
    if n == 0:
        return np.zeros(0)
    w = rng.normal(0, 1, n + 4 * corr_samples)
    k = np.exp(-0.5 * (np.arange(-2 * corr_samples, 2 * corr_samples + 1) / max(corr_samples, 1)) ** 2)
    f = np.convolve(w, k / np.sqrt(np.sum(k * k)), mode="same")[2 * corr_samples: 2 * corr_samples + n]
    return f * sigma


def drive(world: World, rng: np.random.Generator, duration_s: float, params: DriveParams = DriveParams(),
          *, route: np.ndarray | None = None) -> Trajectory:
    """Drive the rover for at least ``duration_s`` seconds along a planned (or given) route.

    Parameters
    ----------
    world : World
        Supplies the street graph (and nothing else: the rover does not see obstacles).
    rng : numpy Generator
    duration_s : float
    params : DriveParams
    route : (K, 2) array, optional
        A polyline (ENU m) to follow instead of planning one (it is driven as given, corners rounded).
    """
    p = params
    v_cruise = p.speed_mps * (1.0 + rng.uniform(-p.speed_jitter, p.speed_jitter))
    length = duration_s * v_cruise * 1.1 + 20.0
    poly = plan_route(world, rng, length, p) if route is None else np.asarray(route, float)
    ds = 0.05
    dense = _fillet(poly, p.corner_radius_m, ds)
    xy, s = _resample(dense, ds)
    n = len(s)
    if n < 10:
        raise InputError("route is too short to drive")
    d = np.gradient(xy, axis=0)
    heading = np.unwrap(np.arctan2(d[:, 1], d[:, 0]))
    kappa = np.gradient(heading) / ds
    kappa = np.convolve(kappa, np.ones(9) / 9, mode="same")
    vmax = np.minimum(v_cruise, np.sqrt(p.lat_accel_mps2 / np.maximum(np.abs(kappa), 1e-6)))
    # stops: at some corners and some straight crossings (where the route passes a node)
    stops: set = set()
    corner_idx = np.nonzero(np.abs(kappa) > 0.05)[0]
    groups = np.split(corner_idx, np.nonzero(np.diff(corner_idx) > 5)[0] + 1) if len(corner_idx) else []
    for g in groups:
        if len(g) and rng.random() < p.stop_prob:
            stops.add(max(0, int(g[0]) - int(1.5 / ds)))
    for k in range(int(40 / ds), n, int(rng.uniform(50, 90) / ds)):
        if rng.random() < p.stop_prob * 0.5:
            stops.add(k)
    v = vmax.copy()
    v[0] = 0.0
    for k in stops:
        v[k] = 0.0
    for k in range(1, n):
        v[k] = min(v[k], math.sqrt(v[k - 1] ** 2 + 2 * p.accel_mps2 * ds))
    for k in range(n - 2, -1, -1):
        v[k] = min(v[k], math.sqrt(v[k + 1] ** 2 + 2 * p.decel_mps2 * ds))
    vm = 0.5 * (v[1:] + v[:-1])
    # exact time for a constant-acceleration step: ds / mean speed (mean speed > 0 except between two stops)
    dt = ds / np.maximum(vm, 1e-3)
    t_s = np.concatenate([[0.0], np.cumsum(dt)])
    # a stop at sample k: the rover stands at s[k] for the dwell time (a repeated sample, later in time)
    tt = list(t_s)
    shift = 0.0
    t_out, i_out = [0.0], [0]  # one second at rest before moving off
    for k in range(n):
        t_out.append(tt[k] + shift + 1.0)
        i_out.append(k)
        if k in stops and 0 < k < n - 1:
            shift += float(rng.uniform(*p.stop_s))
            t_out.append(tt[k] + shift + 1.0)
            i_out.append(k)
    i_out = np.array(i_out)
    t_s = np.array(t_out)
    s_xy = s
    s = s[i_out]
    if t_s[-1] < duration_s:
        raise InputError(f"route gives only {t_s[-1]:.0f} s of driving, {duration_s:.0f} s asked")
    # uniform time grid
    tg = np.arange(0.0, min(t_s[-1], duration_s + 1.0), 1.0 / p.rate_hz)
    # keep t_s strictly increasing for interpolation (dwell samples share a position)
    sg = np.interp(tg, t_s, s)
    x = np.interp(sg, s_xy, xy[:, 0])
    y = np.interp(sg, s_xy, xy[:, 1])
    yaw_u = np.interp(sg, s_xy, heading)
    speed = np.interp(tg, t_s, v[i_out])
    a_long = np.gradient(speed, tg)
    w = max(1, int(0.25 * p.rate_hz))
    a_long = np.convolve(np.pad(a_long, w, mode="edge"), np.ones(2 * w + 1) / (2 * w + 1), mode="valid")
    yaw_rate = np.gradient(yaw_u, tg)
    a_lat = speed * yaw_rate
    # attitude: reaction to acceleration + site slope + bumps (bumps scale with speed)
    m = len(tg)
    gx, gy = _slope_field(world, p.slope_max_rad, x, y)
    c, s_ = np.cos(yaw_u), np.sin(yaw_u)
    uphill_fwd = gx * c + gy * s_
    uphill_left = -gx * s_ + gy * c
    moving = np.clip(speed / max(v_cruise, 0.1), 0, 1)
    pitch = -p.pitch_per_accel * a_long - uphill_fwd + moving * _smooth_noise(rng, m, int(0.4 * p.rate_hz), p.bump_rad)
    roll = p.roll_per_accel * a_lat + uphill_left + moving * _smooth_noise(rng, m, int(0.3 * p.rate_hz), p.bump_rad)
    return Trajectory(tg, x, y, np.arctan2(np.sin(yaw_u), np.cos(yaw_u)), roll, pitch, speed, a_long, a_lat,
                      yaw_rate, sg)


def _slope_field(world: World, amp: float, x, y):
    """Gradient (dz/dx, dz/dy) of a smooth height field h = sum of two long sinusoids (site-seeded)."""
    seed = int(world.meta.get("seed", 0))
    r = np.random.default_rng([seed, 0x510])
    gx = np.zeros_like(x)
    gy = np.zeros_like(y)
    for _ in range(2):
        lam = r.uniform(120.0, 300.0)
        ang = r.uniform(0, 2 * math.pi)
        ph = r.uniform(0, 2 * math.pi)
        kx, ky = math.cos(ang) * 2 * math.pi / lam, math.sin(ang) * 2 * math.pi / lam
        # h = A sin(k.x + ph) with A k = amp/2 (two terms: slopes up to amp)
        g = 0.5 * amp * np.cos(kx * x + ky * y + ph)
        gx += g * math.cos(ang)
        gy += g * math.sin(ang)
    return gx, gy
