"""Class table, camera model (against OpenCV), TOML round trips, CLI error handling."""

import subprocess
import sys

import numpy as np
import pytest

from tinyloc.camera.model import CameraModel, Mount, load_camera, save_camera
from tinyloc.classes import CLASSES, MAP_CLASSES, NUM_MAP_CLASSES, class_index, palette_bgr
from tinyloc.errors import CalibrationError, InputError, MapFormatError, TinylocError

cv2 = pytest.importorskip("cv2")


def test_class_table_is_consistent():
    assert [c.index for c in CLASSES] == list(range(len(CLASSES)))
    assert all(c.kind in ("area", "line", "point") for c in MAP_CLASSES)
    assert len(MAP_CLASSES) == NUM_MAP_CLASSES
    assert all(c.kind == "image" for c in CLASSES[NUM_MAP_CLASSES:])
    assert class_index("building") == 0
    with pytest.raises(KeyError, match="known"):
        class_index("spaceship")
    pal = palette_bgr()
    assert pal.shape == (len(CLASSES), 3) and len({tuple(c) for c in pal}) == len(CLASSES)


def test_errors_subclass_builtins():
    assert issubclass(MapFormatError, ValueError) and issubclass(MapFormatError, TinylocError)
    assert issubclass(CalibrationError, InputError)


def _cv_pose(cam):
    r, t = cam.mount.base_from_camera()
    rvec, _ = cv2.Rodrigues(r.T)
    return rvec, -r.T @ t


def test_projection_matches_opencv(rng):
    # cv2.projectPoints is the reference implementation of the pinhole + distortion model.
    cam = CameraModel(fx=520.0, fy=515.0, cx=322.0, cy=241.0, dist=(-0.25, 0.08, 0.001, -0.0015, -0.01),
                      mount=Mount(height_m=0.9, pitch_deg=14.0, roll_deg=-1.5, yaw_deg=2.0, x_m=0.2, y_m=-0.05))
    pts = np.column_stack([rng.uniform(2, 30, 300), rng.uniform(-10, 10, 300), rng.uniform(0, 3, 300)])
    uv = cam.project_base(pts)
    rvec, tvec = _cv_pose(cam)
    ref, _ = cv2.projectPoints(pts, rvec, tvec, cam.K, cam.dist_array)
    assert np.max(np.abs(uv - ref.reshape(-1, 2))) < 1e-6


def test_rays_invert_projection(rng):
    cam = CameraModel(dist=(-0.2, 0.05, 0.001, -0.001, 0.0), mount=Mount(height_m=0.7, pitch_deg=12.0))
    ground = np.column_stack([rng.uniform(2, 25, 200), rng.uniform(-8, 8, 200), np.zeros(200)])
    uv = cam.project_base(ground)
    # Only points that land in the image: far outside it the polynomial model folds back and is not invertible.
    inside = (uv[:, 0] >= 0) & (uv[:, 0] < cam.width) & (uv[:, 1] >= 0) & (uv[:, 1] < cam.height)
    assert inside.sum() > 50
    ground, uv = ground[inside], uv[inside]
    o, d = cam.pixel_rays_base(uv)
    s = -o[2] / d[:, 2]
    hit = o + s[:, None] * d
    assert np.max(np.abs(hit - ground)) < 1e-6


def test_behind_camera_is_nan():
    cam = CameraModel()
    uv = cam.project_base([[-5.0, 0.0, 0.0], [5.0, 0.0, 0.0]])
    assert np.all(np.isnan(uv[0])) and np.all(np.isfinite(uv[1]))


def test_undistort_matches_opencv(rng):
    cam = CameraModel(dist=(-0.28, 0.09, 0.0008, -0.0012, -0.012))
    uv = np.column_stack([rng.uniform(0, 640, 200), rng.uniform(0, 480, 200)])
    ours = cam.undistort_pixels(uv)
    ref = cv2.undistortPoints(uv.reshape(-1, 1, 2), cam.K, cam.dist_array,
                              criteria=(cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 50, 1e-12)).reshape(-1, 2)
    assert np.max(np.abs(ours - ref)) < 1e-5


def test_camera_file_round_trip(tmp_path):
    cam = CameraModel(fx=611.5, dist=(-0.1, 0.02, 0.0, 0.0, 0.001), mount=Mount(height_m=0.55, pitch_deg=8.5))
    p = tmp_path / "camera.toml"
    save_camera(p, cam, rms_px=0.21)
    assert load_camera(p) == cam


@pytest.mark.parametrize("text,msg", [
    ("[camera\nwidth=1", "TOML syntax error"),
    ('format = "other"\n', "expected 'tinyloc-camera'"),
    ("version = 99\n[camera]\n", "newer"),
    ("[mount]\nheight_m=1\n", "missing \\[camera\\]"),
    ("[camera]\nwidth=640\nheight=480\nfx=500\nfy=500\ncx=320\n", "missing 'cy'"),
    ("[camera]\nwidth=640\nheight=480\nfx=-5\nfy=500\ncx=320\ncy=240\n", "positive"),
    ("[camera]\nwidth=640\nheight=480\nfx=5\nfy=500\ncx=320\ncy=240\n[mount]\nheight_m=40\n", "out of range"),
])
def test_camera_file_errors(tmp_path, text, msg):
    p = tmp_path / "bad.toml"
    p.write_text(text)
    with pytest.raises(CalibrationError, match=msg) as ei:
        load_camera(p)
    assert str(p) in str(ei.value)


def test_cli_help_and_one_line_errors(tmp_path):
    r = subprocess.run([sys.executable, "-m", "tinyloc", "--help"], capture_output=True, text=True)
    assert r.returncode == 0 and "COMMAND" in r.stdout
    r = subprocess.run([sys.executable, "-m", "tinyloc", "--version"], capture_output=True, text=True)
    assert r.returncode == 0 and r.stdout.startswith("tinyloc ")


def test_negative_coordinates_need_no_equals_sign():
    from tinyloc.cli.main import join_signed_values

    assert join_signed_values(["locate", "im.png", "--near", "-34.5,-166.9,60"]) == \
        ["locate", "im.png", "--near=-34.5,-166.9,60"]
    assert join_signed_values(["look", "--gravity", "-0.1,0.2,9.8"]) == ["look", "--gravity=-0.1,0.2,9.8"]
    # other options and positive values are left alone
    assert join_signed_values(["--near", "34.5,10", "-o", "x"]) == ["--near", "34.5,10", "-o", "x"]
    r = subprocess.run([sys.executable, "-m", "tinyloc", "map", "info", "nonexistent.tlm", "--at", "-34.5,-166.9"],
                       capture_output=True, text=True)
    assert r.returncode == 2 and "expected one argument" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1, r.stderr
