"""Run-folder reader/writer: round trip, and a table of malformed folders each with a clear message."""

import json

import numpy as np
import pytest

from tinyloc.camera.model import CameraModel
from tinyloc.errors import RunFolderError
from tinyloc.runfolder import RunFolder, RunWriter, check_run

CAM = CameraModel(width=32, height=24, fx=30.0, fy=30.0, cx=15.5, cy=11.5)
ORIGIN = (12.3456, -45.6789, 31.0)


def _write(path, n=4, *, ext=".png"):
    rng = np.random.default_rng(7)
    with RunWriter(path, camera=CAM, origin=ORIGIN, name="t", source="test", image_ext=ext) as w:
        for i in range(n):
            t = 0.1 * i
            img = rng.integers(0, 255, (24, 32, 3), dtype=np.uint8)
            w.add_frame(t, img, label=np.full((24, 32), i, np.uint8))
            w.add_imu(t, 0.01 * i, 0.0, 9.81)
            w.add_odometry(t, 0.5 * i, 0.0, 0.01 * i)
            w.add_gnss(t, ORIGIN[0] + 1e-6 * i, ORIGIN[1], 31.0, 2.5)
            w.add_truth(t, ORIGIN[0], ORIGIN[1], 0.1, 0.5 * i, 0.0)
    return path


def test_round_trip_exact(tmp_path):
    run = _write(tmp_path / "run")
    rf = RunFolder.open(run)
    assert rf.warnings == []
    assert len(rf) == 4 and rf.frame_files[2] == "frames/000002.png"
    np.testing.assert_array_equal(rf.frame_t, [0.0, 0.1, 0.2, 0.30000000000000004])
    assert rf.imu.shape == (4, 4) and rf.imu[3, 1] == 0.03
    assert rf.odometry[2, 3] == 0.02
    assert rf.gnss[1, 1] == ORIGIN[0] + 1e-6  # repr() text reads back to the identical float
    assert rf.truth.shape == (4, 6)
    assert rf.meta["complete"] is True and rf.frame.lat0_deg == ORIGIN[0]
    img = rf.load_frame(1)
    assert img.shape == (24, 32, 3) and img.dtype == np.uint8
    rng = np.random.default_rng(7)
    rng.integers(0, 255, (24, 32, 3), dtype=np.uint8)
    np.testing.assert_array_equal(img, rng.integers(0, 255, (24, 32, 3), dtype=np.uint8))  # PNG is lossless
    assert rf.load_frame(1, color=False).shape == (24, 32)
    assert int(rf.load_label(3)[0, 0]) == 3


def test_jpeg_frames(tmp_path):
    rf = RunFolder.open(_write(tmp_path / "run", ext=".jpg"))
    assert rf.frame_files[0].endswith(".jpg") and rf.load_frame(0).shape == (24, 32, 3)


def test_interrupted_writer_leaves_incomplete(tmp_path):
    with pytest.raises(ZeroDivisionError):
        with RunWriter(tmp_path / "run", camera=CAM, origin=ORIGIN) as w:
            w.add_frame(0.0, np.zeros((24, 32, 3), np.uint8))
            1 / 0
    rf = RunFolder.open(tmp_path / "run")
    assert rf.meta["complete"] is False
    assert any("complete" in m for m in rf.warnings)


def test_writer_refuses_nonempty_folder(tmp_path):
    _write(tmp_path / "run")
    with pytest.raises(ValueError, match="not empty"):
        RunWriter(tmp_path / "run", camera=CAM)


def _edit(path, name, fn):
    p = path / name
    p.write_text(fn(p.read_text()))


def _replace_line(k, new):
    def f(text):
        lines = text.split("\n")
        lines[k - 1] = new
        return "\n".join(lines)
    return f


# (case id, mutation, expected message fragment); each message must name the file (and line where one exists).
CASES = [
    ("no run.json", lambda p: (p / "run.json").unlink(), "run.json: missing"),
    ("bad json", lambda p: _edit(p, "run.json", lambda s: s.replace('"name"', 'name', 1)),
     "run.json line 4: JSON syntax error"),
    ("wrong format", lambda p: _edit(p, "run.json", lambda s: s.replace("tinyloc-run", "other")),
     "run.json: format is 'other'"),
    ("future version", lambda p: _edit(p, "run.json", lambda s: s.replace('"version": 1', '"version": 9')),
     "run.json: version 9 is newer"),
    ("bad origin", lambda p: _edit(p, "run.json", lambda s: s.replace('"lat": 12.3456', '"lat": 123.0')),
     "run.json: origin"),
    ("no camera", lambda p: (p / "camera.toml").unlink(), "camera.toml: missing"),
    ("bad camera", lambda p: _edit(p, "camera.toml", lambda s: s.replace("fx = 30.0", "fx = -3.0")),
     "camera.toml: focal lengths"),
    ("no frames.csv", lambda p: (p / "frames.csv").unlink(), "frames.csv: missing"),
    ("frames header", lambda p: _edit(p, "frames.csv", _replace_line(1, "time,file")),
     "frames.csv line 1: header has no column 't'"),
    ("missing frame file", lambda p: (p / "frames" / "000001.png").unlink(),
     "frames.csv line 3: frame file 'frames/000001.png' is missing"),
    ("frame time backwards", lambda p: _edit(p, "frames.csv", _replace_line(3, "0.0,frames/000001.png")),
     "frames.csv line 3: time 0.0 s does not increase"),
    ("frame outside folder", lambda p: _edit(p, "frames.csv", _replace_line(3, "0.1,../x.png")),
     "frames.csv line 3: file '../x.png' is outside the run folder"),
    ("imu NaN", lambda p: _edit(p, "imu.csv", _replace_line(3, "0.1,nan,0.0,9.81")),
     "imu.csv line 3: non-finite value (NaN or inf) in fx"),
    ("imu not a number", lambda p: _edit(p, "imu.csv", _replace_line(2, "0.0,zero,0.0,9.81")),
     "imu.csv line 2: 'zero' is not a number"),
    ("imu short row", lambda p: _edit(p, "imu.csv", _replace_line(2, "0.0,0.0")),
     "imu.csv line 2: has 2 fields, header has 4"),
    ("odometry backwards", lambda p: _edit(p, "odometry.csv", _replace_line(4, "0.05,1.0,0.0,0.0")),
     "odometry.csv line 4: time 0.05 s goes backwards"),
    ("odometry header", lambda p: _edit(p, "odometry.csv", _replace_line(1, "t,x,y,theta")),
     "odometry.csv line 1: header has no column 'yaw'"),
    ("gnss bad accuracy", lambda p: _edit(p, "gnss.csv", _replace_line(2, "0.0,12.3456,-45.6789,31.0,0.0")),
     "gnss.csv line 2: acc_m 0.0 must be positive"),
    ("gnss latitude", lambda p: _edit(p, "gnss.csv", _replace_line(2, "0.0,95.0,-45.6789,31.0,2.0")),
     "gnss.csv line 2: latitude/longitude (95.0, -45.6789) out of range"),
    ("truth without origin", lambda p: _edit(p, "run.json", lambda s: json.dumps(
        {k: v for k, v in json.loads(s).items() if k != "origin"})),
     "run.json: truth.csv is present but run.json has no origin"),
    ("empty imu", lambda p: (p / "imu.csv").write_text(""), "imu.csv: empty file"),
    ("not utf-8", lambda p: (p / "gnss.csv").write_bytes(b"t,lat,lon,h,acc_m\n\xff\xfe\n"),
     "gnss.csv line 2: not UTF-8 text"),
]


@pytest.mark.parametrize("case,mutate,expect", CASES, ids=[c[0] for c in CASES])
def test_malformed_folders(tmp_path, case, mutate, expect):
    run = _write(tmp_path / "run")
    mutate(run)
    with pytest.raises(RunFolderError) as ei:
        RunFolder.open(run)
    msg = str(ei.value)
    assert "\n" not in msg
    assert msg.startswith(str(run)), msg
    assert expect in msg, msg


def test_lenient_mode_drops_bad_rows_and_keeps_the_rest(tmp_path):
    run = _write(tmp_path / "run")
    _edit(run, "imu.csv", _replace_line(3, "0.1,nan,0.0,9.81"))
    (run / "frames" / "000002.png").unlink()
    rf = RunFolder.open(run, strict=False)
    assert rf.imu.shape == (3, 4) and rf.frame_files == ["frames/000000.png", "frames/000001.png",
                                                         "frames/000003.png"]
    probs = check_run(run)
    assert any(p.startswith("imu.csv line 3: non-finite") for p in probs)
    assert any(p.startswith("frames.csv line 4: frame file") for p in probs)


def test_truncated_last_line_is_a_warning(tmp_path):
    run = _write(tmp_path / "run")
    p = run / "imu.csv"
    p.write_text(p.read_text() + "0.4,0.0")  # recorder killed mid-row: no newline, too few fields
    f = run / "frames.csv"
    f.write_text(f.read_text() + "0.4,frames/0000")
    rf = RunFolder.open(run)
    assert rf.imu.shape == (4, 4) and len(rf) == 4
    assert "imu.csv line 6: truncated last line ignored (has 2 fields, header has 4)" in rf.warnings
    assert any(w.startswith("frames.csv line 6: truncated last line ignored") for w in rf.warnings)


def test_same_fault_mid_file_is_an_error(tmp_path):
    run = _write(tmp_path / "run")
    _edit(run, "imu.csv", lambda s: s.replace("0.1,0.01,0.0,9.81\n", "0.1,0.0\n"))
    with pytest.raises(RunFolderError, match=r"imu.csv line 3: has 2 fields"):
        RunFolder.open(run)


def test_comments_blank_lines_extra_columns(tmp_path):
    run = _write(tmp_path / "run")
    (run / "odometry.csv").write_text("# wheel odometry from my robot\nt,x,y,yaw,v\n\n0.0,1,2,0.5,9\n"
                                      "# pause\n0.2,1.5,2,0.5,9\n")
    (run / "gnss.csv").unlink()
    rf = RunFolder.open(run)
    np.testing.assert_array_equal(rf.odometry, [[0.0, 1, 2, 0.5], [0.2, 1.5, 2, 0.5]])
    assert rf.gnss.shape == (0, 5) and "gnss.csv: absent (the run has no such samples)" in rf.warnings


def test_corrupt_frame_is_rejected_alone(tmp_path):
    run = _write(tmp_path / "run")
    (run / "frames" / "000001.png").write_bytes(b"\x89PNG garbage")
    rf = RunFolder.open(run)
    with pytest.raises(RunFolderError, match=r"000001.png: cannot decode image \(frames.csv line 3\)"):
        rf.load_frame(1)
    assert rf.load_frame(2).shape == (24, 32, 3)


def test_frame_size_mismatch(tmp_path):
    import cv2
    run = _write(tmp_path / "run")
    cv2.imwrite(str(run / "frames" / "000000.png"), np.zeros((10, 10, 3), np.uint8))
    with pytest.raises(RunFolderError, match="image is 10x10, camera.toml says 32x24"):
        RunFolder.open(run).load_frame(0)


def test_not_a_directory(tmp_path):
    with pytest.raises(RunFolderError, match="not a directory"):
        RunFolder.open(tmp_path / "nothing")


def test_line_length_limit(tmp_path):
    from tinyloc.runfolder import MAX_LINE_CHARS

    run = _write(tmp_path / "run")
    base = "0.35,0.0,0.0,9.81,"
    ok = base + "x" * (MAX_LINE_CHARS - len(base))  # extra column, exactly at the limit
    p = run / "imu.csv"
    p.write_text("t,fx,fy,fz,note\n" + ok + "\n")
    assert RunFolder.open(run).imu.shape == (1, 4)
    p.write_text("t,fx,fy,fz,note\n" + ok + "x\n")
    with pytest.raises(RunFolderError, match=f"imu.csv line 2: line longer than {MAX_LINE_CHARS} characters"):
        RunFolder.open(run)


def test_every_truncation_is_read_or_rejected_cleanly(tmp_path):
    run = _write(tmp_path / "run")
    full = (run / "imu.csv").read_bytes()
    ref = RunFolder.open(run).imu
    for k in range(len(full)):
        (run / "imu.csv").write_bytes(full[:k])
        try:
            rf = RunFolder.open(run)
        except RunFolderError as e:
            assert "imu.csv" in str(e)
            continue
        assert rf.imu.shape[0] <= 4 and np.all(np.isfinite(rf.imu))
        # what was read is the true rows, but for a cut-short number in the last row (cannot be told apart)
        # (a cut inside the last field still parses; every other cut is dropped as a truncated last line)
        n = len(rf.imu)
        if n:
            np.testing.assert_array_equal(rf.imu[:n - 1], ref[:n - 1])
            assert rf.imu[n - 1, 0] == ref[n - 1, 0]


def test_fuzzed_files_never_escape_as_other_exceptions(tmp_path):
    run = _write(tmp_path / "run")
    rng = np.random.default_rng(2024)
    names = ["run.json", "frames.csv", "imu.csv", "odometry.csv", "gnss.csv", "truth.csv", "camera.toml"]
    originals = {n: (run / n).read_bytes() for n in names}
    for trial in range(300):
        n = names[trial % len(names)]
        b = bytearray(originals[n])
        for _ in range(int(rng.integers(1, 4))):
            op = rng.integers(0, 3)
            i = int(rng.integers(0, len(b)))
            if op == 0:
                b[i] = int(rng.integers(0, 256))
            elif op == 1:
                del b[i]
            else:
                b.insert(i, int(rng.choice(list(b",.\n-e#n"))))
        (run / n).write_bytes(bytes(b))
        try:
            rf = RunFolder.open(run)
            for a in (rf.imu, rf.odometry, rf.gnss):
                assert np.all(np.isfinite(a))
        except RunFolderError as e:
            assert "\n" not in str(e)
        for p in check_run(run):
            assert isinstance(p, str)
        (run / n).write_bytes(originals[n])
