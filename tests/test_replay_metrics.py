"""Replay metrics against hand-worked examples and reference libraries.

Outside references:
- chi-square 95 % quantile for 2 degrees of freedom = 5.991 (standard statistical tables, e.g. the
  NIST/SEMATECH e-Handbook of Statistical Methods, table 1.3.6.7.4), and scipy.stats.chi2.ppf;
- the two-sided 95 % normal quantile 1.960 (same handbook, table 1.3.6.7.1) and scipy.stats.norm.ppf;
- percentiles: numpy.percentile's default "linear" method (Hyndman and Fan 1996, type 7), worked by hand;
- Mahalanobis distance: scipy.spatial.distance.mahalanobis.
"""

import math

import numpy as np
import pytest

scipy_stats = pytest.importorskip("scipy.stats", reason="scipy is the reference library for these checks")
from scipy.spatial.distance import mahalanobis  # noqa: E402

from tinyloc.replay import metrics as M  # noqa: E402
from tinyloc.replay.records import FrameRecords, read_csv, write_csv  # noqa: E402

INF, NAN = math.inf, math.nan


def test_recall_hand_worked():
    # Frame:      0    1    2    3    4 (miss)  5 (no truth)
    pos = [0.10, 0.30, 0.60, 1.50, INF, NAN]
    yaw = [1.00, 1.50, 2.50, 4.00, INF, NAN]
    # 5 evaluated frames; frame k is the first to fall outside the k-th bound.
    assert M.recall(pos, yaw, 0.25, 2.0) == pytest.approx(1 / 5)
    assert M.recall(pos, yaw, 0.5, 2.0) == pytest.approx(2 / 5)
    assert M.recall(pos, yaw, 1.0, 3.0) == pytest.approx(3 / 5)
    assert M.recall(pos, yaw, 2.0, 5.0) == pytest.approx(4 / 5)
    # Bounds are inclusive; heading alone can fail a frame.
    assert M.recall([0.5], [2.0], 0.5, 2.0) == 1.0
    assert M.recall([0.1], [2.01], 0.5, 2.0) == 0.0
    # Position-only (GNSS): heading ignored.
    assert M.recall(pos, None, 1.0, None) == pytest.approx(3 / 5)
    assert math.isnan(M.recall([NAN, NAN], [NAN, NAN], 1.0, 3.0))
    assert [M.recall_key(p, a) for p, a in M.RECALL_THRESHOLDS] == ["0.25m_2deg", "0.5m_2deg", "1m_3deg", "2m_5deg"]


def test_percentiles_hand_worked_linear_convention():
    # n = 4 sorted values 1, 2, 3, 4: the q-th percentile sits at rank (n - 1) q / 100.
    v = [4.0, 1.0, 3.0, 2.0, INF, NAN]  # the miss and the unevaluated frame are left out
    assert M.percentile(v, 50) == pytest.approx(2.5)  # rank 1.5 -> 2 + 0.5 * (3 - 2)
    assert M.percentile(v, 90) == pytest.approx(3.7)  # rank 2.7 -> 3 + 0.7 * (4 - 3)
    assert M.percentile(v, 99) == pytest.approx(3.97)  # rank 2.97
    assert M.percentile([5.0], 90) == 5.0
    assert math.isnan(M.percentile([INF, NAN], 50))
    rng = np.random.default_rng(7)
    x = rng.exponential(1.0, 101)
    assert M.percentile(x, 90) == np.percentile(x, 90)


def test_heading_error_wraps_across_180_deg():
    est = np.radians([179.0, -170.0, 0.0, 90.0, -179.5])
    tru = np.radians([-179.0, 170.0, 360.0, -90.0, 179.5])
    got = M.heading_errors_deg(est, tru)
    np.testing.assert_allclose(got, [2.0, 20.0, 0.0, 180.0, 1.0], atol=1e-9)
    # Missing estimate = miss (inf); missing truth = not evaluated (NaN).
    got = M.heading_errors_deg([NAN, 0.0], [0.0, NAN])
    assert math.isinf(got[0]) and math.isnan(got[1])


def test_position_errors_3_4_5():
    e = M.position_errors([[3.0, 4.0], [NAN, 0.0], [0.0, 0.0]], [[0.0, 0.0], [0.0, 0.0], [NAN, 1.0]])
    assert e[0] == 5.0 and math.isinf(e[1]) and math.isnan(e[2])


def test_chi2_and_normal_quantiles_match_tables_and_scipy():
    k = M.chi2_2dof_quantile(0.95)
    assert round(k, 3) == 5.991  # standard tables
    assert k == pytest.approx(scipy_stats.chi2.ppf(0.95, 2), rel=1e-12)
    for p in (0.5, 0.68, 0.9, 0.99):
        assert M.chi2_2dof_quantile(p) == pytest.approx(scipy_stats.chi2.ppf(p, 2), rel=1e-12)
    z = M.normal_two_sided_quantile(0.95)
    assert round(z, 3) == 1.960
    assert z == pytest.approx(scipy_stats.norm.ppf(0.975), rel=1e-9)
    with pytest.raises(ValueError):
        M.chi2_2dof_quantile(1.0)


def test_ellipse_containment_known_covariance():
    k = 5.991  # table value; the code's own quantile is checked above
    # Axis-aligned: sigma_x = 2 m, sigma_y = 1 m. The 95 % ellipse reaches 2 sqrt(5.991) = 4.895 m along x.
    cov = np.diag([4.0, 1.0])
    r = math.sqrt(k)
    errs = np.array([[2 * r * 0.99, 0.0], [2 * r * 1.01, 0.0], [0.0, r * 0.99], [0.0, r * 1.01]])
    d2 = M.mahalanobis2_xy(errs, np.broadcast_to(cov, (4, 2, 2)))
    assert list(d2 <= k) == [True, False, True, False]
    # Correlated: [[2, 1], [1, 2]] has eigenvalue 3 along (1, 1)/sqrt2 and 1 along (1, -1)/sqrt2, so the
    # ellipse reaches sqrt(3 * 5.991) = 4.2394 m along the diagonal and sqrt(5.991) = 2.4477 m across it.
    cov = np.array([[2.0, 1.0], [1.0, 2.0]])
    u, v = np.array([1.0, 1.0]) / math.sqrt(2), np.array([1.0, -1.0]) / math.sqrt(2)
    errs = np.array([u * 4.2394 * 0.999, u * 4.2394 * 1.001, v * 2.4477 * 0.999, v * 2.4477 * 1.001,
                     v * 3.0])  # 3 m across lies outside although it is inside along the diagonal
    d2 = M.mahalanobis2_xy(errs, np.broadcast_to(cov, (5, 2, 2)))
    assert list(d2 <= k) == [True, False, True, False, False]
    ref = [mahalanobis(e, [0.0, 0.0], np.linalg.inv(cov)) ** 2 for e in errs]
    np.testing.assert_allclose(d2, ref, rtol=1e-12)
    # A broken covariance never counts as inside.
    bad = M.mahalanobis2_xy([[0.0, 0.0]] * 3, [[[0.0, 0.0], [0.0, 1.0]], [[1.0, 2.0], [2.0, 1.0]],
                                               [[NAN, 0.0], [0.0, 1.0]]])
    assert np.all(np.isnan(bad))
    assert M.inside_share(np.array([1.0, NAN, 7.0, 5.0]), k) == pytest.approx(0.5)


def test_ellipse_share_of_gaussian_samples_is_95_percent():
    rng = np.random.default_rng(2024)
    cov = np.array([[0.30, -0.12], [-0.12, 0.10]])
    n = 20000
    e = rng.multivariate_normal([0.0, 0.0], cov, n)
    share = M.inside_share(M.mahalanobis2_xy(e, np.broadcast_to(cov, (n, 2, 2))), M.chi2_2dof_quantile(0.95))
    # Binomial standard deviation sqrt(0.95 * 0.05 / 20000) = 0.0015; allow 4 of them.
    assert abs(share - 0.95) < 0.006
    curve = M.calibration_curve(M.mahalanobis2_xy(e, np.broadcast_to(cov, (n, 2, 2))), [0.5, 0.9])
    np.testing.assert_allclose(curve, [0.5, 0.9], atol=0.015)
    # An over-confident covariance (claimed 4x too small in variance) is caught.
    over = M.inside_share(M.mahalanobis2_xy(e, np.broadcast_to(cov / 4, (n, 2, 2))), M.chi2_2dof_quantile(0.95))
    assert over < 0.6


def test_first_good_fix_and_lost_spells_hand_worked():
    t = np.arange(10.0)          # 1 s per frame, driving 1 m/s in a straight line
    dist = M.path_length(np.stack([t, np.zeros(10)], axis=1))
    np.testing.assert_allclose(dist, t)
    good = np.array([0, 0, 1, 1, 0, 0, 0, 1, 0, 0], bool)
    assert M.first_good_fix(t, good, dist) == (2.0, 2.0, 2)
    spells = M.lost_spells(t, good, dist, min_lost_s=1.0)
    # Frames 4..6 lost, recovered at frame 7 (7 - 4 = 3 s); frames 8..9 lost to the end (9 - 8 = 1 s).
    assert [(s.start, s.end, s.duration_s, s.distance_m, s.recovered) for s in spells] == [
        (4, 7, 3.0, 3.0, True), (8, 10, 1.0, 1.0, False)]
    assert len(M.lost_spells(t, good, dist, min_lost_s=1.5)) == 1
    assert M.first_good_fix(t, np.zeros(10, bool), dist) == (None, None, None)
    assert M.lost_spells(t, np.zeros(10, bool), dist, min_lost_s=0.0) == []


def test_path_length_bridges_holes():
    xy = np.array([[0, 0], [3, 4], [NAN, NAN], [3, 4], [6, 8]], float)
    np.testing.assert_allclose(M.path_length(xy), [0, 5, 5, 5, 10])


def test_interp_pose_wraps_yaw_and_respects_gaps():
    ts = [0.0, 1.0, 5.0]
    ps = [[0.0, 0.0, math.radians(179.0)], [2.0, 4.0, math.radians(-179.0)], [2.0, 4.0, 0.0]]
    out = M.interp_pose(ts, ps, [0.5, 1.0, 3.0, -0.1, 5.0], max_gap_s=1.5)
    np.testing.assert_allclose(out[0, :2], [1.0, 2.0])
    assert abs(M.angle_diff(out[0, 2], math.pi)) < 1e-12  # halfway between 179 and -179 deg is 180 deg
    np.testing.assert_allclose(out[1], ps[1])
    assert np.all(np.isnan(out[2]))  # inside a 4 s gap
    assert np.all(np.isnan(out[3]))  # before the first sample
    np.testing.assert_allclose(out[4], ps[2])


def test_dead_reckoning_anchors_at_first_truth():
    # Odometry drives 1 m per frame along its own +x; truth at the anchor faces north at (10, 5).
    od = np.array([[NAN, NAN, NAN], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, math.pi / 2], [2.0, 1.0, math.pi / 2]])
    tr = np.array([[NAN, NAN, NAN], [10.0, 5.0, math.pi / 2]] + [[NAN, NAN, NAN]] * 3)
    dr = M.dead_reckoning(od, tr)
    assert np.all(np.isnan(dr[0]))
    np.testing.assert_allclose(dr[1:], [[10, 5, math.pi / 2], [10, 6, math.pi / 2], [10, 7, math.pi],
                                        [9, 7, math.pi]], atol=1e-12)


def test_gnss_at_frames_marks_outage():
    xy, acc, age = M.gnss_at_frames([0.0, 1.0, 2.0, 6.0], [[0, 0], [1, 0], [2, 0], [6, 0]], [1.0, 1.0, 2.0, 3.0],
                                    [-0.5, 0.5, 3.4, 3.6, 6.2], max_age_s=1.5)
    assert np.all(np.isnan(xy[0]))                       # before the first fix
    np.testing.assert_allclose(xy[1], [0, 0])
    np.testing.assert_allclose([xy[2, 0], acc[2], age[2]], [2.0, 2.0, 1.4])
    assert np.all(np.isnan(xy[3]))                       # 1.6 s old: outage
    np.testing.assert_allclose(xy[4], [6, 0])


def _records(n=50, seed=1):
    rng = np.random.default_rng(seed)
    rec = FrameRecords(n)
    rec.t[:] = np.arange(n) * 0.2
    rec.truth_x[:] = rec.t * 1.5
    rec.truth_y[:] = 3.0
    rec.truth_yaw[:] = math.radians(179.0)
    rec.x[:] = rec.truth_x + rng.normal(0, 0.2, n)
    rec.y[:] = rec.truth_y + rng.normal(0, 0.2, n)
    rec.yaw[:] = M.wrap_angle(rec.truth_yaw + np.radians(rng.normal(0, 1.0, n)))
    rec.cov[:] = np.diag([0.04, 0.04, math.radians(1.0) ** 2])
    rec.quality[:] = "tracking"
    rec.frame_ms[:] = 10.0 + np.arange(n)
    rec.gnss_x[:] = rec.truth_x + 1.5
    rec.gnss_y[:] = rec.truth_y
    rec.gnss_acc_m[:] = 1.0
    rec.dr_x[:] = rec.truth_x * 1.02
    rec.dr_y[:] = rec.truth_y
    rec.dr_yaw[:] = rec.truth_yaw
    return rec


def test_compute_metrics_on_synthetic_records():
    rec = _records()
    # Frames 10..19: lost (no estimate), 30: a confident but 10 m wrong pose.
    rec.x[10:20] = NAN
    rec.quality[10:20] = "searching"
    rec.x[30] += 10.0
    rec.gnss_x[40:] = NAN  # outage
    m = M.compute_metrics(rec, M.MetricParams(min_lost_s=1.0))
    err, yerr, gerr, _, _ = rec.errors()
    assert m["frames"] == 50 and m["frames_with_truth"] == 50
    for p, a in M.RECALL_THRESHOLDS:
        assert m["recall"][M.recall_key(p, a)] == pytest.approx(np.mean((err <= p) & (yerr <= a)))
    assert m["median_error_m"] == pytest.approx(np.percentile(err[np.isfinite(err)], 50))
    assert m["missed_frames"] == 10
    assert m["gnss_median_error_m"] == pytest.approx(1.5)
    assert m["gnss"]["frames_without_fix"] == 10
    assert m["gnss"]["recall_position_only"]["2m"] == pytest.approx(40 / 50)
    assert m["quality"]["tracking_but_wrong_frames"] == 1
    assert m["quality"]["share"]["searching"] == pytest.approx(0.2)
    assert m["lost"]["spells"] >= 1 and m["lost"]["recoveries"] >= 1
    assert 0.0 <= m["inside_95_ellipse"] <= 1.0
    # 10 misses and 1 gross error are outside; of the rest about 95 % should be inside the ellipse.
    assert m["inside_95_ellipse"] <= 39 / 50
    assert m["frame_ms_median"] == pytest.approx(34.5)
    assert m["latency"]["max_ms"] == 59.0
    assert m["latency"]["p99_ms"] == pytest.approx(np.percentile(rec.frame_ms, 99))
    assert m["dead_reckoning"]["median_error_m"] == pytest.approx(np.median(rec.truth_x * 0.02))


def test_compute_metrics_without_truth_gives_none_not_nan():
    import json

    rec = _records(5)
    rec.truth_x[:] = NAN
    m = M.compute_metrics(rec)
    assert m["frames_with_truth"] == 0 and m["median_error_m"] is None and m["recall"]["1m_3deg"] is None
    json.dumps(m, allow_nan=False)  # strict JSON


def test_frames_csv_round_trip(tmp_path):
    rec = _records(7)
    rec.cov[:, 0, 1] = rec.cov[:, 1, 0] = 0.01
    rec.x[3] = NAN
    rec.status[2] = "frame missing"
    p = write_csv(rec, tmp_path / "frames.csv")
    head = p.read_text().splitlines()[0].split(",")
    assert head[:13] == ["t", "x", "y", "yaw", "lat", "lon", "cov_xx", "cov_xy", "cov_xyaw", "cov_yy", "cov_yyaw",
                         "cov_yawyaw", "quality"]
    back = read_csv(p)
    np.testing.assert_allclose(back.x, rec.x, atol=1e-4, equal_nan=True)
    np.testing.assert_allclose(back.cov, rec.cov, rtol=1e-12)
    assert back.status[2] == "frame missing"
    assert list(back.quality) == list(rec.quality)


def test_status_counts_group_numbers_and_parts():
    got = M.status_counts(["global search; slow frame 1245 ms", "ok", "slow frame 300.5 ms", "ok", "a/b 2"])
    assert got == {"slow frame # ms": 2, "ok": 2, "global search": 1, "a|b #": 1}
    assert list(got)[:2] == ["slow frame # ms", "ok"]  # most frequent first


def test_first_good_fix_needs_the_tracking_flag():
    rec = _records(10)
    rec.quality[:] = "searching"
    rec.quality[6:] = "tracking"  # good poses from frame 0, but the loop claims a fix only from frame 6
    rec.x[6] += 5.0               # ... and that first claimed fix is wrong
    m = M.compute_metrics(rec)
    assert m["first_good_fix"]["frame"] == 7
    assert m["first_good_fix"]["time_s"] == pytest.approx(1.4)          # 0.2 s per frame
    assert m["first_good_fix"]["distance_m"] == pytest.approx(7 * 0.2 * 1.5)  # 1.5 m/s
    assert m["first_good_fix"]["first_tracking_s"] == pytest.approx(1.2)


def test_lost_spells_start_after_the_given_fix():
    t = np.arange(8.0)
    dist = t.copy()
    good = np.array([1, 0, 0, 1, 1, 0, 0, 1], bool)
    # From the first good frame: spells 1..2 and 5..6; from a fix at frame 3: only 5..6.
    assert [(s.start, s.end) for s in M.lost_spells(t, good, dist, min_lost_s=0.0)] == [(1, 3), (5, 7)]
    assert [(s.start, s.end) for s in M.lost_spells(t, good, dist, min_lost_s=0.0, start=3)] == [(5, 7)]


def test_signoff_rules():
    from tinyloc.errors import InputError
    from tinyloc.replay.signoff import check, parse_rule

    m = {"recall": {"1m_3deg": 0.92}, "median_error_m": 0.31, "first_good_fix": {"time_s": None}}
    rules = [parse_rule(r) for r in ("recall/1m_3deg>=0.9", "median_error_m < 0.3", "first_good_fix/time_s<=5",
                                     "nope/x==1", "recall/1m_3deg==0.92")]
    res = check(m, rules)
    assert [c["passed"] for c in res["checks"]] == [True, False, False, False, True]
    assert res["checks"][2]["why"] == "no value (null)" and res["checks"][3]["why"].startswith("no such figure")
    assert res["passed"] is False and check(m, [])["passed"] is True
    assert parse_rule("a/b>=1e-3").value == 1e-3
    for bad in ("recall", "recall>=x", "a => 1", ">= 3"):
        with pytest.raises(InputError):
            parse_rule(bad)
