"""Tracker behaviour over time on planted likelihoods: lock-on, honest covariance, ambiguity, kidnapping, gaps.

The likelihood volumes here are planted (a Gaussian around a noisy measurement of the true pose, with
a floor and noise away from it, like a correlation surface), so these tests check the filter and its
lost/recovered logic on their own; the end-to-end figures with real frames live in the demo and the
benchmarks.
"""

import math

import numpy as np
import pytest
from scipy import stats

from tinyloc.errors import InputError
from tinyloc.frames import relative2, wrap_angle
from tinyloc.track import GlobalEvidence, LikelihoodVolume, MapGeometry, TrackParams, Tracker

GEOM = MapGeometry(0.0, 400.0, 0.5)
CHI2_95_3DOF = stats.chi2.ppf(0.95, 2)  # 5.991 for the position ellipse (2 degrees of freedom)


class PlantedMatcher:
    """Correlation-like evidence: a peak at a noisy measurement of the truth, noise and a floor elsewhere.

    Like the real correlator it gives a reduced global search (best log-likelihood per cell over
    heading) and a tracking volume over a few headings around a prior.
    """

    def __init__(self, rng, *, sigma_m=0.6, sigma_yaw=0.03, headings=64, floor=-9.0, noise=0.3,
                 global_cells=120, track_cells=41, track_half_headings=5, second_mode=None):
        self.rng = rng
        self.sx, self.syaw, self.A = sigma_m, sigma_yaw, headings
        self.floor, self.noise = floor, noise
        self.gc, self.tc, self.th = global_cells, track_cells, track_half_headings
        self.truth = (0.0, 0.0, 0.0)
        self.second_mode = second_mode  # offset (dx, dy) of an equally good ghost pose

    def _measure(self):
        tx, ty, tyaw = self.truth
        return (tx + self.rng.normal(0, self.sx), ty + self.rng.normal(0, self.sx),
                tyaw + self.rng.normal(0, self.syaw))

    def _xy_term(self, row0, col0, n, mx, my):
        ii, jj = np.mgrid[0:n, 0:n]
        xs, ys = GEOM.xy_of(row0 + ii + 0.5, col0 + jj + 0.5)
        L = -0.5 * ((xs - mx) ** 2 + (ys - my) ** 2) / self.sx ** 2
        if self.second_mode is not None:
            gx, gy = mx + self.second_mode[0], my + self.second_mode[1]
            L = np.logaddexp(L, -0.5 * ((xs - gx) ** 2 + (ys - gy) ** 2) / self.sx ** 2)
        return L

    def _corner(self, x, y, n):
        r, c = GEOM.cell_of(x, y)
        return int(r) - n // 2, int(c) - n // 2

    def global_search(self, x, y):
        n = self.gc
        row0, col0 = self._corner(x, y, n)
        mx, my, myaw = self._measure()
        best = np.maximum(self._xy_term(row0, col0, n, mx, my), self.floor) + self.rng.normal(0, self.noise, (n, n))
        return GlobalEvidence(best.astype(np.float32), row0, col0, 1, np.full((n, n), myaw))

    def track(self, x, y, yaw):
        n = self.tc
        row0, col0 = self._corner(x, y, n)
        mx, my, myaw = self._measure()
        dyaw = 2 * math.pi / self.A
        a0 = int(round(yaw / dyaw)) - self.th
        a = (a0 + np.arange(2 * self.th + 1)) * dyaw
        da = np.angle(np.exp(1j * (a - myaw)))
        L = self._xy_term(row0, col0, n, mx, my)[None] - 0.5 * (da[:, None, None] / self.syaw) ** 2
        L = np.maximum(L, self.floor) + self.rng.normal(0, self.noise, L.shape)
        return LikelihoodVolume(L.astype(np.float32), row0, col0, a0 * dyaw, dyaw)


def _params(**kw):
    # planted frames are independent and their log-likelihoods calibrated (no tempering), and the
    # planted evidence has no model error (no covariance floor): this checks the posterior itself
    # (cov_scale and cov_scale_xy 1: the default scales calibrate the tempered real correlator's posterior,
    # not this one)
    kw.setdefault("likelihood_weight", 1.0)
    kw.setdefault("model_sigma_m", 0.0)
    kw.setdefault("model_sigma_deg", 0.0)
    kw.setdefault("cov_scale", 1.0)
    kw.setdefault("cov_scale_xy", 1.0)
    return TrackParams(window_cells=48, headings=64, **kw)


def drive(rng, n, *, speed=1.0, dt=0.1, turn=0.05, matcher=None, kidnap_at=None, kidnap_m=50.0,
          bad_frames=(), gnss_off=(), odo_jump_at=None, params=None, gnss_sigma=3.0, odo_noise=False, gnss_bias_at=()):
    """Drive a curvy path; returns per-frame (truth, output) pairs.

    With ``odo_noise`` the odometry increments get random errors with exactly the variance the
    filter's motion model assumes (so its covariance can be checked for honesty).
    """
    m = matcher or PlantedMatcher(rng)
    p = params or _params()
    tr = Tracker(GEOM, p)
    x, y, yaw = 200.0, 200.0, 0.3
    ox, oy, oyaw = 0.0, 0.0, 0.0  # odometry (its own frame), 1 % scale error
    prev_odo = None
    out = []
    for k in range(n):
        t = k * dt
        w = turn * math.sin(0.05 * k)
        x += speed * dt * math.cos(yaw)
        y += speed * dt * math.sin(yaw)
        yaw = wrap_angle(yaw + w * dt)
        ox += 1.01 * speed * dt * math.cos(oyaw)
        oy += 1.01 * speed * dt * math.sin(oyaw)
        oyaw = wrap_angle(oyaw + w * dt)
        if kidnap_at is not None and k == kidnap_at:
            x += kidnap_m  # carried away: the odometry does not see it
        cur = (ox, oy, oyaw)
        inc = relative2(prev_odo, cur) if prev_odo is not None else None
        if odo_noise and inc is not None:
            d = math.hypot(inc[0], inc[1])
            sxy = math.sqrt(p.q_xy_m2 + p.q_xy_per_m * d)
            syaw = math.sqrt(p.q_yaw_rad2 + p.q_yaw_per_m * d + p.q_yaw_per_rad * abs(inc[2]))
            inc = (inc[0] + rng.normal(0, sxy), inc[1] + rng.normal(0, sxy), inc[2] + rng.normal(0, syaw))
        if odo_jump_at is not None and k == odo_jump_at:
            inc = (25.0, 0.0, 0.0)
        prev_odo = cur
        m.truth = (x, y, yaw)
        gnss = None
        if k not in gnss_off:
            bx = 7.0 if k in gnss_bias_at else 0.0
            gnss = (x + bx + rng.normal(0, gnss_sigma), y + rng.normal(0, gnss_sigma), 1.0, t)
        o = _frame(tr, m, t, inc, gnss, usable=k not in bad_frames)
        out.append(((x, y, yaw), o))
    return tr, out


def _frame(tr, m, t, inc, gnss, *, usable=True):
    """One frame the way the live loop runs it: begin, global search when asked, track, finish."""
    tr.begin(t, inc, gnss, have_frame=usable)
    if not usable:
        return tr.finish(None, frame_status="planted bad frame")
    if tr.wants_global():
        c = tr.search_centre() or m.truth[:2]
        x, y, yaw = tr.consider_global(m.global_search(*c))
        if not math.isfinite(yaw):
            yaw = m.truth[2]
    else:
        x, y, yaw = tr.track_centre()
    return tr.finish(m.track(x, y, yaw))


def _err(truth, o):
    return math.hypot(o.x - truth[0], o.y - truth[1]), abs(wrap_angle(o.yaw - truth[2]))


def check_only_the_flag_moves(params_off, params_on, *, seed=5, n=200):
    """A check of the quality flag must not move any estimate, and must only turn tracking into degraded.

    The same seeded planted drive runs twice; ``params_on`` has the check at a threshold the planted
    drive crosses, so some frames must change, each from tracking to degraded.
    """
    runs = []
    for p in (params_off, params_on):
        _, out = drive(np.random.default_rng(seed), n, params=p)
        runs.append(out)
    a, b = runs
    xa = np.array([[o.x, o.y, o.yaw] for _, o in a])
    xb = np.array([[o.x, o.y, o.yaw] for _, o in b])
    assert np.nanmax(np.abs(xa - xb)) < 1e-9
    qa = [o.quality for _, o in a]
    qb = [o.quality for _, o in b]
    assert qa.count("tracking") > 150
    moved = [i for i in range(len(qa)) if qa[i] != qb[i]]
    assert moved and all(qa[i] == "tracking" and qb[i] == "degraded" for i in moved)


def check_ambiguity_and_kidnapping(params, kidnap_matcher=None):
    """An option of the reported covariance must keep the two safety properties of the tracker.

    A posterior with two modes 12 m apart stays flagged not-tracking with a large covariance; a
    50 m kidnapping drops the flag and the filter is back within 1 m within 15 s of driving (#6).
    ``kidnap_matcher(rng)`` makes the matcher of the kidnapping drive (default: the planted one).
    """
    rng = np.random.default_rng(8)
    m = PlantedMatcher(rng, second_mode=(12.0 * math.cos(0.3), 12.0 * math.sin(0.3)))
    _, out = drive(rng, 120, matcher=m, turn=0.0, gnss_off=set(range(120)), params=params)
    last = out[-1][1]
    assert last.quality != "tracking" and math.sqrt(last.cov[0, 0] + last.cov[1, 1]) > 4.0
    rng = np.random.default_rng(9)
    tr, out = drive(rng, 500, kidnap_at=200, params=params,
                    matcher=kidnap_matcher(rng) if kidnap_matcher is not None else None)
    q = [o.quality for _, o in out]
    assert any(s in ("searching", "degraded") for s in q[200:350])
    errs = [_err(t, o)[0] for t, o in out[200:]]
    k = next(i for i in range(len(errs)) if all(e < 1.0 for e in errs[i:i + 20]))
    assert k * 0.1 <= 15.0 and q[-1] == "tracking" and tr.counters["lost"] >= 1


def test_no_fix_until_something_arrives():
    tr = Tracker(GEOM, _params())
    o = tr.step(0.0, None, None, gnss=None)
    assert o.quality == "no-fix" and math.isnan(o.x) and np.isnan(o.cov).all()


def test_locks_on_and_tracks_accurately(rng):
    tr, out = drive(rng, 200)
    q = [o.quality for _, o in out]
    first = q.index("tracking")
    assert first < 15
    errs = np.array([_err(t, o) for t, o in out[first + 10:]])
    assert np.median(errs[:, 0]) < 0.3
    assert np.median(np.degrees(errs[:, 1])) < 1.0
    assert q[first:].count("tracking") >= 0.95 * len(q[first:])


def test_covariance_is_honest(rng):
    # share of frames whose position error lies inside the reported 95 % ellipse (chi-square, 2 dof: 5.991)
    tr, out = drive(rng, 400, matcher=PlantedMatcher(rng, sigma_m=0.8, noise=0.1), odo_noise=True)
    inside = []
    for truth, o in out[30:]:
        if o.quality != "tracking":
            continue
        d = np.array([truth[0] - o.x, truth[1] - o.y])
        inside.append(float(d @ np.linalg.solve(o.cov[:2, :2], d)) <= CHI2_95_3DOF)
    share = float(np.mean(inside))
    assert len(inside) > 300
    assert 0.85 <= share <= 0.99, share


def test_ambiguous_frames_do_not_give_a_confident_pose(rng):
    # every frame equally supports the truth and a ghost 12 m ahead along the street
    m = PlantedMatcher(rng, second_mode=(12.0 * math.cos(0.3), 12.0 * math.sin(0.3)))
    tr, out = drive(rng, 120, matcher=m, turn=0.0, gnss_off=set(range(120)))
    last = out[-1][1]
    assert last.quality != "tracking"
    assert math.sqrt(last.cov[0, 0] + last.cov[1, 1]) > 4.0
    assert len(last.modes) >= 2


def test_kidnapped_robot_drops_quality_and_recovers_within_15_s(rng):
    dt = 0.1
    tr, out = drive(rng, 500, dt=dt, kidnap_at=200)
    q = [o.quality for _, o in out]
    assert q[199] == "tracking"
    after = q[200:]
    assert any(s in ("searching", "degraded") for s in after[:150]), "quality never dropped"
    # back within 1 m within 15 s (150 frames at 10 Hz) and staying there
    errs = [_err(t, o)[0] for t, o in out[200:]]
    k = next(i for i in range(len(errs)) if all(e < 1.0 for e in errs[i:i + 20]))
    assert k * dt <= 15.0, k * dt
    assert out[-1][1].quality == "tracking"
    assert tr.counters["lost"] >= 1


def test_unusable_frames_degrade_then_recover(rng):
    bad = set(range(100, 112))
    tr, out = drive(rng, 160, bad_frames=bad)
    q = [o.quality for _, o in out]
    assert q[99] == "tracking"
    assert "degraded" in q[100:112]
    assert "planted bad frame" in out[101][1].status
    assert q[-1] == "tracking"
    errs = [_err(t, o)[0] for t, o in out[130:]]
    assert max(errs) < 1.0


def test_odometry_jump_is_ignored_and_said(rng):
    tr, out = drive(rng, 120, odo_jump_at=80)
    assert "odometry jump ignored" in out[80][1].status
    assert tr.counters["odometry_jumps"] == 1
    # the 25 m step was not applied; the watch's global checks after the jump evaluate every heading
    # layer again, which widens the belief for a frame or two (1.06 m at frame 81 with it, 0.81 m without)
    assert max(_err(*o)[0] for o in out[80:82]) < 1.5
    assert max(_err(*o)[0] for o in out[82:]) < 1.0
    assert out[-1][1].quality == "tracking"


def test_fixes_offset_from_a_confident_estimate_degrade_the_flag_only(rng):
    # the fixes sit 7 m east for 10 s (below the disagreement test's 10 m): the pose cannot tell
    # which of the two is wrong, so it must not claim "tracking"; the estimate itself stays put
    tr, out = drive(rng, 320, gnss_bias_at=set(range(100, 200)))
    q = [o.quality for _, o in out]
    assert q[99] == "tracking"
    assert q[150:200].count("degraded") >= 45
    assert any("satellite fixes" in o.status and "m off" in o.status for _, o in out[100:200])
    assert max(_err(t, o)[0] for t, o in out[100:200]) < 1.0
    assert q[-1] == "tracking"


def test_degraded_covariance_covers_the_pose_the_fixes_give(rng):
    # the same 7 m offset with a steadier receiver (0.5 m noise per fix): while degraded the
    # reported covariance holds the fix as a competing pose (weight fallback_weight = 0.25:
    # w (S + d d^T), the second moment of a two-pose mixture), so the position the receiver gives
    # lies inside the reported 95 % ellipse (chi-square 5.991, 2 dof) instead of ~20 sigma out;
    # while tracking the term is absent
    tr, out = drive(rng, 320, gnss_bias_at=set(range(100, 200)), gnss_sigma=0.5)
    deg = [(t, o) for t, o in out[150:200] if o.quality == "degraded"]
    assert len(deg) >= 45
    for (x, y, _), o in deg:
        d = np.array([x + 7.0 - o.x, y - o.y])
        assert d @ np.linalg.solve(o.cov[:2, :2], d) < 5.991
    assert max(_err(t, o)[0] for t, o in out[100:200]) < 1.0  # the estimate itself did not move
    for _, o in out[60:99]:
        assert o.quality == "tracking" and math.sqrt(o.cov[0, 0]) < 1.0
    off = drive(np.random.default_rng(12345), 320, gnss_bias_at=set(range(100, 200)), gnss_sigma=0.5,
                params=_params(fallback_weight=0.0))[1]
    d = np.array([[t[0] + 7.0 - o.x, t[1] - o.y] for t, o in off[150:200]])
    m2 = [v @ np.linalg.solve(o.cov[:2, :2], v) for v, (_, o) in zip(d, off[150:200])]
    assert np.median(m2) > 50.0  # without the term the same frames claim a tight ellipse


def test_gnss_outage_keeps_tracking(rng):
    tr, out = drive(rng, 200, gnss_off=set(range(60, 200)))
    q = [o.quality for _, o in out[60:]]
    assert q.count("tracking") >= 0.95 * len(q)
    assert max(_err(t, o)[0] for t, o in out[80:]) < 1.0


def test_wild_gnss_does_not_drag_a_confident_belief(rng):
    # the fixes jump 25 m sideways for 3 s (multipath); the tracked pose must not follow
    m = PlantedMatcher(rng)
    tr = Tracker(GEOM, _params())
    x, y, yaw = 200.0, 200.0, 0.0
    worst = 0.0
    for k in range(150):
        t = 0.1 * k
        x += 0.1
        m.truth = (x, y, yaw)
        g = (x, y + (25.0 if 80 <= k < 110 else 0.0) + rng.normal(0, 1), 1.0, t)
        o = _frame(tr, m, t, (0.1, 0.0, 0.0) if k else None, g)
        if k >= 80:
            worst = max(worst, math.hypot(o.x - x, o.y - y))
    assert worst < 1.0


def _check_with_gap(tr, gap, away_m=15.0):
    """A hand-made global search: flat, the best near the estimate at 0 and a pose ``away_m`` east at ``gap``."""
    est = tr.last
    n = 81
    r, c = GEOM.cell_of(est.x, est.y)
    row0, col0 = int(r) - n // 2, int(c) - n // 2
    best = np.full((n, n), -20.0, np.float32)
    i, j = int(r) - row0, int(c) - col0
    best[i, j] = 0.0
    ar, ac = GEOM.cell_of(est.x + away_m, est.y)
    best[int(ar) - row0, int(ac) - col0] = gap  # likelihood_weight 1 in _params(): the gap as scored
    notes = []
    tr._global_decision(GlobalEvidence(best, row0, col0, 1, np.full((n, n), est.yaw)), None, notes)
    return notes


def test_a_check_votes_elsewhere_only_beyond_the_switch_margin(rng):
    # two checks in a row better elsewhere by more than switch_margin lose the belief; by less they
    # do not vote (tuning drives 25 and 27 lost right tracks on checks 4.4-5.4 better at margin 4)
    p = _params()
    assert p.switch_margin == 6.0 and p.switch_votes == 2
    tr, out = drive(rng, 60, params=p)
    assert out[-1][1].quality in ("tracking", "degraded")
    for _ in range(3):
        notes = _check_with_gap(tr, 5.5)
        assert not any("better pose" in n for n in notes), notes
    assert tr.state != "searching"
    assert any("better pose 15 m away (1/2)" in n for n in _check_with_gap(tr, 6.5))
    notes = _check_with_gap(tr, 6.5)
    assert any("lost: global check found a better pose elsewhere" in n for n in notes), notes
    assert tr.state == "searching"


def _frames_to_loss(params, jump_at=80, n=140):
    """Frames from a kidnap (20 m, with the odometry's impossible step dropped) to the "lost" note."""
    _, out = drive(np.random.default_rng(7), n, kidnap_at=jump_at, kidnap_m=20.0, odo_jump_at=jump_at,
                   params=params)
    assert "odometry jump ignored" in out[jump_at][1].status
    return next((k - jump_at for k in range(jump_at, n) if "lost:" in out[k][1].status), None)


def test_after_an_odometry_jump_every_frame_is_checked(rng):
    # the dropped step is the sign of a robot lifted and carried: the watch checks the whole window on
    # each of the next watch_frames frames, so two "elsewhere" votes come in the first frames instead of
    # waiting verify_every frames for each check (the margin and the votes are the same)
    watched = _frames_to_loss(_params())
    assert _params().watch_frames == 25
    unwatched = _frames_to_loss(_params(watch_frames=0))
    assert watched is not None and watched <= 3, watched
    assert unwatched is None or unwatched > watched + 5, (watched, unwatched)
    tr, out = drive(rng, 160, odo_jump_at=80)  # not carried after all: the watch finds nothing better
    assert tr.counters["lost"] == 0
    assert out[-1][1].quality == "tracking"
    with pytest.raises(InputError, match="watch_frames"):
        _params(watch_frames=-1)


def test_default_output_covariance_by_hand():
    # the default formula: 0.3 x the posterior's position block + 0.15 m floor, the heading's own
    # variance + 0.5 deg floor, cross terms x sqrt(0.3 x 1); while not tracking the fix is added as a
    # competing pose with weight 0.25 (w (S + d d^T), the second moment of a two-pose mixture)
    from tinyloc.track.gridfilter import FilterEstimate

    p = TrackParams(window_cells=32, headings=64)
    assert (p.cov_scale_xy, p.cov_scale, p.model_sigma_m, p.model_sigma_deg) == (0.3, 1.0, 0.15, 0.5)
    tr = Tracker(GEOM, p)
    post = np.array([[0.16, 0.04, 0.002], [0.04, 0.36, 0.001], [0.002, 0.001, 1e-4]])
    est = FilterEstimate(10.0, 20.0, 0.3, post.copy(), [], 1.0, 0.5, 0.01)
    cov = tr._output(0.0, "tracking", [], est).cov
    assert np.allclose(cov[:2, :2], [[0.048 + 0.0225, 0.012], [0.012, 0.108 + 0.0225]], atol=1e-12)
    assert abs(cov[2, 2] - (1e-4 + math.radians(0.5) ** 2)) < 1e-15
    assert np.allclose(cov[:2, 2], math.sqrt(0.3) * post[:2, 2], atol=1e-15) and np.allclose(cov[2, :2], cov[:2, 2])
    tr._g = (13.0, 24.0, 3.0, 0.0)  # a fix 3 m east and 4 m north of the estimate, 3 m sigma
    deg = tr._output(0.0, "degraded", [], est).cov
    assert np.allclose(deg[:2, :2] - cov[:2, :2], 0.25 * (9.0 * np.eye(2) + np.outer([3.0, 4.0], [3.0, 4.0])),
                       atol=1e-12)
    with pytest.raises(InputError, match="cov_scale_xy"):
        TrackParams(cov_scale_xy=0.0)


def test_fixes_while_searching_count_by_the_time_between_them(monkeypatch):
    # while searching, the first fix counts in full and each later one as min(1, dt / search_tau_s) of a
    # fix (a receiver's error wanders over tens of seconds: 1 Hz fixes are not independent); once
    # tracking, weight_track; after a loss the first fix of the new search counts in full again
    from tinyloc.track.gnss_prior import GnssParams, search_fix_weight

    g = GnssParams()
    assert (g.search_tau_s, g.weight_search) == (4.0, 1.0)
    assert search_fix_weight(None, g) == 1.0 and search_fix_weight(1.0, g) == 0.25
    assert search_fix_weight(10.0, g) == 1.0 and search_fix_weight(-1.0, g) == 0.0
    assert search_fix_weight(1.0, GnssParams(search_tau_s=0.0)) == 1.0
    tr = Tracker(GEOM, _params())
    weights = []
    real = tr.filter.update_xy
    monkeypatch.setattr(tr.filter, "update_xy", lambda *a, **k: (weights.append((tr.state, k["weight"])),
                                                                  real(*a, **k)))
    for k in range(5):  # fixes 1 s apart (the first starts the filter), frames without a likelihood
        tr.begin(float(k), None, (200.0, 200.0, 1.0, float(k)), have_frame=False)
        tr.finish(None)
    assert weights == [("searching", 1.0)] + [("searching", 0.25)] * 3
    tr.state = "tracking"
    tr.begin(5.0, None, (200.0, 200.0, 1.0, 5.0))
    tr._lose([], "planted")
    tr.begin(6.0, None, (200.0, 200.0, 1.0, 6.0))
    tr.begin(7.0, None, (200.0, 200.0, 1.0, 7.0))
    # a loss with no fix while tracking: the new search still counts its first fix in full
    tr.state = "tracking"
    tr._lose([], "planted")
    tr.begin(7.5, None, (200.0, 200.0, 1.0, 7.5))
    assert weights[4:] == [("tracking", 0.02), ("searching", 1.0), ("searching", 0.25), ("searching", 1.0)]
    with pytest.raises(InputError, match="search_tau_s"):
        TrackParams(gnss=GnssParams(search_tau_s=-1.0))
