"""Replay harness end to end: outputs, report numbers equal metrics.json, gaps, batch, no-matplotlib fallback.

These tests drive the harness with a test-double localizer (tests/_replay_helpers.py: truth plus seeded
noise); the live loop's own replay is tested in tests/test_replay_loop.py.
"""

import base64
import csv
import html
import json
import math
import re
import sys

import numpy as np
import pytest

from _replay_helpers import NoisyTruth, make_map, make_run
from tinyloc.cli.main import main
from tinyloc.replay import metrics as M
from tinyloc.replay.records import read_csv
from tinyloc.replay.replay import replay_run

HELPER = "_replay_helpers:noisy_truth"
REQUIRED = ("frames", "recall", "median_error_m", "p90_error_m", "median_heading_error_deg", "gnss_median_error_m",
            "inside_95_ellipse", "frame_ms_median")


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    d = tmp_path_factory.mktemp("site")
    return {"run": make_run(d / "loop-a"), "gappy": make_run(d / "loop-gaps", gaps=True), "map": make_map(d / "s.tlm"),
            "dir": d}


def _cells(text):
    return re.findall(r'data-key="([^"]+)" data-value="([^"]*)">([^<]*)</td>', text)


def _get(d, key):
    for k in key.split("/"):
        d = d[int(k)] if isinstance(d, list) else d[k]
    return d


def test_replay_cli_writes_outputs_and_json(site, tmp_path, capsys):
    out = tmp_path / "rep"
    rc = main(["replay", str(site["run"]), "--map", str(site["map"]), "-o", str(out), "--json", "-q",
               "--localizer", HELPER])
    assert rc == 0
    m = json.loads(capsys.readouterr().out)
    for k in REQUIRED:
        assert k in m
    assert set(m["recall"]) == {"0.25m_2deg", "0.5m_2deg", "1m_3deg", "2m_5deg"}
    assert all(0.0 <= v <= 1.0 for v in m["recall"].values())
    assert m["frames"] == 40 and 0.0 <= m["inside_95_ellipse"] <= 1.0
    # Recall grows with the bound; noise 0.3 m per axis puts most frames within 1 m.
    r = [m["recall"][k] for k in ("0.25m_2deg", "0.5m_2deg", "1m_3deg", "2m_5deg")]
    assert r == sorted(r) and r[2] > 0.8
    assert m["gnss_median_error_m"] > m["median_error_m"]
    assert m["run"]["map_from"] == "--map"
    assert (out / "metrics.json").is_file() and (out / "report.html").is_file()
    assert json.loads((out / "metrics.json").read_text()) == m

    # frames.csv: the bag exporter's columns first, one row per frame, errors consistent with the arrays.
    with open(out / "frames.csv") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0])[:13] == ["t", "x", "y", "yaw", "lat", "lon", "cov_xx", "cov_xy", "cov_xyaw", "cov_yy",
                                  "cov_yyaw", "cov_yawyaw", "quality"]
    assert len(rows) == 40
    rec = read_csv(out / "frames.csv")
    m2 = M.compute_metrics(rec)
    assert m2["recall"] == pytest.approx(m["recall"]) and m2["median_error_m"] == pytest.approx(m["median_error_m"],
                                                                                                  abs=1e-3)


def test_report_numbers_equal_metrics_json(site, tmp_path):
    out = tmp_path / "rep"
    assert main(["replay", str(site["run"]), "--map", str(site["map"]), "-o", str(out), "-q",
                 "--localizer", HELPER]) == 0
    m = json.loads((out / "metrics.json").read_text())
    text = (out / "report.html").read_text()
    cells = _cells(text)
    keys = {k for k, _, _ in cells}
    for k in ("recall/0.25m_2deg", "recall/1m_3deg", "median_error_m", "p90_error_m", "median_heading_error_deg",
              "gnss/median_error_m", "inside_95_ellipse", "frame_ms_median", "first_good_fix/time_s", "lost/spells"):
        assert k in keys, k
    for key, raw, shown in cells:
        v = _get(m, html.unescape(key))
        if v is None:
            assert shown == "n/a" and raw == ""
        elif isinstance(v, str):
            assert html.unescape(raw) == v
        else:
            assert float(raw) == v  # the exact value, not a re-computation
            digits = len(shown.split(".")[1]) if "." in shown else 0
            assert float(shown) == pytest.approx(v, abs=0.5 * 10 ** -digits + 1e-12), key
    # Self-contained: images inline, nothing fetched from elsewhere.
    assert "http://" not in text and "https://" not in text and "<script" not in text
    import cv2

    imgs = re.findall(r"base64,([A-Za-z0-9+/=]+)", text)
    assert len(imgs) >= 5  # trajectory, error, recall, calibration, at least one worst frame
    for b in imgs:
        im = cv2.imdecode(np.frombuffer(base64.b64decode(b), np.uint8), cv2.IMREAD_COLOR)
        assert im is not None and im.shape[0] > 10
    assert "No map under the trajectory" not in text


def test_gappy_run_replays_to_the_end_and_reports_gaps(site):
    holder = {}

    def factory(rf):
        holder["loc"] = NoisyTruth(rf)
        return holder["loc"]

    res = replay_run(site["gappy"], factory)
    loc = holder["loc"]
    # 40 frames written, frame 7's image deleted: the reader drops that row, the other 39 are replayed.
    assert res.records.n == 39 and loc.n == 39
    assert res.metrics["frames"] == 39
    g = "\n".join(res.gaps)
    assert "frame file 'frames/000007.png' is missing" in g
    assert "frames: 0.40 s pause after t 1.20 s" in g
    assert g.count("non-finite value (NaN or inf)") == 3
    assert "imu.csv" in g and "truncated last line ignored" in g and "odometry.csv" in g
    assert "gnss.csv: outage" in g
    assert res.metrics["gaps"]["count"] == len(res.gaps)
    # The NaN rows never reach the localizer; the GNSS outage shows as frames without a fix.
    assert loc.nan_rows == 0
    # Fixes at 2 s and 5 s around the outage; with the 2 s age limit frames at 4.2, 4.4, 4.6, 4.8 s have none.
    assert res.metrics["gnss"]["frames_without_fix"] == 4
    assert res.metrics["median_error_m"] is not None and math.isfinite(res.metrics["median_error_m"])


def test_gappy_run_through_cli_lists_gaps_in_report(site, tmp_path):
    out = tmp_path / "g"
    assert main(["replay", str(site["gappy"]), "-o", str(out), "-q", "--localizer", HELPER]) == 0
    text = (out / "report.html").read_text()
    assert "gnss.csv: outage" in text and "truncated last line ignored" in text
    assert "No map under the trajectory: no map given" in text


def test_unreadable_frame_is_data_not_a_crash(site, tmp_path):
    import shutil

    run = tmp_path / "bad-image"
    shutil.copytree(site["run"], run)
    (run / "frames" / "000005.png").write_bytes(b"not a png")
    res = replay_run(run, lambda rf: NoisyTruth(rf))
    assert res.records.n == 40
    assert str(res.records.quality[5]) == "degraded"
    assert res.records.status[5].startswith("image unreadable")
    assert any("frame 5" in g and "unreadable" in g for g in res.gaps)


def test_batch_goes_on_after_a_failing_run(site, tmp_path, capsys):
    bad = tmp_path / "not-a-run"
    bad.mkdir()
    (bad / "run.json").write_text("{broken")
    out = tmp_path / "batch"
    rc = main(["replay", str(site["run"]), str(bad), str(site["gappy"]), "-o", str(out), "--jobs", "2",
               "--localizer", HELPER])
    assert rc == 1
    cap = capsys.readouterr()
    assert "FAILED" in cap.out and "JSON syntax error" in cap.out
    assert "replay" in cap.err and "runs 3/3" in cap.err  # the progress bar on stderr
    summary = json.loads((out / "summary.json").read_text())
    assert [s["error"] is None for s in summary] == [True, False, True]
    assert (out / "loop-a" / "report.html").is_file() and (out / "loop-gaps" / "metrics.json").is_file()
    assert summary[0]["frames"] == 40 and summary[2]["frames"] == 39
    index = (out / "index.html").read_text()
    assert "href='loop-a/report.html'" in index and "failed:" in index


def test_folder_of_runs_and_map_named_by_run_json(site, tmp_path, capsys):
    import shutil

    runs = tmp_path / "drives"
    runs.mkdir()
    r = shutil.copytree(site["run"], runs / "one")
    shutil.copy(site["map"], r / "site.tlm")
    meta = json.loads((r / "run.json").read_text())
    meta["map"] = "site.tlm"
    (r / "run.json").write_text(json.dumps(meta))
    out = tmp_path / "o"
    assert main(["replay", str(runs), "-o", str(out), "--json", "-q", "--jobs", "1", "--localizer", HELPER]) == 0
    m = json.loads(capsys.readouterr().out)
    assert m["run"]["map_from"] == "run.json" and m["run"]["map"].endswith("site.tlm")


def test_bad_input_is_one_line(site, tmp_path, capsys):
    assert main(["replay", str(tmp_path / "nope")]) == 2
    assert capsys.readouterr().err.strip().count("\n") == 0
    assert main(["replay", str(site["run"]), "--map", str(tmp_path / "x.tlm"), "--localizer", HELPER]) == 2
    assert "map file not found" in capsys.readouterr().err
    assert main(["replay", str(site["run"]), "-o", str(tmp_path / "nm"), "-q"]) == 2  # the live loop, no map
    assert "the live loop needs a map: give --map SITE.tlm" in capsys.readouterr().err
    assert main(["replay", str(site["run"]), "--good", "1", "--localizer", HELPER]) == 2
    assert main(["replay", str(site["run"]), "--localizer", "nomodule_xyz:f"]) == 2
    err = capsys.readouterr().err
    assert "cannot load" in err
    # A localizer that breaks is the job failing (status 1), still one line, not a traceback.
    assert main(["replay", str(site["run"]), "-o", str(tmp_path / "b"), "-q",
                 "--localizer", "_replay_helpers:broken"]) == 1
    err = capsys.readouterr().err
    assert "RuntimeError: this localizer always fails to start" in err and err.count("\n") == 1


def test_report_without_matplotlib_states_it_and_uses_tables(site, tmp_path, monkeypatch):
    from tinyloc.replay import report as R

    for name in list(sys.modules):
        if name == "matplotlib" or name.startswith("matplotlib."):
            monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    assert R._mpl() is None
    res = replay_run(site["run"], lambda rf: NoisyTruth(rf))
    p = R.write_run_report(tmp_path / "r.html", res)
    text = p.read_text()
    assert "matplotlib is not installed" in text and "pip install" in text
    assert "position error (m)</th>" in text  # the error table
    assert len(re.findall(r"base64,", text)) >= 2  # the OpenCV trajectory and the worst frames remain


def test_run_without_truth_still_replays_and_reports(site, tmp_path, capsys):
    import shutil

    run = shutil.copytree(site["run"], tmp_path / "no-truth")
    (run / "truth.csv").unlink()
    out = tmp_path / "o"
    assert main(["replay", str(run), "-o", str(out), "--json", "-q", "--localizer", "_replay_helpers:stand_still"]) == 0
    m = json.loads(capsys.readouterr().out)
    assert m["frames"] == 40 and m["frames_with_truth"] == 0
    assert m["recall"]["1m_3deg"] is None and m["median_error_m"] is None and m["inside_95_ellipse"] is None
    assert m["frame_ms_median"] == pytest.approx(0.1)
    text = (out / "report.html").read_text()
    assert "No frames with ground truth to rank." in text and ">n/a</td>" in text


def test_a_localizer_that_raises_on_some_frames_does_not_stop_the_run(site):
    from _replay_helpers import Flaky

    res = replay_run(site["run"], lambda rf: Flaky(rf))
    assert res.records.n == 40
    bad = [i for i in range(40) if str(res.records.status[i]).startswith("localizer raised ValueError")]
    assert bad == list(range(4, 40, 5))
    assert all(res.records.quality[i] == "no-fix" for i in bad)
    assert sum("localizer raised" in g for g in res.gaps) == 8
    assert res.metrics["missed_frames"] == 8


def test_signoff_rules_pass_fail_and_exit_status(site, tmp_path, capsys):
    out = tmp_path / "s"
    rc = main(["replay", str(site["run"]), "-o", str(out), "--json", "-q", "--localizer", HELPER,
               "--require", "recall/2m_5deg>=0.5", "--require", "median_error_m<=0.01",
               "--require", "first_good_fix/time_s<=100"])
    assert rc == 1
    cap = capsys.readouterr()
    m = json.loads(cap.out)
    assert [c["passed"] for c in m["signoff"]["checks"]] == [True, False, True]
    assert m["signoff"]["passed"] is False
    assert "sign-off failed" in cap.err and "median_error_m<=0.01" in cap.err
    text = (out / "report.html").read_text()
    assert "Sign-off: <span class='verdict-bad'>FAILED</span>" in text
    for key, raw, shown in _cells(text):  # the rule values are metrics.json's numbers too
        if key.startswith("signoff/"):
            assert float(raw) == _get(m, key)
    assert main(["replay", str(site["run"]), "-o", str(out), "-q", "--localizer", HELPER,
                 "--require", "recall/1m_3deg>0.5"]) == 0
    assert main(["replay", str(site["run"]), "-q", "--localizer", HELPER, "--require", "recall >= lots"]) == 2
    assert "--require: expected KEY>=NUMBER" in capsys.readouterr().err


def test_compare_with_an_earlier_replay(site, tmp_path, capsys):
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["replay", str(site["run"]), "-o", str(a), "-q", "--localizer", HELPER]) == 0
    capsys.readouterr()
    assert main(["replay", str(site["gappy"]), "-o", str(b), "-q", "--json", "--localizer", HELPER,
                 "--compare", str(a)]) == 0
    m = json.loads(capsys.readouterr().out)
    before = json.loads((a / "metrics.json").read_text())
    f = m["compare"]["figures"]
    assert m["compare"]["with"] == str(a / "metrics.json") and m["compare"]["same_frames"] is False
    assert f["recall|1m_3deg"]["before"] == before["recall"]["1m_3deg"]
    assert f["recall|1m_3deg"]["now"] == m["recall"]["1m_3deg"]
    assert f["median_error_m"]["change"] == pytest.approx(m["median_error_m"] - before["median_error_m"])
    text = (b / "report.html").read_text()
    assert "Compared with an earlier replay" in text and "a different number of frames" in text
    for key, raw, shown in _cells(text):
        if key.startswith("compare/"):
            v = _get(m, html.unescape(key))
            assert (raw == "" and v is None) or float(raw) == v
    assert main(["replay", str(site["run"]), "-q", "--localizer", HELPER, "--compare", str(tmp_path / "none")]) == 2
