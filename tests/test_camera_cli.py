"""``tinyloc calibrate`` end to end on OpenCV-rendered checkerboard photos (see test_camera_calibrate.py)."""

import json
import math

import cv2
import numpy as np
import pytest

from test_camera_calibrate import DIST, K, _ground_board_photo, _views
from tinyloc.camera.model import CameraModel, Mount, load_camera
from tinyloc.cli.main import main


@pytest.fixture(scope="module")
def shots(tmp_path_factory):
    d = tmp_path_factory.mktemp("shots")
    paths = []
    for i, img in enumerate(_views(np.random.default_rng(11), n=10)):
        p = d / f"shot{i:02d}.png"
        cv2.imwrite(str(p), img)
        paths.append(str(p))
    (d / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\nnot really")
    return d, paths


def test_calibrate_intrinsics_cli(shots, tmp_path, capsys):
    d, paths = shots
    out = tmp_path / "camera.toml"
    rc = main(["calibrate", "intrinsics", *paths, str(d / "broken.png"), "--board", "9x6", "--square", "0.03",
               "-o", str(out), "--json", "-q"])
    assert rc == 0
    rep = json.loads(capsys.readouterr().out)
    cam = load_camera(out)
    assert abs(cam.fx - K[0, 0]) / K[0, 0] < 0.005 and abs(cam.cy - K[1, 2]) / K[1, 2] < 0.005
    assert rep["rms_px"] < 0.3
    assert any(r["image"].endswith("broken.png") and "not a readable image" in r["reason"] for r in rep["rejected"])


def test_calibrate_errors_are_one_line(tmp_path, capsys):
    rc = main(["calibrate", "intrinsics", str(tmp_path / "none.png"), "--board", "9x6", "--square", "0.03",
               "-o", str(tmp_path / "c.toml"), "-q"])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and err.startswith("tinyloc: error:") and "\n" not in err and "usable board photos" in err
    rc = main(["calibrate", "intrinsics", "x.png", "--board", "nine", "--square", "0.03", "-o", "c.toml"])
    assert rc == 2 and "COLSxROWS" in capsys.readouterr().err


def test_calibrate_mount_cli(tmp_path, capsys):
    true = Mount(0.7, 16.0, 1.0, 0.0, 0.1, 0.0)
    cam = CameraModel(640, 480, 520.0, 515.0, 322.0, 238.5, tuple(DIST), true)
    img, _, _ = _ground_board_photo(cam, (0.7 / math.tan(math.radians(28.0)), 0.24, 0.0))
    photo = tmp_path / "ground.png"
    cv2.imwrite(str(photo), img)
    from tinyloc.camera.model import save_camera
    path = tmp_path / "camera.toml"
    save_camera(path, cam.with_mount(height_m=1.0, pitch_deg=0.0, roll_deg=0.0), rms_px=0.1)
    assert main(["calibrate", "mount", str(photo), "--camera", str(path), "--board", "7x5", "--square", "0.08"]) == 0
    got = load_camera(path).mount
    assert abs(got.height_m - 0.7) < 0.02 and abs(got.pitch_deg - 16.0) < 0.3 and abs(got.roll_deg - 1.0) < 0.3
    assert "wrote" in capsys.readouterr().out
    # by hand
    assert main(["calibrate", "mount", "--camera", str(path), "--height", "0.55", "--yaw", "2", "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res["height_m"] == 0.55 and res["yaw_deg"] == 2.0 and abs(res["pitch_deg"] - 16.0) < 0.3
    assert main(["calibrate", "mount", "--camera", str(path)]) == 2
    assert "nothing to do" in capsys.readouterr().err
