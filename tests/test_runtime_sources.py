"""Frame sources: dispatch by spec, image folders, real-time pacing that drops late frames."""

import time

import cv2
import numpy as np
import pytest

from tinyloc.camera.model import CameraModel
from tinyloc.errors import InputError
from tinyloc.runfolder import RunWriter
from tinyloc.runtime.sources import ImageFolderSource, RunFolderSource, open_source

CAM = CameraModel(width=32, height=24, fx=20.0, fy=20.0, cx=15.5, cy=11.5)


@pytest.fixture
def run(tmp_path):
    img = np.full((24, 32, 3), 90, np.uint8)
    with RunWriter(tmp_path / "run", camera=CAM, origin=(46.5, 7.25, 500.0)) as w:
        for k in range(20):
            w.add_frame(0.05 * k, img)
            w.add_imu(0.05 * k - 0.01, 0.0, 0.0, 9.81)
            w.add_imu(0.05 * k - 0.005, 0.0, 0.0, 9.81)
            w.add_odometry(0.05 * k, 0.01 * k, 0.0, 0.0)
    return tmp_path / "run"


def test_dispatch_and_rows(run, tmp_path):
    src = open_source(str(run))
    assert isinstance(src, RunFolderSource) and len(src) == 20
    frames = list(src)
    assert [f.index for f in frames] == list(range(20))
    # each frame carries exactly the rows in (previous frame time, this frame time]
    assert all(len(f.imu) == 2 for f in frames)  # the first frame also gets the rows before it
    assert all(len(f.odometry) == 1 for f in frames)
    assert frames[3].image.shape == (24, 32, 3)
    with pytest.raises(InputError, match="not a run folder"):
        open_source(str(tmp_path / "nothing-here"))


def test_image_folder(run, tmp_path):
    d = tmp_path / "imgs"
    d.mkdir()
    for k in range(3):
        cv2.imwrite(str(d / f"{k:03d}.png"), np.full((24, 32, 3), 50 * k, np.uint8))
    (d / "003.png").write_bytes(b"not an image")
    src = open_source(str(d), fps=5.0)
    assert isinstance(src, ImageFolderSource)
    frames = list(src)
    assert [round(f.t, 3) for f in frames] == [0.0, 0.2, 0.4, 0.6]
    assert frames[3].image is None and "cannot decode" in frames[3].image_fault
    with pytest.raises(InputError, match="no images"):
        ImageFolderSource(tmp_path)


def test_realtime_drops_late_frames_instead_of_queueing(run):
    src = RunFolderSource(run, realtime=True, late_ms=20.0)
    got = []
    t0 = time.monotonic()
    for f in src:
        got.append(f.index)
        if f.index == 5:
            time.sleep(0.3)  # a stage was slow for 0.3 s = 6 frame periods
    wall = time.monotonic() - t0
    assert src.dropped >= 4 and len(got) + src.dropped == 20
    assert got == sorted(got) and got[-1] == 19
    assert wall < 1.3  # paced at 20 Hz, and never caught up by queueing
