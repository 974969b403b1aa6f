"""The import/export commands end to end through the CLI: listing, converting, one-line errors."""

import numpy as np
import pytest

from _bag_helpers import ORIGIN, bag_from_run, bag_name, make_run
from tinyloc.cli.main import main
from tinyloc.runfolder import RunFolder


@pytest.fixture(scope="module")
def bag(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    run = make_run(d / "run", np.random.default_rng(5), n_frames=4)
    return bag_from_run(run, bag_name(d, "mcap"), "mcap")


def test_list_shows_topics_and_use(bag, capsys):
    assert main(["import", "bag", str(bag), "--list"]) == 0
    out = capsys.readouterr().out
    assert "ROS 2 bag, 7 topics" in out
    lines = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith("  /")}
    assert lines["/front/image_raw"].endswith("frames")
    assert lines["/imu/data"].endswith("imu.csv") and lines["/wheel/odom"].endswith("odometry.csv")
    assert lines["/gnss/fix"].endswith("gnss.csv") and lines["/front/camera_info"].endswith("camera.toml")
    assert "not picked by default" in out


def test_import_then_export(bag, tmp_path, capsys):
    run = tmp_path / "run"
    origin = ",".join(str(v) for v in ORIGIN)
    rc = main(["import", "bag", str(bag), "-o", str(run), "--truth-topic", "/ins/pose", "--origin", origin, "--quiet"])
    assert rc == 0
    out = capsys.readouterr().out
    assert out.startswith(f"wrote {run}: 4 frames") and "/imu/data: 40/40 kept, 100.00 Hz" in out
    rf = RunFolder.open(run)
    assert len(rf) == 4 and len(rf.truth) == 8
    # A result CSV in the documented columns, exported onto the bag's clock.
    res = tmp_path / "poses.csv"
    res.write_text("t,x,y,yaw,lat,lon,cov_xx,cov_xy,cov_xyaw,cov_yy,cov_yyaw,cov_yawyaw,quality\n"
                   + "".join(f"{float(t)!r},1,2,0.5,nan,nan,0.1,0,0,0.1,0,0.01,tracking\n" for t in rf.frame_t))
    assert main(["export", "bag", str(res), "-o", str(tmp_path / "o.mcap"), "--run", str(run)]) == 0
    assert "4 on /tinyloc/pose, 4 on /tinyloc/quality, 0 on /tinyloc/fix" in capsys.readouterr().out


def test_errors_are_one_line(bag, tmp_path, capsys):
    assert main(["import", "bag", str(tmp_path / "nothing.mcap"), "-o", str(tmp_path / "r")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no such bag file or folder" in err and "Traceback" not in err
    (tmp_path / "junk.mcap").write_bytes(b"not a bag at all" * 10)
    assert main(["import", "bag", str(tmp_path / "junk.mcap"), "-o", str(tmp_path / "r")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "cannot open as a bag" in err
    assert main(["import", "bag", str(bag)]) == 2
    assert "give the run folder to write with -o RUN" in capsys.readouterr().err
    assert main(["import", "bag", str(bag), "-o", str(tmp_path / "r"), "--every", "0"]) == 2
    assert "--every 0: must be a positive whole number" in capsys.readouterr().err
    assert main(["import", "bag", str(bag), "-o", str(tmp_path / "r"), "--truth-topic", "/ins/pose"]) == 2
    assert "give that frame's origin with --origin" in capsys.readouterr().err


def test_missing_rosbags_is_one_line(bag, monkeypatch, capsys):
    import sys

    for name in [m for m in sys.modules if m == "rosbags" or m.startswith("rosbags.")]:
        monkeypatch.setitem(sys.modules, name, None)  # makes "import rosbags..." raise ImportError
    monkeypatch.setitem(sys.modules, "rosbags", None)
    assert main(["import", "bag", str(bag), "--list"]) == 2
    err = capsys.readouterr().err
    assert err == "tinyloc: error: reading or writing bag files needs the optional 'rosbags' package: " \
                  "pip install 'tinyloc[bag]'\n"
