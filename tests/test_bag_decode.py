"""Message decoding against outside references: OpenCV (demosaicing, JPEG/PNG, the rational
distortion model), SciPy (rotations, quaternion order x, y, z, w), NumPy (eigenvalues)."""

import math

import cv2
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from _bag_helpers import _Msgs, bag_name, make_run, mosaic, run_messages, write_bag
from tinyloc.bagio.decode import (BadMessage, TransformTree, camera_from_info, check_compressed, horizontal_sigma_m,
                                  mount_from_transform, quat_to_yaw, raw_image_to_bgr)
from tinyloc.bagio.import_bag import ImportOptions, import_bag
from tinyloc.bagio.stamps import NS, StampParams, StampTracker
from tinyloc.camera.model import Mount
from tinyloc.runfolder import RunFolder

# sensor_msgs encoding -> OpenCV conversion code under OpenCV's older naming, as the ROS image bridge
# maps them (common practice, from memory): the old names count from the second row and column.
OLD_NAMES = {"bayer_rggb8": cv2.COLOR_BayerBG2BGR, "bayer_bggr8": cv2.COLOR_BayerRG2BGR,
             "bayer_gbrg8": cv2.COLOR_BayerGR2BGR, "bayer_grbg8": cv2.COLOR_BayerGB2BGR}


@pytest.mark.parametrize("enc", sorted(OLD_NAMES))
def test_bayer_matches_opencv_and_planted_colour(enc, rng):
    img = rng.integers(0, 256, (24, 32, 3), dtype=np.uint8)
    raw = mosaic(img, enc[6:10])
    got = raw_image_to_bgr(24, 32, enc, 32, raw.tobytes())
    assert np.array_equal(got, cv2.cvtColor(raw, OLD_NAMES[enc]))
    # Planted truth: a flat colour demosaics back to itself away from the border.
    flat = np.empty((16, 16, 3), np.uint8)
    flat[:] = (10, 100, 200)
    out = raw_image_to_bgr(16, 16, enc, 16, mosaic(flat, enc[6:10]))
    assert np.array_equal(out[2:-2, 2:-2], flat[2:-2, 2:-2])


def test_bayer_through_a_bag_decodes_like_opencv(tmp_path, rng):
    run = make_run(tmp_path / "run", rng, n_frames=3)
    m = _Msgs(False)
    bag = write_bag(bag_name(tmp_path, "mcap"), run_messages(run, m, image="bayer_grbg8"), m, "mcap")
    import_bag(bag, tmp_path / "out", ImportOptions(progress=False))
    out = RunFolder.open(tmp_path / "out")
    for i in range(len(run)):
        ref = cv2.cvtColor(mosaic(run.load_frame(i), "grbg"), OLD_NAMES["bayer_grbg8"])
        assert np.array_equal(out.load_frame(i), ref)


def test_raw_padded_rows_and_channel_orders(rng):
    img = rng.integers(0, 256, (5, 7, 3), dtype=np.uint8)
    padded = np.zeros((5, 7 * 3 + 11), np.uint8)
    padded[:, :21] = img.reshape(5, 21)
    assert np.array_equal(raw_image_to_bgr(5, 7, "bgr8", 32, padded.tobytes()), img)
    assert np.array_equal(raw_image_to_bgr(5, 7, "rgb8", 21, img[:, :, ::-1].tobytes()), img)
    rgba = np.concatenate([img[:, :, ::-1], np.full((5, 7, 1), 255, np.uint8)], axis=2)
    assert np.array_equal(raw_image_to_bgr(5, 7, "rgba8", 28, rgba.tobytes()), img)
    with pytest.raises(BadMessage, match="encoding '16UC1' is not supported"):
        raw_image_to_bgr(5, 7, "16UC1", 14, bytes(70))
    with pytest.raises(BadMessage, match="holds 20 bytes, 5 rows x step 21 need 105"):
        raw_image_to_bgr(5, 7, "bgr8", 21, bytes(20))


def test_compressed_checks(rng):
    img = rng.integers(0, 256, (20, 30, 3), dtype=np.uint8)
    png = cv2.imencode(".png", img)[1].tobytes()
    assert check_compressed(png, 30, 20) == (".png", 30, 20)
    jpg = cv2.imencode(".jpg", img)[1].tobytes()
    assert check_compressed(jpg)[0] == ".jpg"
    with pytest.raises(BadMessage, match="does not decode"):
        check_compressed(png[: len(png) // 2])
    with pytest.raises(BadMessage, match="neither JPEG nor PNG"):
        check_compressed(b"GIF89a" + bytes(40))
    with pytest.raises(BadMessage, match="image is 30x20, the camera calibration says 64x48"):
        check_compressed(png, 64, 48)


class _Info:
    def __init__(self, model, d, k=None, w=64, h=48):
        self.distortion_model, self.d, self.width, self.height = model, d, w, h
        self.k = k if k is not None else [52.5, 0, 31.7, 0, 51.25, 23.9, 0, 0, 1]
        self.binning_x = self.binning_y = 0
        self.roi = None


def test_camera_info_models_against_opencv(rng):
    d5 = [-0.21, 0.05, 0.001, -0.0005, 0.01]
    cam = camera_from_info(_Info("plumb_bob", d5))
    assert cam.dist == tuple(d5) and (cam.fx, cam.fy, cam.cx, cam.cy) == (52.5, 51.25, 31.7, 23.9)
    # rational_polynomial with k4 = k5 = k6 = 0 is exactly OpenCV's 5-coefficient model: check with
    # OpenCV's own projection under the 8-coefficient rational model.
    d8 = d5 + [0.0, 0.0, 0.0]
    cam8 = camera_from_info(_Info("rational_polynomial", d8))
    pts = np.column_stack([rng.uniform(-1, 1, 50), rng.uniform(-0.7, 0.7, 50), rng.uniform(1.5, 4, 50)])
    ref, _ = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), cam8.K, np.array(d8))
    assert np.max(np.abs(cam8.project_optical(pts) - ref.reshape(-1, 2))) < 1e-9
    with pytest.raises(BadMessage, match="'rational_polynomial' with nonzero k4..k6"):
        camera_from_info(_Info("rational_polynomial", d5 + [0.02, 0.0, 0.0]))
    with pytest.raises(BadMessage, match="distortion model 'equidistant' is not supported"):
        camera_from_info(_Info("equidistant", [0.1, 0.0, 0.0, 0.0]))
    with pytest.raises(BadMessage, match="uncalibrated"):
        camera_from_info(_Info("plumb_bob", d5, k=[0.0] * 9))
    assert camera_from_info(_Info("", [])).dist == (0.0,) * 5


def test_transform_tree_and_mount_against_scipy(rng):
    for _ in range(20):
        mount = Mount(height_m=rng.uniform(0.2, 2), pitch_deg=rng.uniform(-30, 60), roll_deg=rng.uniform(-10, 10),
                      yaw_deg=rng.uniform(-170, 170), x_m=rng.uniform(-1, 1), y_m=rng.uniform(-1, 1))
        r_bc, t_bc = mount.base_from_camera()
        # Split base -> cam through an intermediate frame with a random rotation (SciPy composes).
        r_mid = Rotation.random(random_state=int(rng.integers(1 << 30)))
        t_mid = rng.normal(size=3)
        r_mc = r_mid.inv() * Rotation.from_matrix(r_bc)
        t_mc = r_mid.inv().apply(t_bc - t_mid)
        tree = TransformTree()

        class V:
            def __init__(self, **k):
                self.__dict__.update(k)

        def tr(parent, child, rot, t):
            q = rot.as_quat()
            return V(header=V(frame_id=parent), child_frame_id=child,
                     transform=V(translation=V(x=t[0], y=t[1], z=t[2]), rotation=V(x=q[0], y=q[1], z=q[2], w=q[3])))

        tree.add(V(transforms=[tr("base", "mid", r_mid, t_mid), tr("mid", "cam_optical", r_mc, t_mc),
                               tr("base", "other", Rotation.random(random_state=3), [1, 2, 3])]))
        r, t = tree.lookup("base", "cam_optical")
        assert np.max(np.abs(r - r_bc)) < 1e-12 and np.max(np.abs(t - t_bc)) < 1e-12
        back = mount_from_transform(r, t)
        for k in ("height_m", "pitch_deg", "roll_deg", "yaw_deg", "x_m", "y_m"):
            assert abs(getattr(back, k) - getattr(mount, k)) < 1e-9
        # A sibling branch (other <- base -> cam) goes through the shared root.
        r2, t2 = tree.lookup("other", "cam_optical")
        ro, to = tree.lookup("base", "other")
        assert np.max(np.abs(ro @ r2 - r_bc)) < 1e-12 and np.max(np.abs(ro @ t2 + to - t_bc)) < 1e-12
    assert tree.lookup("base", "nowhere") is None


def test_quat_to_yaw_against_scipy(rng):
    for q in Rotation.random(200, random_state=7).as_quat():
        yaw_ref = Rotation.from_quat(q).as_euler("ZYX")[0]
        assert abs(math.remainder(quat_to_yaw(*q) - yaw_ref, 2 * math.pi)) < 1e-9


def test_gnss_sigma_is_largest_horizontal_eigen_sigma(rng):
    for _ in range(50):
        a = rng.normal(size=(3, 3))
        cov = a @ a.T
        ref = math.sqrt(np.linalg.eigvalsh(cov[:2, :2]).max())
        assert abs(horizontal_sigma_m(cov.ravel()) - ref) < 1e-12
    assert abs(horizontal_sigma_m(np.diag([4.0, 4.0, 9.0])) - 2.0) < 1e-15
    assert math.isnan(horizontal_sigma_m([0.0] * 9))


def test_stamp_tracker_reports_planted_faults():
    tr = StampTracker("/x", StampParams(nominal_from=4))
    period = NS // 10
    rec_off = 5_000_000
    stamps = [k * period + NS for k in range(10)]
    stamps[6] = stamps[5]  # duplicate
    stamps[7] = stamps[4]  # out of order
    stamps[8] = 0  # no stamp
    stamps += [stamps[-1] + 2 * NS]  # gap of 2 s
    keep = [tr.check(s, (s or stamps[7]) + rec_off, i) for i, s in enumerate(stamps)]
    assert keep == [True] * 6 + [False, False, False, True, True]
    # Two gaps: the hole left by the three dropped messages (0.4 s), and the planted 2 s.
    assert (tr.duplicates, tr.backwards, tr.stampless, tr.gaps) == (1, 1, 1, 2)
    assert any("message #9" in e and "gap of 0.400 s" in e for e in tr.events)
    assert any("message #6" in e and "repeats" in e for e in tr.events)
    assert any("message #7" in e and "out of order" in e for e in tr.events)
    assert any("message #8" in e and "no header stamp" in e for e in tr.events)
    assert any("message #10" in e and "gap of 2.000 s" in e for e in tr.events)
    assert tr.clock_jumps == 0
    # The recorder's clock against the header's: a 3 s step is a clock jump.
    tr2 = StampTracker("/y")
    tr2.check(NS, NS + 1000, 0)
    tr2.check(NS + period, NS + period + 3 * NS, 1)
    assert tr2.clock_jumps == 1 and "clock jump of -3.000 s" in tr2.events[0]
