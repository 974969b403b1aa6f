"""The ground cues' offset from the estimate and the covariance built on it (tinyloc/track/cueoffset.py,
``track.cue_cov``).

References: bilinear sampling with held edges is checked against ``scipy.ndimage.map_coordinates``
(``order=1, mode="nearest"``, a general-purpose reference library); offsets and outer products are
worked by hand (a robot facing north has west on its left: common practice of the ENU / FLU frames,
docs/interfaces.md); the planted drives reuse tests/test_track_tracker.py's correlation-like evidence,
with one family of cues planted off the truth. The chi-square 95 % value for 2 degrees of freedom
(5.991) is from standard tables.
"""

import math
import tracemalloc

import numpy as np
import pytest
from scipy.ndimage import map_coordinates

from tinyloc.errors import InputError
from tinyloc.track import LikelihoodVolume, MapGeometry, TrackParams, Tracker
from tinyloc.track import _kernels as K
from tinyloc.track.cueoffset import CueOffset
from tinyloc.track.gridfilter import FilterEstimate

GEOM = MapGeometry(0.0, 400.0, 0.5)


def _surface_of(fn, row0, col0, n, scale=1):
    """(n, n) surface whose cell (i, j) holds fn(x, y) at its robot position (LikelihoodVolume layout)."""
    ii, jj = np.mgrid[0:n, 0:n]
    x, y = GEOM.xy_of(row0 + scale * (ii + 0.5), col0 + scale * (jj + 0.5))
    return fn(x, y).astype(np.float32)


def _reference_samples(cue, row0, col0, scale, est, offs):
    """Slow, obvious: the world point of every (along, left) offset, its fractional index, SciPy's bilinear value."""
    x, y, yaw = est
    c, s = math.cos(yaw), math.sin(yaw)
    out = np.zeros((len(offs), len(offs)))
    for p, u in enumerate(offs):
        for q, v in enumerate(offs):
            wx, wy = x + c * u - s * v, y + s * u + c * v
            r, cc = GEOM.cell_of(wx, wy)
            fi, fj = (r - row0) / scale - 0.5, (cc - col0) / scale - 0.5
            out[p, q] = map_coordinates(cue.astype(np.float64), [[fi], [fj]], order=1, mode="nearest")[0]
    return out


@pytest.mark.parametrize("scale", [1, 2])
def test_sampling_matches_scipy_bilinear_with_held_edges(scale):
    rng = np.random.default_rng(3)
    for trial in range(6):
        cue = rng.normal(0, 1, (17, 17)).astype(np.float32)
        row0, col0 = 300, 150
        cx, cy = GEOM.xy_of(row0 + scale * 8.5, col0 + scale * 8.5)
        # some offsets reach past the surface's edge (held there), at any heading
        est = (cx + rng.uniform(-2, 2), cy + rng.uniform(-2, 2), rng.uniform(-math.pi, math.pi))
        co = CueOffset(half_m=2.0, step_m=0.5, memory=0.0, weight=1.0)
        co.add(cue, row0, col0, scale, *est, GEOM.x_min, GEOM.y_max, GEOM.res_m)
        ref = _reference_samples(cue, row0, col0, scale, est, co.offs)
        assert np.max(np.abs(co._tmp - ref)) < 1e-5
        # memory 0, weight 1: the sum is the frame's samples minus their maximum
        assert np.max(np.abs(co.acc - (ref - ref.max()))) < 1e-5


def test_decaying_sum_by_hand():
    a = np.zeros((3, 3), np.float32)
    b = np.zeros((3, 3), np.float32)
    a[1, 1], b[0, 2] = 2.0, 4.0
    offs = np.array([-1.0, 0.0, 1.0])
    acc, tmp = np.zeros((3, 3)), np.zeros((3, 3))
    # identity placement: index (p, q) samples cell (p, q): fi = 1 + u, fj = 1 + v
    for surf in (a, b):
        rng_ = K.cue_accumulate(surf, 1.0, 1.0, 1.0, 0.0, 0.0, 1.0, offs, 0.5, 2.0, acc, tmp)
        assert rng_ == float(surf.max())
    # after a: 2 (a - 2); after b: 0.5 * that + 2 (b - 4)
    want = 0.5 * 2.0 * (a - 2.0) + 2.0 * (b - 4.0)
    assert np.max(np.abs(acc - want)) < 1e-12


def test_offset_of_a_planted_bump_and_its_world_term_by_hand():
    # robot at (100.25, 199.75) facing north (yaw 90 deg): along = north, left = west. A bump at
    # (99.25, 200.25) is 0.5 m along and 1.0 m left: variance 0.25 m^2 along (north, y) and 1 m^2 across
    # (east-west, x), so xx = 1, yy = 0.25, xy = 0. Both points are cell centres (x = (j + 0.5) 0.5 m,
    # y = 400 m - (i + 0.5) 0.5 m), so the sampled bump has one top and no tie
    row0, col0 = 380, 180
    n = 41
    cue = _surface_of(lambda x, y: -((x - 99.25) ** 2 + (y - 200.25) ** 2) / (2 * 0.4 ** 2), row0, col0, n)
    assert GEOM.cell_of(100.25, 199.75)[0] - row0 > 10  # the robot is well inside the surface
    co = CueOffset(half_m=2.0, step_m=0.25, memory=0.9)
    assert co.add(cue, row0, col0, 1, 100.25, 199.75, math.pi / 2, GEOM.x_min, GEOM.y_max, GEOM.res_m)
    u, v = co.offset()
    assert (u, v) == (0.5, 1.0)
    xx, yy, xy = co.term(math.pi / 2)
    assert abs(xx - 1.0) < 1e-12 and abs(yy - 0.25) < 1e-12 and abs(xy) < 1e-12
    # facing north-east (45 deg) the same offsets give xx = yy = (0.25 + 1) / 2, xy = (0.25 - 1) / 2
    xx, yy, xy = co.term(math.pi / 4)
    assert abs(xx - 0.625) < 1e-12 and abs(yy - 0.625) < 1e-12 and abs(xy + 0.375) < 1e-12


def test_no_evidence_reports_the_grid_corner_and_a_flat_frame_is_not_counted():
    co = CueOffset(half_m=2.0, step_m=0.25)
    assert co.offset() == (2.0, 2.0)  # nothing seen yet: the largest offset (conservative)
    flat = np.full((21, 21), -3.0, np.float32)
    assert not co.add(flat, 300, 150, 1, *GEOM.xy_of(310.5, 160.5), 0.3, GEOM.x_min, GEOM.y_max, GEOM.res_m)
    assert co.frames == 0 and co.offset() == (2.0, 2.0)
    bad = np.full((21, 21), np.nan, np.float32)
    assert not co.add(bad, 300, 150, 1, *GEOM.xy_of(310.5, 160.5), 0.3, GEOM.x_min, GEOM.y_max, GEOM.res_m)
    assert np.all(co.acc == 0.0) and co.frames == 0


def test_no_allocation_per_frame():
    rng = np.random.default_rng(4)
    cue = rng.normal(0, 1, (21, 21)).astype(np.float32)
    co = CueOffset()
    x, y = GEOM.xy_of(310.5, 160.5)
    co.add(cue, 300, 150, 1, x, y, 0.3, GEOM.x_min, GEOM.y_max, GEOM.res_m)  # compile / load the kernel
    co.term(0.3)
    tracemalloc.start()
    for k in range(300):
        co.add(cue, 300, 150, 1, x + 0.01 * k, y, 0.3, GEOM.x_min, GEOM.y_max, GEOM.res_m)
        co.term(0.3)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 4096, peak


def test_output_formula_by_hand():
    p = TrackParams(window_cells=32, headings=64, cue_cov=True, cue_cov_scale=0.1, cue_sigma_m=0.1, cue_gain=1.0,
                    cue_min_frames=10, model_sigma_m=0.5, model_sigma_deg=0.5, cov_scale_xy=1.0)
    tr = Tracker(GEOM, p)
    post = np.array([[0.04, 0.01, 0.002], [0.01, 0.09, 0.001], [0.002, 0.001, 1e-4]])
    est = FilterEstimate(100.25, 199.75, math.pi / 2, post.copy(), [], 1.0, 0.3, 0.01)
    # plant the offset of the bump above (0.5 m along, 1.0 m left: world variances x 1, y 0.25)
    row0, col0 = 380, 180
    cue = _surface_of(lambda x, y: -((x - 99.25) ** 2 + (y - 200.25) ** 2) / (2 * 0.4 ** 2), row0, col0, 41)
    for _ in range(10):
        tr.cue.add(cue, row0, col0, 1, 100.25, 199.75, math.pi / 2, GEOM.x_min, GEOM.y_max, GEOM.res_m)
    cov = tr._output(0.0, "tracking", [], est).cov
    want_xy = 0.1 * post[:2, :2] + 0.01 * np.eye(2) + np.array([[1.0, 0.0], [0.0, 0.25]])
    assert np.max(np.abs(cov[:2, :2] - want_xy)) < 1e-12
    # the heading keeps cov_scale (1) and the model floor; the cross terms scale by sqrt(0.1 x 1)
    assert abs(cov[2, 2] - (1e-4 + math.radians(0.5) ** 2)) < 1e-15
    assert np.max(np.abs(cov[:2, 2] - math.sqrt(0.1) * post[:2, 2])) < 1e-15
    assert np.all(np.linalg.eigvalsh(cov) > 0)
    # not tracking, or too few frames since a restart: the default formula (posterior + model_sigma_m^2)
    default = post[:2, :2] + 0.25 * np.eye(2)
    assert np.max(np.abs(tr._output(0.0, "degraded", [], est).cov[:2, :2] - default)) < 1e-12
    tr.cue.reset()
    assert np.max(np.abs(tr._output(0.0, "tracking", [], est).cov[:2, :2] - default)) < 1e-12


def test_parameters_are_checked():
    with pytest.raises(InputError, match="cue_"):
        TrackParams(cue_memory=1.0)
    with pytest.raises(InputError, match="cue_"):
        TrackParams(cue_step_m=3.0, cue_half_m=2.0)


# ---- planted drives: one family of cues off the truth -------------------------------------------

class CuePlanted:
    """tests/test_track_tracker.py's planted evidence, plus a cue layer; the full evidence may be biased.

    ``bias_along`` moves the full volume's peak that far ahead of the truth along the robot's heading (a
    bias every frame shares, which the posterior cannot see); the cue layer peaks at the truth.
    """

    def __init__(self, rng, *, bias_along=0.0, cue_sigma_m=0.5):
        import test_track_tracker as T

        self.base = T.PlantedMatcher(rng, sigma_m=0.3, noise=0.1)
        self.rng = rng
        self.bias = bias_along
        self.cs = cue_sigma_m

    @property
    def truth(self):
        return self.base.truth

    @truth.setter
    def truth(self, v):
        self.base.truth = v

    def _biased(self):
        x, y, yaw = self.base.truth
        return x + self.bias * math.cos(yaw), y + self.bias * math.sin(yaw), yaw

    def global_search(self, x, y):
        t = self.base.truth
        self.base.truth = self._biased()
        ev = self.base.global_search(x, y)
        self.base.truth = t
        return ev

    def track(self, x, y, yaw):
        t = self.base.truth
        self.base.truth = self._biased()
        vol = self.base.track(x, y, yaw)
        self.base.truth = t
        n = 21
        r, c = GEOM.cell_of(x, y)
        row0, col0 = int(r) - n // 2, int(c) - n // 2
        mx, my = t[0] + self.rng.normal(0, self.cs), t[1] + self.rng.normal(0, self.cs)
        cue = _surface_of(lambda xs, ys: -((xs - mx) ** 2 + (ys - my) ** 2) / (2 * self.cs ** 2), row0, col0, n)
        vol.cue = LikelihoodVolume(cue[None], row0, col0, vol.yaw0_rad, vol.dyaw_rad)
        return vol


def _inside_and_offsets(bias, cue_cov, seed=11):
    import test_track_tracker as T

    rng = np.random.default_rng(seed)
    p = T._params(cue_cov=cue_cov, cue_cov_scale=1.0, cue_sigma_m=0.0)
    tr, out = T.drive(rng, 300, matcher=CuePlanted(rng, bias_along=bias), params=p, gnss_off=set(range(40, 300)))
    inside, along = [], []
    for t, o in out[60:]:
        if o.quality != "tracking":
            continue
        d = np.array([t[0] - o.x, t[1] - o.y])
        inside.append(float(d @ np.linalg.solve(o.cov[:2, :2], d)) <= 5.991)
        along.append(tr.cue.offset()[0])
    return float(np.mean(inside)), len(inside), along, tr


def test_a_shared_bias_one_family_does_not_show_widens_the_ellipse_along_it():
    # the full evidence sits 0.8 m ahead of the truth on every frame: the posterior follows it and
    # cannot see it (almost no frame inside its ellipse), the ground family points 0.8 m back
    share_off, n_off, _, _ = _inside_and_offsets(0.8, False)
    share_on, n_on, along, tr = _inside_and_offsets(0.8, True)
    assert n_off > 150 and n_on > 150
    assert share_off < 0.2, share_off
    assert share_on >= 0.9, share_on
    assert abs(np.median(along) + 0.8) <= 0.3, np.median(along)  # the offset points back at the truth


def test_without_a_bias_the_term_stays_small():
    share_on, n_on, along, tr = _inside_and_offsets(0.0, True)
    assert n_on > 150 and share_on >= 0.85, share_on
    assert abs(np.median(along)) <= 0.25, np.median(along)


def test_cue_covariance_keeps_ambiguity_large_and_kidnapping_recovers():
    import test_track_tracker as T

    # ambiguity: no cue layer at all (the planted matcher gives none), so the sum only decays and the term
    # is never used; kidnapping with cue layers: the flag drops and the sum restarts
    T.check_ambiguity_and_kidnapping(T._params(cue_cov=True), kidnap_matcher=CuePlanted)


# ---- the cue family's model (tinyloc/runtime/_adapters.py) ---------------------------------------

def test_cue_family_plus_the_rest_is_the_full_score_and_a_small_box_agrees():
    from tinyloc.correlate import Correlator, CorrelatorParams
    from tinyloc.correlate import synth
    from tinyloc.correlate.scoring import ScoringModel
    from tinyloc.runtime._adapters import cue_model

    full = ScoringModel.default()
    ground = cue_model(full, "road,sidewalk,grass")
    rest = cue_model(full, "building,small-vertical,free")
    assert ground.names == ("road", "sidewalk", "grass") and ground.temperature == full.temperature
    params = CorrelatorParams(window_shape=(128, 128), track_radius_cells=12, track_half_headings=4)
    cf, cg, cr = Correlator(params, full), Correlator(params, ground), Correlator(params, rest)
    site = synth.street_map(192, 5)
    win = np.ascontiguousarray(site[:, 30:158, 40:168])
    rng = np.random.default_rng(2)
    for c in (cf, cg, cr):
        c.set_map(win)
    bev = synth.cut_bev(win, 64.0, 60.0, 0.7, rng, noise=0.1, dropout=0.2)
    a = int(round(0.7 / params.dyaw))
    vf = cf.track(bev, 64.0, 60.0, a, exact=True).volume.copy()
    vg = cg.track(bev, 64.0, 60.0, a, exact=True).volume.copy()
    vr = cr.track(bev, 64.0, 60.0, a, exact=True).volume.copy()
    # the score is linear in the features (tinyloc/correlate/scoring.py), so the families add up
    assert np.max(np.abs(vg + vr - vf)) <= 1e-4 * max(1.0, float(np.max(np.abs(vf))))
    # one heading in a smaller box: the same values as the big box's centre layer on the cells both cover
    small = cg.track(bev, 64.0, 60.0, a, exact=True, radius_cells=5, half_headings=0)
    sv = small.volume[0].copy()  # results are views of the correlator's workspace, overwritten by the next call
    big = cg.track(bev, 64.0, 60.0, a, exact=True)
    bv = big.volume[big.volume.shape[0] // 2]
    di, dj = small.row0 - big.row0, small.col0 - big.col0
    assert small.volume.shape[0] == 1 and di == dj == 7
    assert np.max(np.abs(sv - bv[di:di + 11, dj:dj + 11])) <= 1e-4 * max(1.0, float(np.max(np.abs(bv))))
    with pytest.raises(InputError, match="cue_features"):
        cue_model(full, "road,lamp")


def test_the_cue_term_needs_a_calibrated_accelerometer():
    # uncalibrated (every loop.accel_bias_* 0), the tilt moves far ground and the ground cues' offset does
    # not show it (measured: drive 11 fell to 75 % inside): the matcher then builds no cue correlator, the
    # tracker gets no cue layers and keeps the default formula
    from tinyloc.runtime._adapters import CorrelatorAdapter
    from tinyloc.runtime.config import load_config

    geom = MapGeometry(0.0, 400.0, 0.5)
    cfg = load_config(None, ["track.cue_cov=true", "match.search_window_cells=128"])
    assert CorrelatorAdapter(None, cfg, geom).cue_corr is None
    cfg = load_config(None, ["track.cue_cov=true", "match.search_window_cells=128", "loop.accel_bias_z=0.01"])
    ad = CorrelatorAdapter(None, cfg, geom)
    assert ad.cue_corr is not None and ad.cue_corr.model.names == ("road", "sidewalk", "grass")
    assert ad.cue_radius == 9  # ceil((2 m x sqrt 2 + 1.5 m) / 0.5 m)
    assert CorrelatorAdapter(None, load_config(None, ["match.search_window_cells=128", "loop.accel_bias_z=0.01"]),
                             geom).cue_corr is None  # off by default
