"""Resuming a stopped import: the resumed folder equals an uninterrupted import of the same bag, byte for byte.

The bags are written with the rosbags library's writers (tests/_bag_helpers.py). The reference is an
uninterrupted import of the same bag with the same options; interruptions are simulated as in
test_bag_broken.py (Ctrl-C raised from inside the writer, a reader failing part-way).
"""

import json
import os

import numpy as np
import pytest

from _bag_helpers import bag_from_run, bag_name, make_run, ORIGIN, reader_failing_after
from tinyloc.bagio import import_bag as ib
from tinyloc.bagio.import_bag import ImportOptions, StopImport, import_bag
from tinyloc.cli.main import main
from tinyloc.errors import InputError
from tinyloc.runfolder import RunFolder

CSVS = ("frames", "imu", "odometry", "gnss", "truth")


def _opts(**kw):
    return ImportOptions(truth_topic="/ins/pose", origin=ORIGIN, progress=False, **kw)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("src") / "run", np.random.default_rng(4242), n_frames=8)


@pytest.fixture(scope="module")
def bags(run, tmp_path_factory):
    d = tmp_path_factory.mktemp("bags")
    return {"raw": bag_from_run(run, bag_name(d, "mcap", "raw"), "mcap"),
            "file": bag_from_run(run, bag_name(d, "ros1", "file"), "ros1", image="file")}


def _interrupt_at(monkeypatch, method: str, n: int):
    """Raise KeyboardInterrupt at the n-th call of BagRunWriter.<method> (a Ctrl-C mid-import)."""
    real = getattr(ib.BagRunWriter, method)
    calls = {"n": 0}

    def hooked(self, *a, **k):
        calls["n"] += 1
        if calls["n"] == n:
            raise KeyboardInterrupt
        return real(self, *a, **k)

    monkeypatch.setattr(ib.BagRunWriter, method, hooked)


def _same_folder(ref, out):
    """Every CSV and frame file byte-identical, nothing extra in frames/."""
    for name in CSVS:
        a, b = ref / f"{name}.csv", out / f"{name}.csv"
        assert a.read_bytes() == b.read_bytes(), name
    assert sorted(p.name for p in (ref / "frames").iterdir()) == sorted(p.name for p in (out / "frames").iterdir())
    for p in (ref / "frames").iterdir():
        assert p.read_bytes() == (out / "frames" / p.name).read_bytes(), p.name
    rows = (out / "imu.csv").read_text().splitlines()[1:]
    assert len(rows) == len(set(rows))  # no duplicates (the stamps are distinct in this drive)


def _check_resumed(ref_res, res, ref, out):
    _same_folder(ref, out)
    meta = json.loads((out / "run.json").read_text())
    assert meta["complete"] is True and meta["import"]["state"] == "complete" and meta["import"]["resumed"] == 1
    assert res.complete and res.counts == ref_res.counts
    # The per-topic stamp report covers the whole window, as the uninterrupted import's does.
    assert res.report["topics"] == ref_res.report["topics"]
    assert res.report["written"] == ref_res.report["written"]
    rf = RunFolder.open(out)
    assert rf.warnings == [] and len(rf) == ref_res.counts["frames"]


@pytest.mark.parametrize("kind,method,n,every", [("raw", "add_imu", 25, 1),
                                                  ("raw", "add_frame_bytes", 4, 1),
                                                  ("file", "add_frame_bytes", 3, 2),
                                                  ("file", "add_truth", 7, 1)])
def test_interrupted_then_resumed_equals_uninterrupted(bags, tmp_path, monkeypatch, kind, method, n, every):
    bag = bags[kind]
    ref_res = import_bag(bag, tmp_path / "ref", _opts(every=every))
    with monkeypatch.context() as mp:
        _interrupt_at(mp, method, n)
        with pytest.raises(KeyboardInterrupt):
            import_bag(bag, tmp_path / "out", _opts(every=every))
    meta = json.loads((tmp_path / "out" / "run.json").read_text())
    assert meta["complete"] is False
    held = RunFolder.open(tmp_path / "out", strict=False)
    assert 0 < len(held.imu) + len(held) < len(RunFolder.open(tmp_path / "ref").imu) + ref_res.counts["frames"]
    res = import_bag(bag, tmp_path / "out", _opts(every=every), resume=True)
    _check_resumed(ref_res, res, tmp_path / "ref", tmp_path / "out")


def test_reader_failure_then_resume(bags, tmp_path, monkeypatch):
    bag = bags["raw"]
    ref_res = import_bag(bag, tmp_path / "ref", _opts(workers=2))
    failing = reader_failing_after(60)

    with monkeypatch.context() as mp:
        mp.setattr(ib._Importer, "_run", failing)
        with pytest.raises(StopImport):
            import_bag(bag, tmp_path / "out", _opts(workers=2))
    res = import_bag(bag, tmp_path / "out", _opts(workers=1), resume=True)  # workers do not change the output
    _check_resumed(ref_res, res, tmp_path / "ref", tmp_path / "out")


def test_torn_rows_and_half_written_frames_before_resume(bags, tmp_path, monkeypatch):
    # What a recorder killed mid-write (or a power loss) leaves: a CSV row without its newline, a frame
    # file written only in part that frames.csv does not list yet, and a listed frame whose file is cut.
    bag = bags["raw"]
    ref_res = import_bag(bag, tmp_path / "ref", _opts())
    with monkeypatch.context() as mp:
        _interrupt_at(mp, "add_frame_bytes", 5)
        with pytest.raises(KeyboardInterrupt):
            import_bag(bag, tmp_path / "out", _opts())
    out = tmp_path / "out"
    frames = (out / "frames.csv").read_text().splitlines()
    n = len(frames) - 1
    assert n == 4
    last = out / frames[-1].split(",")[1]
    last.write_bytes(last.read_bytes()[: last.stat().st_size // 2])  # a listed frame, cut
    whole = (tmp_path / "ref" / "frames" / f"{n:06d}.png").read_bytes()
    (out / "frames" / f"{n:06d}.png").write_bytes(whole[: len(whole) // 3])  # not listed yet, cut
    with open(out / "frames.csv", "a") as fh:
        fh.write(f"0.9,frames/{n:06d}.p")
    for name in ("imu", "odometry", "truth"):
        with open(out / f"{name}.csv", "a") as fh:
            fh.write("0.7,1.25")
    assert any("truncated last line" in w for w in RunFolder.open(out, strict=False).warnings)
    res = import_bag(bag, out, _opts(), resume=True)
    _check_resumed(ref_res, res, tmp_path / "ref", out)


@pytest.fixture
def stopped(bags, tmp_path, monkeypatch):
    """An import of the raw bag stopped by Ctrl-C after 25 IMU rows."""
    with monkeypatch.context() as mp:
        _interrupt_at(mp, "add_imu", 25)
        with pytest.raises(KeyboardInterrupt):
            import_bag(bags["raw"], tmp_path / "out", _opts())
    return tmp_path / "out"


def _snapshot(folder):
    return {p.relative_to(folder): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_resume_refused_for_another_bag(bags, stopped):
    before = _snapshot(stopped)
    with pytest.raises(InputError) as e:
        import_bag(bags["file"], stopped, _opts(), resume=True)
    msg = str(e.value)
    assert "\n" not in msg and "was imported from" in msg and "cannot resume" in msg
    assert _snapshot(stopped) == before


def test_resume_refused_for_a_changed_bag(bags, stopped, tmp_path):
    # The same recording rewritten (same size and bytes, new modification time) is not trusted either.
    f = next(bags["raw"].glob("*.mcap"))
    st = f.stat()
    try:
        os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
        with pytest.raises(InputError, match="is not that bag as it was"):
            import_bag(bags["raw"], stopped, _opts(), resume=True)
    finally:
        os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))


def test_resume_refused_for_other_options(bags, stopped):
    before = _snapshot(stopped)
    with pytest.raises(InputError) as e:
        import_bag(bags["raw"], stopped, _opts(every=2, gnss_topic="none"), resume=True)
    msg = str(e.value)
    assert "\n" not in msg and "(changed: every, gnss_topic)" in msg
    assert _snapshot(stopped) == before


def test_resume_refused_for_a_complete_folder(bags, tmp_path, capsys):
    import_bag(bags["raw"], tmp_path / "done", _opts())
    before = _snapshot(tmp_path / "done")
    rc = main(["import", "bag", str(bags["raw"]), "-o", str(tmp_path / "done"), "--truth-topic", "/ins/pose",
               "--origin", ",".join(map(str, ORIGIN)), "--quiet", "--resume"])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "the import is complete" in err and "nothing to resume" in err
    assert _snapshot(tmp_path / "done") == before
    with pytest.raises(InputError, match="no run.json, nothing to resume"):
        import_bag(bags["raw"], tmp_path / "nowhere", _opts(), resume=True)


def test_resume_through_the_cli(bags, stopped, tmp_path, capsys):
    ref_res = import_bag(bags["raw"], tmp_path / "ref", _opts())
    rc = main(["import", "bag", str(bags["raw"]), "-o", str(stopped), "--truth-topic", "/ins/pose",
               "--origin", ",".join(map(str, ORIGIN)), "--quiet", "--resume"])
    out = capsys.readouterr().out
    assert rc == 0 and "note: resumed: frames up to t = " in out
    assert out.startswith(f"wrote {stopped}: {ref_res.counts['frames']} frames, {ref_res.counts['imu']} imu")
    _same_folder(tmp_path / "ref", stopped)
