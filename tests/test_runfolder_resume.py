"""RunWriter's append mode (RunWriter.resume) and add_frame_bytes: a folder written in two sittings, with
the debris a killed writer leaves in between, reads back identical to one written in one go."""

import json

import cv2
import numpy as np
import pytest

from tinyloc.camera.model import CameraModel
from tinyloc.errors import InputError
from tinyloc.runfolder import RunFolder, RunWriter

CAM = CameraModel(width=32, height=24, fx=30.0, fy=30.0, cx=15.5, cy=11.5)
ORIGIN = (12.3456, -45.6789, 31.0)
N = 6


def _rows(w, i, img):
    t = 0.1 * i
    w.add_frame(t, img)
    w.add_imu(t + 0.01, 0.01 * i, 0.0, 9.81)
    w.add_odometry(t + 0.02, 0.5 * i, 0.0, 0.01 * i)
    w.add_gnss(t + 0.03, ORIGIN[0] + 1e-6 * i, ORIGIN[1], 31.0, 2.5)
    w.add_truth(t + 0.04, ORIGIN[0], ORIGIN[1], 0.1, 0.5 * i, 0.0)


def _images():
    rng = np.random.default_rng(11)
    return [rng.integers(0, 255, (24, 32, 3), dtype=np.uint8) for _ in range(N)]


def _one_go(path):
    with RunWriter(path, camera=CAM, origin=ORIGIN, name="t", source="test") as w:
        for i, img in enumerate(_images()):
            _rows(w, i, img)
    return path


def _files(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and p.name != "run.json"}


def test_two_sittings_with_debris_equal_one_go(tmp_path):
    ref = _one_go(tmp_path / "ref")
    imgs = _images()
    w = RunWriter(tmp_path / "out", camera=CAM, origin=ORIGIN, name="t", source="test")
    for i in range(3):
        _rows(w, i, imgs[i])
    w.close(complete=False)
    out = tmp_path / "out"
    # Debris: torn rows in every CSV and an unlisted, half-written next frame.
    for name, torn in (("frames", "0.30000000000000004,frames/0000"), ("imu", "0.31,0.0"), ("odometry", "0"),
                       ("gnss", "0.33,12.3456,-45.6789,31.0,2."), ("truth", "0.34,12.34")):
        with open(out / f"{name}.csv", "a") as fh:
            fh.write(torn)
    good = (ref / "frames" / "000003.png").read_bytes()
    (out / "frames" / "000003.png").write_bytes(good[:100])
    (out / "frames" / "000004.png").write_bytes(good[:10])
    w2 = RunWriter.resume(out)
    assert len(w2) == 3 and w2.last_t["frames"] == 0.2 and w2.last_t["truth"] == 0.2 + 0.04
    assert not (out / "frames" / "000004.png").exists()
    with w2:
        for i in range(3, N):
            _rows(w2, i, imgs[i])
    assert _files(out) == _files(ref)
    rf = RunFolder.open(out)
    assert rf.warnings == [] and rf.meta["complete"] is True and rf.meta["frames"] == N


def test_last_listed_frame_cut_is_dropped(tmp_path):
    w = RunWriter(tmp_path / "out", camera=CAM, origin=ORIGIN)
    imgs = _images()
    for i in range(3):
        w.add_frame(0.1 * i, imgs[i])
    w.close(complete=False)
    f = tmp_path / "out" / "frames" / "000002.png"
    f.write_bytes(f.read_bytes()[:50])  # a power loss after the row reached the disk but not the image
    w2 = RunWriter.resume(tmp_path / "out")
    assert len(w2) == 2 and w2.last_t["frames"] == 0.1 and not f.exists()
    w2.add_frame(0.2, imgs[2])
    w2.close()
    assert np.array_equal(RunFolder.open(tmp_path / "out").load_frame(2), imgs[2])


def test_resume_of_header_only_and_empty_csv(tmp_path):
    w = RunWriter(tmp_path / "out", camera=CAM, origin=ORIGIN)
    w.close(complete=False)
    (tmp_path / "out" / "frames.csv").write_bytes(b"t,fi")  # died while the header was written
    w2 = RunWriter.resume(tmp_path / "out")
    assert len(w2) == 0 and w2.last_t == {}
    w2.add_imu(0.0, 0.0, 0.0, 9.81)
    w2.close()
    rf = RunFolder.open(tmp_path / "out")
    assert len(rf) == 0 and rf.imu.shape == (1, 4)


def test_resume_refusals(tmp_path):
    ref = _one_go(tmp_path / "ref")
    with pytest.raises(InputError, match="run.json says the run is complete; nothing to resume"):
        RunWriter.resume(ref)
    with pytest.raises(InputError, match="no run.json"):
        RunWriter.resume(tmp_path / "none")
    w = RunWriter(tmp_path / "bad", camera=CAM, origin=ORIGIN)
    w.add_imu(0.5, 0.0, 0.0, 9.81)
    w.add_imu(0.1, 0.0, 0.0, 9.81)  # time going backwards: a fault the reader rejects, not debris
    w.close(complete=False)
    with pytest.raises(InputError) as e:
        RunWriter.resume(tmp_path / "bad")
    assert "\n" not in str(e.value) and "cannot resume" in str(e.value) and "imu.csv line 3" in str(e.value)


def test_add_frame_bytes_stores_bytes_unchanged(tmp_path):
    img = _images()[0]
    ok, jpg = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, 80])
    ok, png = cv2.imencode(".png", img)
    with RunWriter(tmp_path / "out", camera=CAM) as w:
        assert w.add_frame_bytes(0.0, jpg.tobytes(), ".jpg") == "frames/000000.jpg"
        assert w.add_frame(0.1, img) == "frames/000001.png"
        assert w.add_frame_bytes(0.2, png.tobytes(), ".png") == "frames/000002.png"
        with pytest.raises(InputError, match="does not increase"):
            w.add_frame_bytes(0.2, png.tobytes(), ".png")
        with pytest.raises(InputError, match="must be '.png' or '.jpg'"):
            w.add_frame_bytes(0.3, png.tobytes(), ".bmp")
    out = tmp_path / "out"
    assert (out / "frames" / "000000.jpg").read_bytes() == jpg.tobytes()
    assert (out / "frames" / "000002.png").read_bytes() == png.tobytes()
    rf = RunFolder.open(out)
    assert len(rf) == 3 and np.array_equal(rf.load_frame(2), img)
    assert json.loads((out / "run.json").read_text())["frames"] == 3
