"""``tinyloc look``: the debug views and the raw result files."""

import json

import cv2
import numpy as np

from test_perception_frames import _street_like
from tinyloc.camera.model import CameraModel, Mount, save_camera
from tinyloc.classes import CLASSES
from tinyloc.cli.main import main


def test_look_writes_views(tmp_path, capsys):
    img = _street_like()
    p = tmp_path / "frame.png"
    cv2.imwrite(str(p), img)
    cam = tmp_path / "camera.toml"
    save_camera(cam, CameraModel(320, 240, 250.0, 250.0, 159.5, 119.5, mount=Mount(0.8, 8.0)))
    out = tmp_path / "look"
    assert main(["look", str(p), "--camera", str(cam), "--gravity", "0,0,9.81", "-o", str(out)]) == 0
    labels = cv2.imread(str(out / "labels.png"), cv2.IMREAD_UNCHANGED)
    assert labels.shape == (240, 320) and labels.dtype == np.uint8
    classes = json.loads((out / "classes.json").read_text())
    assert classes["classes"]["9"]["name"] == "sky" and len(classes["classes"]) == len(CLASSES)
    assert labels[5, 160] == 9 and labels[230, 160] == 1  # sky at the top, road at the bottom
    assert (out / "bev.png").is_file() and (out / "overlay.png").is_file()
    assert (out / "status.txt").read_text().strip() == "ok"
    out2 = tmp_path / "look2"
    assert main(["look", str(p), "-o", str(out2)]) == 0
    assert not (out2 / "bev.png").exists() and (out2 / "labels.png").is_file()


def test_look_bad_input_one_line(tmp_path, capsys):
    bad = tmp_path / "bad.png"
    bad.write_bytes(b"garbage")
    assert main(["look", str(bad), "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "bad.png: not a readable image" in err
    gray = tmp_path / "gray.png"
    cv2.imwrite(str(gray), np.zeros((20, 20), np.uint8))
    assert main(["look", str(gray), "-o", str(tmp_path / "o")]) == 2
    assert "grayscale" in capsys.readouterr().err
    img = tmp_path / "f.png"
    cv2.imwrite(str(img), _street_like())
    assert main(["look", str(img), "--gravity", "1,2", "-o", str(tmp_path / "o")]) == 2
    assert "--gravity" in capsys.readouterr().err


def test_look_with_external_labels(tmp_path):
    from tinyloc.perception.labels_in import save_label_map

    img = _street_like()
    p = tmp_path / "frame.png"
    cv2.imwrite(str(p), img)
    ext = np.zeros((240, 320), np.uint8)
    ext[80:130] = 7
    ext[130:] = 2
    cv2.imwrite(str(tmp_path / "ext.png"), ext)
    save_label_map(tmp_path / "ids.toml", {0: "sky", 7: "building", 2: "road"})
    cam = tmp_path / "camera.toml"
    save_camera(cam, CameraModel(320, 240, 250.0, 250.0, 159.5, 119.5, mount=Mount(0.8, 8.0)))
    out = tmp_path / "look"
    assert main(["look", str(p), "--camera", str(cam), "--labels", str(tmp_path / "ext.png"), "--label-map",
                 str(tmp_path / "ids.toml"), "-o", str(out)]) == 0
    labels = cv2.imread(str(out / "labels.png"), cv2.IMREAD_UNCHANGED)
    assert labels[10, 10] == 9 and labels[100, 10] == 0 and labels[200, 10] == 1
