"""Intrinsics and mount calibration on synthetic checkerboard photos.

Reference: the photos are rendered with OpenCV's own camera model (``cv2.projectPoints``,
tests/_camera_helpers.py) from known intrinsics, distortion and poses, so the truth is
outside tinyloc's code. Tolerances are the issue's: fx, fy, cx, cy within 0.5 %,
RMS reprojection < 0.3 px; mount height within 2 cm, pitch within 0.3 deg.
"""

import math

import cv2
import numpy as np
import pytest

from _camera_helpers import look_at, render_board
from tinyloc.camera.calibrate import BoardSpec, calibrate_intrinsics, find_board, parse_board
from tinyloc.camera.model import CameraModel, Mount
from tinyloc.camera.mount_fit import fit_mount_from_board, fit_mount_from_rectangle, set_mount
from tinyloc.errors import CalibrationError

K = np.array([[520.0, 0.0, 322.0], [0.0, 515.0, 238.5], [0.0, 0.0, 1.0]])
DIST = np.array([-0.24, 0.07, 0.0012, -0.0007, 0.0])
SIZE = (640, 480)
BOARD = BoardSpec(9, 6, 0.03)


def _views(rng, n=12):
    centre = np.array([4 * 0.03, 2.5 * 0.03, 0.0])
    out = []
    for i in range(n):
        ang = 2 * math.pi * i / n
        tilt = math.radians(rng.uniform(15, 40))
        dist = rng.uniform(0.42, 0.6)
        cam = centre + dist * np.array([math.sin(tilt) * math.cos(ang), math.sin(tilt) * math.sin(ang),
                                        -math.cos(tilt)])
        target = centre + np.array([rng.uniform(-0.05, 0.05), rng.uniform(-0.04, 0.04), 0.0])
        rvec, tvec = look_at(cam, target, up=(math.cos(ang + 1.0), math.sin(ang + 1.0), 0.0))
        out.append(render_board(K, DIST, rvec, tvec, SIZE, cols=9, rows=6, square_m=0.03, noise=1.0, rng=rng))
    return out


@pytest.fixture(scope="module")
def photos():
    return _views(np.random.default_rng(7))


def test_parse_board():
    b = parse_board("9x6", 0.025)
    assert (b.cols, b.rows, b.square_m) == (9, 6, 0.025)
    with pytest.raises(CalibrationError, match="COLSxROWS"):
        parse_board("9by6", 0.025)
    with pytest.raises(CalibrationError, match="square size"):
        parse_board("9x6", -1.0)


def test_intrinsics_recovered(photos):
    res = calibrate_intrinsics(photos, BOARD)
    c = res.camera
    assert len(res.used) >= 10, [v.reason for v in res.rejected]
    for got, want in ((c.fx, K[0, 0]), (c.fy, K[1, 1]), (c.cx, K[0, 2]), (c.cy, K[1, 2])):
        assert abs(got - want) / want < 0.005, (got, want)
    assert res.rms_px < 0.3
    assert all(v.rms_px < 0.3 for v in res.used)
    assert abs(c.dist[0] - DIST[0]) < 0.03  # k1 is well determined by these views


def test_blurred_and_partial_boards_rejected(photos, rng):
    rvec, tvec = look_at((0.12, 0.075, -0.5), (0.12, 0.075, 0.0), up=(0.0, 1.0, 0.0))
    blurred = render_board(K, DIST, rvec, tvec, SIZE, cols=9, rows=6, square_m=0.03, blur_px=3.0)
    v = find_board(blurred, BOARD, name="blurred.png")
    assert not v.ok and ("blurred" in v.reason or "not found" in v.reason), v.reason
    # Shift the board half out of the frame: OpenCV may still find a board, we must say "partial".
    rvec2, tvec2 = look_at((0.12, 0.075, -0.33), (0.05, 0.075, 0.0), up=(0.0, 1.0, 0.0))
    tvec2 = tvec2 + np.array([0.2, 0.0, 0.0])
    part = render_board(K, DIST, rvec2, tvec2, SIZE, cols=9, rows=6, square_m=0.03)
    v2 = find_board(part, BOARD, name="part.png")
    assert not v2.ok and ("partial" in v2.reason), v2.reason
    res = calibrate_intrinsics(list(photos[6:]) + [blurred, part], BOARD,
                               names=[f"p{i}" for i in range(6)] + ["blurred.png", "part.png"])
    assert {v.name for v in res.rejected} == {"blurred.png", "part.png"}
    with pytest.raises(CalibrationError, match="usable board photos"):
        calibrate_intrinsics([blurred, part], BOARD)


def _ground_board_photo(cam: CameraModel, origin_base, square=0.08, cols=7, rows=5):
    # Board frame -> base frame: board x along base -y (to the right), board y along base +x; normal up.
    r_bb = np.array([[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    r_bc, t_bc = cam.mount.base_from_camera()
    r_cb = r_bc.T @ r_bb
    t_cb = r_bc.T @ (np.asarray(origin_base, float) - t_bc)
    rvec, _ = cv2.Rodrigues(r_cb)
    img = render_board(cam.K, cam.dist_array, rvec, t_cb, (cam.width, cam.height), cols=cols, rows=rows,
                       square_m=square)
    return img, rvec, t_cb


@pytest.mark.parametrize("height,pitch,roll", [(0.62, 14.0, 1.5), (1.1, 25.0, -2.0), (0.35, 8.0, 0.0)])
def test_mount_from_ground_board(height, pitch, roll):
    cam = CameraModel(640, 480, 520.0, 515.0, 322.0, 238.5, tuple(DIST), Mount(height, pitch, roll, 0.0, 0.1, 0.0))
    dist_ahead = height / math.tan(math.radians(pitch + 12.0))
    img, _, _ = _ground_board_photo(cam, (dist_ahead, 0.24, 0.0))
    start = cam.with_mount(height_m=0.8, pitch_deg=0.0, roll_deg=0.0)
    fit = fit_mount_from_board(start, img, BoardSpec(7, 5, 0.08))
    assert abs(fit.mount.height_m - height) < 0.02
    assert abs(fit.mount.pitch_deg - pitch) < 0.3
    assert abs(fit.mount.roll_deg - roll) < 0.3
    assert fit.rms_px < 0.3


def test_mount_from_rectangle_corners():
    # A 1.2 m x 2.0 m rectangle marked on the ground; corners projected with cv2.projectPoints.
    cam = CameraModel(640, 480, 520.0, 515.0, 322.0, 238.5, tuple(DIST), Mount(0.75, 18.0, -1.0))
    r_bc, t_bc = cam.mount.base_from_camera()
    base_pts = np.array([[1.5, 0.6, 0.0], [1.5, -0.6, 0.0], [3.5, -0.6, 0.0], [3.5, 0.6, 0.0]])
    uv, _ = cv2.projectPoints((base_pts - t_bc) @ r_bc, np.zeros(3), np.zeros(3), cam.K, cam.dist_array)
    fit = fit_mount_from_rectangle(cam.with_mount(height_m=1.0, pitch_deg=0.0), uv.reshape(-1, 2), 1.2, 2.0)
    assert abs(fit.mount.height_m - 0.75) < 0.005
    assert abs(fit.mount.pitch_deg - 18.0) < 0.05
    assert abs(fit.mount.roll_deg + 1.0) < 0.05
    with pytest.raises(CalibrationError, match="4 pixel corners"):
        fit_mount_from_rectangle(cam, uv.reshape(-1, 2)[:3], 1.2, 2.0)


def test_set_mount_by_hand():
    cam = set_mount(CameraModel(), height_m=0.5, pitch_deg=20.0, yaw_deg=None)
    assert (cam.mount.height_m, cam.mount.pitch_deg, cam.mount.yaw_deg) == (0.5, 20.0, 0.0)
    with pytest.raises(CalibrationError, match="mount height"):
        set_mount(cam, height_m=50.0)
