"""Smaller parts of replay: gap finding, worst-frame choice, the map backdrop's geometry, the progress bar."""

import io
import math

import numpy as np

from _replay_helpers import make_map
from tinyloc.classes import TREE
from tinyloc.replay.batch import Bar, format_table, summary_row, wheel_scale_hint
from tinyloc.replay.gaps import GapParams, frame_gaps, gnss_outages, stream_gaps
from tinyloc.replay.records import FrameRecords
from tinyloc.replay.replay import worst_frames


def test_stream_gaps_hand_worked():
    t = [0.0, 0.1, 0.2, 0.3, 1.5, 1.6, 1.7]  # median interval 0.1 s -> limit max(0.25, 0.25) = 0.25 s
    g = stream_gaps(t, "imu.csv", GapParams(), t_first=-1.0, t_last=2.0)
    assert g == ["imu.csv: no samples for 1.20 s (t 0.30 .. 1.50 s)",
                 "imu.csv: starts 1.00 s after the first frame",
                 "imu.csv: stops 0.30 s before the last frame"]
    assert stream_gaps([], "gnss.csv", GapParams()) == ["gnss.csv: no samples at all"]


def test_frame_gaps_see_one_dropped_frame():
    t = np.array([0.0, 0.2, 0.4, 0.8, 1.0, 1.6])  # one frame missing after 0.4 s, two after 1.0 s
    assert frame_gaps(t, GapParams()) == ["frames: 0.40 s pause after t 0.40 s (about 1 frames missing)",
                                         "frames: 0.60 s pause after t 1.00 s (about 2 frames missing)"]


def test_gnss_outages_hand_worked():
    # Fixes at 0, 1, 2 and 6 s; frames every 0.5 s; a fix is stale when older than 1.5 s.
    spans = gnss_outages([0.0, 1.0, 2.0, 6.0], np.arange(0.0, 7.01, 0.5), 1.5)
    assert spans == [(4.0, 5.5)]  # at 3.5 s the 2 s fix is exactly 1.5 s old: still usable
    assert gnss_outages([], [0.0, 1.0], 2.0) == [(0.0, 1.0)]


def test_worst_frames_prefer_wrong_estimates():
    rec = FrameRecords(6)
    rec.truth_x[:] = rec.truth_y[:] = rec.truth_yaw[:] = 0.0
    rec.x[:] = [0.1, 5.0, math.nan, 0.2, 3.0, math.nan]
    rec.y[:] = rec.yaw[:] = 0.0
    assert worst_frames(rec, 2) == [1, 4]
    # Four frames have an estimate; the fifth place goes to the first miss (frame 2).
    assert worst_frames(rec, 5) == [0, 1, 2, 3, 4]
    assert set(worst_frames(rec, 6)) == set(range(6))


def test_map_backdrop_puts_cells_where_the_raster_convention_says(tmp_path):
    from tinyloc.maps.packfile import PackedMap
    from tinyloc.replay.report import colour_classes, map_backdrop

    pm = PackedMap.open(make_map(tmp_path / "m.tlm"))
    bd, note = map_backdrop(pm, [[0.0, 0.0], [10.0, 5.0]], margin_m=5.0)
    assert bd is not None and note == ""
    # The helper map has a tree disc of radius 1 m at (5, 2); its centre cell must carry the tree colour.
    r = int((bd.y_max - 2.0) / bd.res_m)
    c = int((5.0 - bd.x_min) / bd.res_m)
    one = np.zeros((9, 1, 1), np.float32)
    one[TREE] = 1.0
    np.testing.assert_array_equal(bd.image_bgr[r, c], colour_classes(one)[0, 0])
    far = bd.image_bgr[int((bd.y_max - 4.5) / bd.res_m), int((1.0 - bd.x_min) / bd.res_m)]
    assert not np.array_equal(far, bd.image_bgr[r, c])
    # Read block by block (512-cell blocks): a 700 m wide area equals one direct read of the same cells.
    bd3, _ = map_backdrop(pm, [[-340.0, 0.0], [340.0, 0.0]], margin_m=5.0)
    h3, w3 = bd3.image_bgr.shape[:2]
    assert bd3.res_m == 0.5 and w3 > 512
    r0, c0 = pm.cell_of(bd3.x_min + 0.25, bd3.y_max - 0.25)
    direct = np.zeros((9, h3, w3), np.float32)
    known = np.zeros((h3, w3), np.uint8)
    pm.read_window(math.floor(r0), math.floor(c0), direct, known_out=known)
    ref = colour_classes(direct)
    ref[known == 0] = (225, 225, 225)
    np.testing.assert_array_equal(bd3.image_bgr, ref)
    # Wider than 2400 cells: shrunk by a whole factor (here 2: 1 m per pixel).
    bd4, _ = map_backdrop(pm, [[-700.0, 0.0], [700.0, 0.0]])
    assert bd4.res_m == 1.0 and bd4.image_bgr.shape[1] <= 2400
    # Too large an area is refused with a reason, not drawn.
    bd2, note2 = map_backdrop(pm, [[0.0, 0.0], [30000.0, 0.0]])
    assert bd2 is None and "more than the report draws" in note2


def test_backdrop_ignores_wild_estimates():
    from tinyloc.replay.report import backdrop_points

    rec = FrameRecords(3)
    rec.truth_x[:] = [0.0, 10.0, 20.0]
    rec.truth_y[:] = 0.0
    rec.x[:] = [1.0, 5000.0, 21.0]
    rec.y[:] = 0.0
    pts = backdrop_points(rec)
    assert pts[:, 0].max() == 21.0 and len(pts) == 5


def test_progress_bar_lines_without_terminal():
    s = io.StringIO()
    b = Bar(2, stream=s)
    for k in range(1, 11):
        b.update(0, k, 10)
    b.finish_run(0)
    b.update(1, 5, 10)
    b.finish_run(1)
    lines = s.getvalue().splitlines()
    assert lines[-1].startswith("replay 100.0%") and "runs 2/2" in lines[-1]
    assert sum("100.0%" in ln for ln in lines) == 1
    assert 4 <= len(lines) <= 11


def test_summary_table_marks_failures():
    rows = [{"run": "/x/a", "frames": 3, "recall_1m_3deg": 0.5, "error": None},
            {"run": "/x/b", "error": "/x/b/run.json: missing"}]
    text = format_table(rows)
    assert "FAILED" in text and "failed: /x/b/run.json: missing" in text and "0.500" in text


def test_summary_reports_the_learnt_wheel_scale():
    """The loop's health (odometry_scale) reaches the table and, for one run, the operator's hint."""
    m = {"frames": 3, "recall": {"1m_3deg": 1.0}, "median_error_m": 0.1, "p90_error_m": 0.2,
         "gnss_median_error_m": 1.0, "inside_95_ellipse": 1.0, "first_good_fix": {"time_s": 1.0},
         "lost": {"spells": 0}, "gaps": {"count": 0}, "frame_ms_median": 5.0, "replay": {"frames_per_s": 9.0},
         "loop_health": {"odometry_scale": 0.98765}}
    row = summary_row("/x/a", m)
    assert row["odometry_scale"] == 0.98765
    text = format_table([row])
    assert "wheel" in text.splitlines()[0] and "0.9877" in text
    hint = wheel_scale_hint([row])
    assert hint is not None and "odometry_scale = 0.9877" in hint and "[track]" in hint
    # several runs (maybe several robots), an unlearnt factor, or no loop health: no hint, no column
    assert wheel_scale_hint([row, dict(row, run="/x/b")]) is None
    assert wheel_scale_hint([dict(row, odometry_scale=1.0)]) is None
    bare = summary_row("/x/c", {k: v for k, v in m.items() if k != "loop_health"})
    assert bare["odometry_scale"] is None and "wheel" not in format_table([bare]) and wheel_scale_hint([bare]) is None


def test_truth_and_gnss_move_to_the_map_frame_when_origins_differ(tmp_path):
    """A map whose origin is 0.0001 deg further north: truth and GNSS land 11.1 m further south in its frame
    (1e-4 deg of latitude near 47 deg is 11.12 m: the WGS84 meridian arc is about 111.18 km per degree there;
    value from memory of the usual geodesy tables, 111.13 km at 45 deg and 111.23 km at 50 deg)."""
    from _replay_helpers import ORIGIN, make_run
    from tinyloc.geo import LocalFrame
    from tinyloc.replay.replay import ReplayParams, prepare_records
    from tinyloc.runfolder import RunFolder

    rf = RunFolder.open(make_run(tmp_path / "r", n_frames=10))
    same = prepare_records(rf, LocalFrame(*ORIGIN), ReplayParams())
    other = prepare_records(rf, LocalFrame(ORIGIN[0] + 1e-4, ORIGIN[1], ORIGIN[2]), ReplayParams())
    dy = other.truth_y - same.truth_y
    assert np.all(np.abs(dy + 11.12) < 0.02), dy
    assert np.all(np.abs(other.truth_x - same.truth_x) < 0.01)
    np.testing.assert_allclose(other.truth_yaw, same.truth_yaw)
    gy = other.gnss_y - same.gnss_y
    assert np.all(np.abs(gy[np.isfinite(gy)] + 11.12) < 0.02)


def test_replay_opens_the_map_with_the_loops_tile_cache(tmp_path):
    """A replay through the loop holds the decoded-tile memory the robot would (loop.map_cache_mb)."""
    from tinyloc.maps.packfile import DEFAULT_CACHE_BYTES
    from tinyloc.replay.batch import open_map
    from tinyloc.runtime.config import LoopConfig

    path = make_map(tmp_path / "m.tlm")
    mb = LoopConfig().loop.map_cache_mb
    with open_map(str(path), mb) as pm:
        assert pm._cache_bytes == int(mb * 2 ** 20) != DEFAULT_CACHE_BYTES
    with open_map(str(path)) as pm:
        assert pm._cache_bytes == DEFAULT_CACHE_BYTES
    assert open_map(None, mb) is None
