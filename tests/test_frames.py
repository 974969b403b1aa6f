"""Angle wrapping, yaw <-> compass heading, planar poses, gravity -> roll/pitch: hand-worked cases."""

import math

import numpy as np
import pytest

from tinyloc.frames import (FLU_FROM_OPTICAL, angle_diff, compose2, gravity_to_roll_pitch, heading_deg_to_yaw,
                            invert2, relative2, rpy_to_matrix, wrap_angle, yaw_to_heading_deg)

PI = math.pi


@pytest.mark.parametrize("a,expected", [(0.0, 0.0), (PI, PI), (-PI, PI), (3 * PI, PI), (-3 * PI, PI),
                                        (2 * PI, 0.0), (PI + 0.1, -PI + 0.1), (-PI - 0.1, PI - 0.1)])
def test_wrap_angle_interval(a, expected):
    assert wrap_angle(a) == pytest.approx(expected, abs=1e-12)
    assert wrap_angle(np.array([a]))[0] == pytest.approx(expected, abs=1e-12)


def test_wrap_angle_range_random(rng):
    a = rng.uniform(-100, 100, 10000)
    w = wrap_angle(a)
    assert np.all(w > -PI) and np.all(w <= PI)
    assert np.max(np.abs(np.sin(w) - np.sin(a))) < 1e-9 and np.max(np.abs(np.cos(w) - np.cos(a))) < 1e-9


@pytest.mark.parametrize("yaw_deg,heading", [(0, 90), (90, 0), (180, 270), (-90, 180), (45, 45), (135, 315)])
def test_yaw_heading_hand_worked(yaw_deg, heading):
    # East is yaw 0 / heading 90; north is yaw 90 / heading 0 (compass convention, common practice).
    assert yaw_to_heading_deg(math.radians(yaw_deg)) == pytest.approx(heading % 360, abs=1e-9)
    assert wrap_angle(heading_deg_to_yaw(heading) - math.radians(yaw_deg)) == pytest.approx(0, abs=1e-12)


def test_angle_diff_across_pi():
    assert angle_diff(math.radians(179), math.radians(-179)) == pytest.approx(math.radians(-2))
    assert angle_diff(math.radians(-179), math.radians(179)) == pytest.approx(math.radians(2))


def test_planar_pose_algebra(rng):
    for _ in range(50):
        a = (rng.uniform(-50, 50), rng.uniform(-50, 50), rng.uniform(-PI, PI))
        b = (rng.uniform(-50, 50), rng.uniform(-50, 50), rng.uniform(-PI, PI))
        ident = compose2(a, invert2(a))
        assert np.allclose(ident, (0, 0, 0), atol=1e-9)
        ab = compose2(a, b)
        assert np.allclose(relative2(a, ab), b, atol=1e-9)
    # Hand-worked: robot at (1, 2) facing north; a point 3 m ahead is at (1, 5).
    x, y, _ = compose2((1.0, 2.0, PI / 2), (3.0, 0.0, 0.0))
    assert (x, y) == pytest.approx((1.0, 5.0))


def test_optical_to_flu():
    # Optical z (forward) -> FLU x; optical x (right) -> FLU -y; optical y (down) -> FLU -z.
    assert np.allclose(FLU_FROM_OPTICAL @ [0, 0, 1], [1, 0, 0])
    assert np.allclose(FLU_FROM_OPTICAL @ [1, 0, 0], [0, -1, 0])
    assert np.allclose(FLU_FROM_OPTICAL @ [0, 1, 0], [0, 0, -1])


def test_positive_pitch_looks_down():
    fwd = rpy_to_matrix(0.0, math.radians(10), 0.0) @ [1, 0, 0]
    assert fwd[2] < 0 and fwd[2] == pytest.approx(-math.sin(math.radians(10)))


def test_gravity_roll_pitch_round_trip(rng):
    for _ in range(100):
        r, p = rng.uniform(-0.6, 0.6), rng.uniform(-0.6, 0.6)
        f = rpy_to_matrix(r, p, 0.0).T @ [0, 0, 9.80665]
        r2, p2 = gravity_to_roll_pitch(f)
        assert r2 == pytest.approx(r, abs=1e-12) and p2 == pytest.approx(p, abs=1e-12)
    # Level at rest reads +g on z (standard gravity 9.80665 m/s^2, CGPM 1901).
    assert gravity_to_roll_pitch([0, 0, 9.80665]) == (0.0, 0.0)
    assert all(math.isnan(v) for v in gravity_to_roll_pitch([math.nan, 0, 9.8]))
    assert all(math.isnan(v) for v in gravity_to_roll_pitch([0, 0, 0]))
