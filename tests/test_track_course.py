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
