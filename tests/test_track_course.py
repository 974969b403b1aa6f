"""The heading check from the satellite track against the odometry track (tinyloc/track/course.py).

Reference: the best proper rotation between two point sets (the Kabsch / Wahba problem), from
``scipy.spatial.transform.Rotation.align_vectors`` on the points lifted to z = 0 with the vertical held (a general-purpose
reference library; ``scipy.linalg.orthogonal_procrustes`` would also allow reflections).
"""

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from tinyloc.frames import wrap_angle
from tinyloc.track.course import CourseCheck


def _drive(rng, theta, *, n=60, step=0.5, turn=0.01, gnss_sigma=0.5, bias=(3.0, -2.0)):
    """Dead-reckon a gently curving drive; fixes are the same path rotated by theta, biased and noisy."""
    cc = CourseCheck(span_m=15.0, sigma_floor_deg=1.0)
    o, g = [], []
    c, s = math.cos(theta), math.sin(theta)
    for _ in range(n):
        cc.odometry(step, 0.0, turn)
        x, y = cc.ox, cc.oy
        gx = c * x - s * y + 100.0 + bias[0] + rng.normal(0, gnss_sigma)
        gy = s * x + c * y - 50.0 + bias[1] + rng.normal(0, gnss_sigma)
        cc.fix(gx, gy)
        o.append((x, y))
        g.append((gx, gy))
    return cc, np.array(o), np.array(g)


@pytest.mark.parametrize("theta", [0.0, 0.7, math.pi / 2, -2.5, math.pi])
def test_heading_matches_scipy_rotation_fit(theta):
    rng = np.random.default_rng(3)
    cc, o, g = _drive(rng, theta)
    got = cc.heading()
    assert got is not None
    yaw, sigma = got
    # the same points the check uses: the newest ones covering 15 m of odometry path (0.5 m steps)
    m = 31
    oc = o[-m:] - o[-m:].mean(axis=0)
    gc = g[-m:] - g[-m:].mean(axis=0)
    # lifted to z = 0, plus the vertical in both sets so that a flip of the plane is not a solution
    lift = lambda p: np.vstack([np.hstack([p, np.zeros((m, 1))]), [[0.0, 0.0, 1.0]]])  # noqa: E731
    w = np.r_[np.ones(m), 1e3]
    rot, _ = Rotation.align_vectors(lift(gc), lift(oc), weights=w)  # gc ~ rot(oc)
    th_ref = rot.as_euler("zyx")[0]
    assert abs(wrap_angle(yaw - (cc.oyaw + th_ref))) < 1e-9
    assert abs(wrap_angle(yaw - (cc.oyaw + theta))) < 3 * sigma
    # deliberately conservative (the fixes' errors are correlated in time): about 20 deg on this 15 m drive
    assert math.radians(1.0) <= sigma < math.radians(30.0)


def test_short_or_reset_track_says_nothing():
    rng = np.random.default_rng(4)
    cc, _, _ = _drive(rng, 0.3, n=20)  # 10 m < 15 m
    assert cc.heading() is None
    cc, _, _ = _drive(rng, 0.3)
    assert cc.heading() is not None
    cc.reset()
    assert cc.heading() is None


def test_noisier_fixes_give_a_wider_sigma():
    s = []
    for gs in (0.2, 3.0):
        cc, _, _ = _drive(np.random.default_rng(5), 1.0, gnss_sigma=gs)
        s.append(cc.heading()[1])
    assert s[1] > s[0]


def test_residual_and_ring_wrap_match_a_plain_fit():
    # a ring that has wrapped (capacity 40, 120 fixes): the residual from the closed form
    # |o|^2 + |g|^2 - 2 |(dot, cross)| equals the explicit one, sum |R o - g|^2 (plain NumPy)
    rng = np.random.default_rng(6)
    cc = CourseCheck(span_m=15.0, sigma_floor_deg=0.01, capacity=40)
    o, g = [], []
    for _ in range(120):
        cc.odometry(0.5, 0.0, 0.02)
        gx, gy = -cc.oy + rng.normal(0, 1.0), cc.ox + rng.normal(0, 1.0)
        cc.fix(gx, gy)
        o.append((cc.ox, cc.oy))
        g.append((gx, gy))
    yaw, sigma = cc.heading()
    m = 31
    oc = np.array(o[-m:]) - np.mean(o[-m:], axis=0)
    gc = np.array(g[-m:]) - np.mean(g[-m:], axis=0)
    th = math.atan2(np.sum(oc[:, 0] * gc[:, 1] - oc[:, 1] * gc[:, 0]), np.sum(oc[:, 0] * gc[:, 0] + oc[:, 1] * gc[:, 1]))
    c, s = math.cos(th), math.sin(th)
    r = np.stack([c * oc[:, 0] - s * oc[:, 1] - gc[:, 0], s * oc[:, 0] + c * oc[:, 1] - gc[:, 1]], 1)
    resid = math.sqrt(np.mean(np.sum(r * r, axis=1)))
    spread = math.sqrt(np.mean(np.sum(oc * oc, axis=1)))
    assert abs(wrap_angle(yaw - (cc.oyaw + th))) < 1e-9
    assert abs(sigma - math.atan2(1.5 * resid + 0.5, spread)) < 1e-9


def test_heading_check_does_not_allocate_per_call():
    import tracemalloc

    cc, _, _ = _drive(np.random.default_rng(7), 0.4)
    cc.heading()
    tracemalloc.start()
    for _ in range(200):
        cc.heading()
    cur, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert cur < 2048 and peak < 4096  # bytes: array views only, no per-call copies of the ring
