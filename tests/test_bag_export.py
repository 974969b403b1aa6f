"""Export of pose estimates, read back with the rosbags library (reference reader) and SciPy rotations."""

import math

import numpy as np
import pytest
from rosbags.highlevel import AnyReader
from rosbags.typesys import Stores, get_typestore
from scipy.spatial.transform import Rotation

from tinyloc.bagio.export_bag import RESULT_COLUMNS, UNSET_VARIANCE, export_bag
from tinyloc.errors import InputError


def _result_csv(path, rng, n=12):
    rows = []
    q = ["searching", "tracking", "tracking", "degraded", "no-fix"]
    for i in range(n):
        a = rng.normal(size=(3, 3))
        c = a @ a.T * 0.1
        yaw = rng.uniform(-3.1, 3.1)
        nan = i == n - 1  # the last frame has no pose at all
        vals = [0.1 * i + 0.05, np.nan if nan else rng.uniform(-50, 50), rng.uniform(-50, 50), yaw,
                12.3456 + 1e-5 * i, -45.6789, c[0, 0], c[0, 1], c[0, 2], c[1, 1], c[1, 2], c[2, 2]]
        rows.append(vals + [q[i % len(q)]])
    with open(path, "w") as f:
        f.write("# tinyloc result\n" + ",".join(RESULT_COLUMNS) + ",extra\n")
        for r in rows:
            f.write(",".join(repr(float(v)) for v in r[:-1]) + f",{r[-1]},x\n")
    return rows


@pytest.mark.parametrize("suffix", [".mcap", ".bag"])
def test_export_reads_back(tmp_path, rng, suffix):
    rows = _result_csv(tmp_path / "poses.csv", rng)
    base = 1_700_000_123 * 10**9
    out = tmp_path / f"est{suffix}"
    res = export_bag(tmp_path, out, time_base_ns=base)
    assert out.is_file() and not any(p.name.startswith(".") for p in tmp_path.iterdir())
    ts = get_typestore(Stores.ROS1_NOETIC if suffix == ".bag" else Stores.ROS2_HUMBLE)
    got = {"/tinyloc/pose": [], "/tinyloc/quality": [], "/tinyloc/fix": []}
    with AnyReader([out], default_typestore=ts) as r:
        types = {c.topic: c.msgtype for c in r.connections}
        assert types == {"/tinyloc/pose": "geometry_msgs/msg/PoseWithCovarianceStamped",
                         "/tinyloc/quality": "std_msgs/msg/String", "/tinyloc/fix": "sensor_msgs/msg/NavSatFix"}
        for c, t, raw in r.messages():
            got[c.topic].append((t, r.deserialize(raw, c.msgtype)))
    assert [m.data for _, m in got["/tinyloc/quality"]] == [r[-1] for r in rows]
    assert len(got["/tinyloc/pose"]) == len(rows) - 1 == res["messages"]["/tinyloc/pose"]
    for (t, m), row in zip(got["/tinyloc/pose"], rows):
        stamp = m.header.stamp.sec * 10**9 + m.header.stamp.nanosec
        assert stamp == t == base + round(row[0] * 1e9)
        assert m.header.frame_id == "map"
        p, o = m.pose.pose.position, m.pose.pose.orientation
        assert (p.x, p.y, p.z) == (row[1], row[2], 0.0)
        yaw = Rotation.from_quat([o.x, o.y, o.z, o.w]).as_euler("ZYX")[0]
        assert abs(math.remainder(yaw - row[3], 2 * math.pi)) < 1e-12
        cov = np.asarray(m.pose.covariance).reshape(6, 6)
        c3 = np.array([[row[6], row[7], row[8]], [row[7], row[9], row[10]], [row[8], row[10], row[11]]])
        assert np.array_equal(cov[np.ix_([0, 1, 5], [0, 1, 5])], c3)
        assert np.array_equal(np.diag(cov)[2:5], [UNSET_VARIANCE] * 3) and np.array_equal(cov, cov.T)
    fixes = [m for _, m in got["/tinyloc/fix"]]
    assert [f.status.status for f in fixes] == [-1 if r[-1] == "no-fix" else 0 for r in rows[:-1]]
    assert fixes[1].latitude == rows[1][4] and fixes[1].position_covariance_type == 3


def test_export_uses_run_time_base_and_rejects_bad_input(tmp_path, rng):
    import json

    _result_csv(tmp_path / "r.csv", rng, n=3)
    (tmp_path / "run").mkdir()
    (tmp_path / "run" / "run.json").write_text(json.dumps({"time_base_ns": 5 * 10**9}))
    res = export_bag(tmp_path / "r.csv", tmp_path / "a.mcap", run=tmp_path / "run")
    assert res["first_stamp_ns"] == 5 * 10**9 + 50_000_000
    with pytest.raises(InputError, match="exists already"):
        export_bag(tmp_path / "r.csv", tmp_path / "a.mcap")
    with pytest.raises(InputError, match=r"must end in \.mcap .* or \.bag"):
        export_bag(tmp_path / "r.csv", tmp_path / "a.db3")
    (tmp_path / "bad.csv").write_text("t,x,y,yaw,quality\n0,1,2,3,tracking\n")
    with pytest.raises(InputError, match="header lacks column"):
        export_bag(tmp_path / "bad.csv", tmp_path / "b.mcap")
    lines = (tmp_path / "r.csv").read_text().splitlines()
    lines[3] = lines[3].replace("tracking", "confident")
    (tmp_path / "q.csv").write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError, match="q.csv row 2: quality 'confident' is not one of"):
        export_bag(tmp_path / "q.csv", tmp_path / "c.mcap")
    assert not (tmp_path / "c.mcap").exists() and not (tmp_path / ".c.mcap.partial").exists()


def test_export_reads_the_replay_per_frame_csv(tmp_path):
    from tinyloc.replay.records import FrameRecords, write_csv

    rec = FrameRecords(3)
    rec.t[:] = [0.1, 0.2, 0.3]
    rec.x[:] = [1.0, 2.0, np.nan]
    rec.y[:] = [5.0, 6.0, np.nan]
    rec.yaw[:] = [0.1, 0.2, np.nan]
    rec.cov[:2] = np.diag([0.04, 0.09, 0.001])
    rec.quality[:] = ["tracking", "degraded", "no-fix"]
    (tmp_path / "rep").mkdir()
    write_csv(rec, tmp_path / "rep" / "frames.csv")
    res = export_bag(tmp_path / "rep", tmp_path / "o.mcap", time_base_ns=10**18)
    assert res["messages"] == {"/tinyloc/pose": 2, "/tinyloc/quality": 3, "/tinyloc/fix": 0}
    with AnyReader([tmp_path / "o.mcap"]) as r:
        poses = [r.deserialize(raw, c.msgtype) for c, _, raw in r.messages() if c.topic == "/tinyloc/pose"]
    assert [p.pose.pose.position.x for p in poses] == [1.0, 2.0]
    assert np.asarray(poses[1].pose.covariance).reshape(6, 6)[1, 1] == 0.09
