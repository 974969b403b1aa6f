"""Broken bags: every fault gives one clear line naming the file, topic and message index, and the
import either completes with the fault reported or stops cleanly (never a silently truncated run).

The bags are written with the rosbags library's writers (tests/_bag_helpers.py), then damaged."""

import json

import numpy as np
import pytest

from _bag_helpers import (CAMERA, NS, STAMP_BASE_NS, _Msgs, bag_from_run, bag_name, make_run, reader_failing_after,
                          run_messages, write_bag)
from tinyloc.bagio import import_bag as ib
from tinyloc.bagio.import_bag import ImportOptions, StopImport, import_bag
from tinyloc.errors import InputError
from tinyloc.runfolder import RunFolder, check_run

Q = dict(progress=False)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("src") / "run", np.random.default_rng(77), n_frames=8)


def _bag(run, tmp_path, storage="mcap", **kw):
    m = _Msgs(storage == "ros1")
    return write_bag(bag_name(tmp_path, storage), run_messages(run, m, **kw), m, storage)


@pytest.mark.parametrize("storage", ["sqlite3"])
def test_truncated_file_stops_cleanly_before_writing(run, tmp_path, storage):
    bag = bag_from_run(run, bag_name(tmp_path, storage), storage)
    f = bag if storage == "ros1" else next(p for p in bag.iterdir() if p.suffix in (".db3", ".mcap"))
    data = f.read_bytes()
    f.write_bytes(data[: len(data) * 6 // 10])
    with pytest.raises(InputError) as e:
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    msg = str(e.value)
    assert "\n" not in msg and str(bag) in msg and "cannot open as a bag" in msg
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("storage,variant", [("mcap", "metadata"), ("mcap", "no metadata"), ("ros1", ".bag"),
                                             ("ros1", ".bag.active")])
def test_truncated_recording_is_salvaged_up_to_the_cut(run, tmp_path, storage, variant):
    # A recorder killed mid-write: an MCAP file without summary or footer (and often no metadata.yaml
    # beside it), or a ROS 1 bag whose index was never written (left as NAME.bag.active).
    bag = bag_from_run(run, bag_name(tmp_path, storage), storage)
    f = bag if storage == "ros1" else next(bag.glob("*.mcap"))
    data = f.read_bytes()
    f.write_bytes(data[: len(data) * 6 // 10])
    if variant == "no metadata":
        (bag / "metadata.yaml").unlink()
    if variant == ".bag.active":
        bag = bag.rename(bag.with_name(bag.name + ".active"))
    res = import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    assert res.complete and any("recording cut short" in n and "salvaged" in n for n in res.report["notes"])
    out = RunFolder.open(tmp_path / "out")
    assert "salvaged" in out.meta["import"]
    n = len(out)
    assert 2 <= n < len(run)
    for i in range(n):  # what survived is the original, untouched
        assert np.array_equal(out.load_frame(i), run.load_frame(i))
    d = (out.meta["time_base_ns"] - STAMP_BASE_NS) / NS
    k = len(out.imu)
    assert 0 < k < len(run.imu) and np.max(np.abs(out.imu[:, 1:] - run.imu[:k, 1:])) < 1e-9
    assert np.max(np.abs(out.imu[:, 0] + d - run.imu[:k, 0])) < 1e-9


def test_missing_topics(run, tmp_path):
    bag = _bag(run, tmp_path)
    with pytest.raises(InputError, match=r"--imu-topic /imu/nope: no such topic in the bag \(topics of a fitting "
                                         r"type: /imu/data\)"):
        import_bag(bag, tmp_path / "a", ImportOptions(imu_topic="/imu/nope", **Q))
    with pytest.raises(InputError, match="--odom-topic /imu/data: topic has type sensor_msgs/msg/Imu"):
        import_bag(bag, tmp_path / "a", ImportOptions(odom_topic="/imu/data", **Q))
    # A stream that is absent is reported and its file is left out; the rest is imported.
    res = import_bag(bag, tmp_path / "b", ImportOptions(gnss_topic="none", **Q))
    assert res.complete and res.counts["gnss"] == 0 and not (tmp_path / "b" / "gnss.csv").exists()
    assert any("gnss: left out" in n for n in res.report["notes"])


def test_no_camera_topic(run, tmp_path):
    m = _Msgs(False)
    msgs = [r for r in run_messages(run, m) if "image" not in r[1]]
    bag = write_bag(bag_name(tmp_path, "mcap"), msgs, m, "mcap")
    with pytest.raises(InputError, match="no image topic in the bag"):
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))


def test_unsupported_camera_model(run, tmp_path):
    bag = _bag(run, tmp_path, info_model="equidistant", info_d=[0.1, 0.01, 0.0, 0.0])
    with pytest.raises(InputError, match=r"topic /front/camera_info message #0: CameraInfo distortion model "
                                         r"'equidistant' is not supported"):
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    assert not (tmp_path / "out").exists()
    bag2 = _bag(run, tmp_path / "r", info_model="rational_polynomial", info_d=list(CAMERA.dist) + [0.3, 0.0, 0.0])
    with pytest.raises(InputError, match="message #0: CameraInfo distortion model 'rational_polynomial' with "
                                         "nonzero k4..k6"):
        import_bag(bag2, tmp_path / "out", ImportOptions(**Q))


def test_unsupported_model_with_calibration_file(run, tmp_path):
    from tinyloc.camera.model import save_camera

    save_camera(tmp_path / "cam.toml", CAMERA)
    bag = _bag(run, tmp_path, info_model="equidistant", info_d=[0.1, 0.01, 0.0, 0.0])
    res = import_bag(bag, tmp_path / "out", ImportOptions(camera_file=str(tmp_path / "cam.toml"), **Q))
    assert res.complete and RunFolder.open(tmp_path / "out").camera.dist == CAMERA.dist
    assert any("equidistant" in n and "intrinsics taken from" in n for n in res.report["notes"])


def test_images_without_stamp_are_dropped_and_named(run, tmp_path):
    def hook(topic, i, s):
        return 0 if topic == "/front/image_raw" and i in (2, 5) else s

    bag = _bag(run, tmp_path, stamp_hook=hook)
    res = import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    assert res.complete and res.counts["frames"] == len(run) - 2
    ev = res.report["topics"]["/front/image_raw"]["events"]
    assert "/front/image_raw message #2: no header stamp (0); dropped" in ev
    assert "/front/image_raw message #5: no header stamp (0); dropped" in ev
    out = RunFolder.open(tmp_path / "out")
    keep = [i for i in range(len(run)) if i not in (2, 5)]
    for j, i in enumerate(keep):
        assert np.array_equal(out.load_frame(j), run.load_frame(i))


def test_all_images_without_stamp_suggest_record_time(run, tmp_path):
    bag = _bag(run, tmp_path, stamp_hook=lambda topic, i, s: 0 if "image" in topic else s)
    with pytest.raises(InputError, match="topic /front/image_raw messages #0..#7 carry no header stamp; "
                                         "pass --record-time"):
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    res = import_bag(bag, tmp_path / "rec", ImportOptions(record_time=True, **Q))
    assert res.complete and res.counts["frames"] == len(run)


def test_duplicated_and_out_of_order_stamps(run, tmp_path):
    def hook(topic, i, s):
        if topic == "/imu/data" and i in (10, 11):
            return s - (i - 9) * 10_000_000  # #10 repeats #9's stamp, #11 goes back to #9's
        return s

    bag = _bag(run, tmp_path, stamp_hook=hook)
    res = import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    t = res.report["topics"]["/imu/data"]
    assert res.complete and t["duplicates"] == 2 and t["kept"] == len(run.imu) - 2
    assert any(e.startswith("/imu/data message #10: stamp") and "repeats the previous one" in e for e in t["events"])
    assert any(e.startswith("/imu/data message #11: stamp") and "repeats" in e for e in t["events"])
    assert np.all(np.diff(RunFolder.open(tmp_path / "out").imu[:, 0]) > 0)


def test_gap_is_reported(run, tmp_path):
    m = _Msgs(False)
    msgs = [r for r in run_messages(run, m) if not (r[1] == "/imu/data" and 0.5 * NS < r[0] % (10 * NS) < 0.65 * NS)]
    bag = write_bag(bag_name(tmp_path, "mcap"), msgs, m, "mcap")
    res = import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    t = res.report["topics"]["/imu/data"]
    assert t["gaps"] == 1 and 0.14 < t["largest_gap_s"] < 0.17
    assert any("gap of 0.1" in line for line in res.lines)


def test_damaged_message_is_dropped_rest_kept(run, tmp_path):
    import cv2

    m = _Msgs(False)
    msgs = run_messages(run, m, image="file")
    k = [i for i, r in enumerate(msgs) if "compressed" in r[1]][3]
    rec, topic, msg = msgs[k]
    msgs[k] = (rec, topic, m.compressed(int(msg.header.stamp.sec) * NS + int(msg.header.stamp.nanosec),
                                        bytes(msg.data[: len(msg.data) // 2]), "png"))
    bag = write_bag(bag_name(tmp_path, "mcap"), msgs, m, "mcap")
    res = import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    assert res.complete and res.counts["frames"] == len(run) - 1
    assert res.report["dropped"]["/front/image_raw/compressed"]["first"] == [
        "/front/image_raw/compressed message #3: compressed PNG image does not decode (damaged or cut short); dropped"]
    assert cv2.imread(str(tmp_path / "out" / "frames" / "000003.png")) is not None


def test_reader_failing_midway_leaves_incomplete_run(run, tmp_path, monkeypatch):
    bag = _bag(run, tmp_path)
    failing = reader_failing_after(40)

    monkeypatch.setattr(ib._Importer, "_run", failing)
    with pytest.raises(StopImport) as e:
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    msg = str(e.value)
    assert "\n" not in msg and "bag unreadable after topic" in msg and "message #" in msg and "incomplete" in msg
    meta = json.loads((tmp_path / "out" / "run.json").read_text())
    assert meta["complete"] is False and meta["import"]["state"] == "stopped"
    assert "Input/output error" in meta["import"]["stopped"]
    assert any('"complete": false' in w for w in check_run(tmp_path / "out"))


def test_interrupt_leaves_incomplete_run(run, tmp_path, monkeypatch):
    bag = _bag(run, tmp_path)
    calls = {"n": 0}
    real = ib.BagRunWriter.add_imu

    def add_imu(self, *a):
        calls["n"] += 1
        if calls["n"] == 25:
            raise KeyboardInterrupt
        return real(self, *a)

    monkeypatch.setattr(ib.BagRunWriter, "add_imu", add_imu)
    with pytest.raises(KeyboardInterrupt):
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    meta = json.loads((tmp_path / "out" / "run.json").read_text())
    assert meta["complete"] is False and meta["import"]["stopped"].startswith("interrupted after topic")
    rf = RunFolder.open(tmp_path / "out")
    assert len(rf.imu) == 24 and any("complete" in w for w in rf.warnings)


def test_output_folder_not_empty(run, tmp_path):
    bag = _bag(run, tmp_path)
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "x").write_text("keep me")
    with pytest.raises(InputError, match="folder is not empty"):
        import_bag(bag, tmp_path / "out", ImportOptions(**Q))
    assert (tmp_path / "out" / "x").read_text() == "keep me"


def test_ambiguous_topics_need_a_flag_and_raw_beats_compressed(run, tmp_path):
    m = _Msgs(False)
    msgs = run_messages(run, m)
    extra = [(rec + 1, "/imu/raw", msg) for rec, topic, msg in msgs if topic == "/imu/data"]
    jpg = run_messages(run, m, image="file")
    extra += [(rec, topic, msg) for rec, topic, msg in jpg if topic.endswith("/compressed")]
    bag = write_bag(bag_name(tmp_path, "mcap"), sorted(msgs + extra, key=lambda r: r[0]), m, "mcap")
    with pytest.raises(InputError, match=r"several sensor_msgs/msg/Imu topics \(/imu/data, /imu/raw\); "
                                         r"choose one with --imu-topic"):
        import_bag(bag, tmp_path / "a", ImportOptions(**Q))
    res = import_bag(bag, tmp_path / "b", ImportOptions(imu_topic="/imu/raw", **Q))
    assert res.report["topics"].keys() >= {"/front/image_raw", "/imu/raw"}  # Image preferred over compressed
    res = import_bag(bag, tmp_path / "c", ImportOptions(imu_topic="/imu/raw",
                                                        camera_topic="/front/image_raw/compressed", **Q))
    assert RunFolder.open(tmp_path / "c").frame_files[0].endswith(".png") and res.counts["frames"] == len(run)


def test_truth_from_an_odometry_topic(run, tmp_path):
    from tinyloc.geo import LocalFrame

    bag = _bag(run, tmp_path)
    origin = (12.3456, -45.6789, 20.0)
    res = import_bag(bag, tmp_path / "out", ImportOptions(truth_topic="/wheel/odom", origin=origin, **Q))
    out = RunFolder.open(tmp_path / "out")
    assert res.counts["odometry"] == 0 and any(n.startswith("odom: no nav_msgs/msg/Odometry topic")
                                               for n in res.report["notes"])
    tr = out.truth
    assert np.max(np.abs(tr[:, [4, 5]] - run.odometry[:, [1, 2]])) < 1e-9
    assert np.max(np.abs(tr[:, 3] - run.odometry[:, 3])) < 1e-9
    lat, lon = LocalFrame(*origin).to_latlon(run.odometry[:, 1], run.odometry[:, 2])
    assert np.max(np.abs(tr[:, 1] - lat)) < 1e-12 and np.max(np.abs(tr[:, 2] - lon)) < 1e-12
