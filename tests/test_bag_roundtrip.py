"""Round trip against the rosbags library: run folder -> bag (rosbags' own writers) -> tinyloc import -> run folder.

Reference: the general-purpose ``rosbags`` package writes the bags (ROS 1 bag format 2.0,
ROS 2 sqlite3 and MCAP storage), from messages built field by field in tests/_bag_helpers.py.
"""

import json

import cv2
import numpy as np
import pytest

from _bag_helpers import CAMERA, ORIGIN, STAMP_BASE_NS, bag_from_run, bag_name, make_run
from tinyloc.bagio.import_bag import ImportOptions, import_bag
from tinyloc.runfolder import RunFolder

NS = 1_000_000_000


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("src") / "run", np.random.default_rng(20311))


def _shift_s(out: RunFolder) -> float:
    # Header-clock seconds of the original run's t = 0, seen from the imported run's t = 0.
    return (out.meta["time_base_ns"] - STAMP_BASE_NS) / NS


def _check_streams(src: RunFolder, out: RunFolder, tol=1e-9):
    d = _shift_s(out)
    for name in ("imu", "odometry", "gnss", "truth"):
        a, b = getattr(src, name), getattr(out, name)
        assert a.shape == b.shape, name
        b = b.copy()
        b[:, 0] += d
        err = np.max(np.abs(a - b))
        assert err <= tol, f"{name}: max abs error {err}"
    assert np.max(np.abs(src.frame_t - (out.frame_t + d))) <= tol


def _check_camera(ref, c):
    # Calibration: intrinsics exactly (CameraInfo carries them as float64), the mount through the
    # /tf_static chain (quaternions from SciPy, composed by tinyloc) to 1e-9.
    assert (c.width, c.height, c.fx, c.fy, c.cx, c.cy, c.dist) == \
        (ref.width, ref.height, ref.fx, ref.fy, ref.cx, ref.cy, ref.dist)
    for k in ("height_m", "pitch_deg", "roll_deg", "yaw_deg", "x_m", "y_m"):
        assert abs(getattr(c.mount, k) - getattr(ref.mount, k)) < 1e-9, k


@pytest.mark.parametrize("storage", ["ros1", "sqlite3", "mcap"])
def test_roundtrip_raw_images(run, tmp_path, storage):
    bag = bag_from_run(run, bag_name(tmp_path, storage), storage)
    res = import_bag(bag, tmp_path / "out", ImportOptions(truth_topic="/ins/pose", origin=ORIGIN, progress=False))
    assert res.complete
    out = RunFolder.open(tmp_path / "out")
    assert out.meta["complete"] is True
    assert len(out) == len(run)
    for i in range(len(run)):  # lossless: the very same pixels
        assert np.array_equal(out.load_frame(i), run.load_frame(i))
    _check_streams(run, out)
    _check_camera(CAMERA, out.camera)
    rep = json.loads((tmp_path / "out" / "run.json").read_text())["import"]
    assert rep["state"] == "complete"
    imu = rep["report"]["topics"]["/imu/data"]
    assert imu["kept"] == len(run.imu) and abs(imu["rate_hz"] - 100.0) < 1e-6
    assert imu["gaps"] == imu["duplicates"] == imu["out_of_order"] == imu["clock_jumps"] == 0


@pytest.mark.parametrize("storage", ["sqlite3", "mcap"])
def test_roundtrip_png_compressed_is_byte_identical(run, tmp_path, storage):
    bag = bag_from_run(run, bag_name(tmp_path, storage), storage, image="file")
    import_bag(bag, tmp_path / "out", ImportOptions(truth_topic="/ins/pose", origin=ORIGIN, progress=False))
    out = RunFolder.open(tmp_path / "out")
    for i in range(len(run)):
        assert (out.path / out.frame_files[i]).read_bytes() == (run.path / run.frame_files[i]).read_bytes()
    _check_streams(run, out)


def test_jpeg_compressed_kept_as_sent_and_decodes_like_opencv(run, tmp_path):
    bag = bag_from_run(run, bag_name(tmp_path, "mcap"), "mcap", image="jpeg", jpeg_quality=85)
    import_bag(bag, tmp_path / "out", ImportOptions(progress=False))
    out = RunFolder.open(tmp_path / "out")
    assert all(f.endswith(".jpg") for f in out.frame_files)
    for i in range(len(run)):
        ok, ref = cv2.imencode(".jpg", run.load_frame(i), [cv2.IMWRITE_JPEG_QUALITY, 85])
        data = (out.path / out.frame_files[i]).read_bytes()
        assert data == ref.tobytes()
        assert np.array_equal(out.load_frame(i), cv2.imdecode(ref, cv2.IMREAD_COLOR))


@pytest.mark.parametrize("encoding", ["rgb8", "mono8"])
def test_other_raw_encodings(run, tmp_path, encoding):
    bag = bag_from_run(run, bag_name(tmp_path, "sqlite3"), "sqlite3", image=encoding)
    import_bag(bag, tmp_path / "out", ImportOptions(progress=False))
    out = RunFolder.open(tmp_path / "out")
    for i in range(len(run)):
        if encoding == "rgb8":
            assert np.array_equal(out.load_frame(i), run.load_frame(i))
        else:
            ref = cv2.cvtColor(run.load_frame(i), cv2.COLOR_BGR2GRAY)
            assert np.array_equal(out.load_frame(i, color=False), ref)


def test_every_and_window(run, tmp_path):
    bag = bag_from_run(run, bag_name(tmp_path, "mcap"), "mcap")
    import_bag(bag, tmp_path / "a", ImportOptions(every=2, progress=False))
    a = RunFolder.open(tmp_path / "a")
    d = _shift_s(a)
    assert np.max(np.abs(a.frame_t + d - run.frame_t[::2])) < 1e-9
    assert len(a.imu) == len(run.imu)  # --every thins frames only
    # Window in record seconds from the bag's first message (/tf_static at t = 0 + latency).
    import_bag(bag, tmp_path / "b", ImportOptions(start_s=0.2, end_s=0.45, progress=False))
    b = RunFolder.open(tmp_path / "b")
    t = b.imu[:, 0] + _shift_s(b)
    assert t.min() >= 0.2 - 1e-9 and t.max() < 0.45
    assert len(b.imu) == int(np.sum((run.imu[:, 0] >= 0.2 - 1e-9) & (run.imu[:, 0] < 0.45 - 1e-12)))


def test_roundtrip_of_the_simulators_demo_run(tmp_path):
    # The simulator's bundled drive (JPEG frames, 50 Hz odometry, GNSS with its accuracy, truth),
    # written with rosbags as a ROS 2 MCAP bag carrying the frame files as CompressedImage.
    from tinyloc.sim.demo import demo_paths

    src = RunFolder.open(demo_paths()["run"])
    bag = bag_from_run(src, bag_name(tmp_path, "mcap"), "mcap", image="file")
    o = src.frame
    res = import_bag(bag, tmp_path / "out", ImportOptions(truth_topic="/ins/pose", progress=False,
                                                          origin=(o.lat0_deg, o.lon0_deg, o.h0_m)))
    out = RunFolder.open(tmp_path / "out")
    assert res.complete and len(out) == len(src) == 239  # tinyloc/sim/demo.py FRAMES
    for i in range(len(src)):
        assert (out.path / out.frame_files[i]).read_bytes() == (src.path / src.frame_files[i]).read_bytes()
    _check_streams(src, out)
    _check_camera(src.camera, out.camera)
