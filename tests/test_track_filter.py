"""Grid Bayes filter maths: worked examples, reference libraries, and each kernel against a slow reference."""

import math

import numpy as np
import pytest
from scipy import ndimage, stats

from tinyloc.track import GridFilter, LikelihoodVolume, MapGeometry, TrackParams
from tinyloc.track import _kernels as K
from tinyloc.track.gnss_prior import GnssParams, effective_sigma_m, student_t_logpdf

GEOM = MapGeometry(0.0, 200.0, 0.5)


def _filter(n=16, A=8, **kw):
    kw.setdefault("likelihood_weight", 1.0)
    return GridFilter(GEOM, TrackParams(window_cells=n, headings=A, floor=0.0, q_xy_m2=0.0, q_xy_per_m=0.0,
                                        q_yaw_rad2=0.0, q_yaw_per_m=0.0, q_yaw_per_rad=0.0, **kw))


# ---------------------------------------------------------------------------------------------
# Worked example: Thrun, Burgard and Fox, Probabilistic Robotics (2005), ch. 2, the door
# (values from memory): prior bel(open) = 0.5; p(z=open | open) = 0.6, p(z=open | closed) = 0.2.
# After sensing "open": bel(open) = 0.6*0.5 / (0.6*0.5 + 0.2*0.5) = 0.75.
# Then the robot pushes: p(open | push, open) = 1, p(open | push, closed) = 0.8 -> bel_bar(open) = 0.95;
# sensing "open" again gives 0.6*0.95 / (0.6*0.95 + 0.2*0.05) = 0.983.
# ---------------------------------------------------------------------------------------------
def test_door_example_bayes_update_kernel():
    bel = np.array([[[0.5, 0.5]]], np.float32)  # one heading, one row, two states: open, closed
    vol = np.log(np.array([[[0.6, 0.2]]], np.float32))
    active = np.ones(1, np.uint8)
    lsum = np.zeros(1)
    z = np.zeros(1)
    s = K.sample_update(bel, z, z, 0.0, 2 * math.pi, vol, 0.0, 0.0, 1.0, 0.0, 2 * math.pi, True,
                        float(vol.max()), float(vol.min()), 1.0, 40.0, active, lsum)
    bel /= s
    assert abs(bel[0, 0, 0] - 0.75) < 1e-6
    assert abs(bel[0, 0, 1] - 0.25) < 1e-6
    # the predictive likelihood relative to the best state: (0.6*0.5 + 0.2*0.5) / 0.6
    assert abs(s - (0.4 / 0.6)) < 1e-6
    # the push (a discrete motion model applied by hand), then the second "open" reading
    bel2 = np.array([[[1.0 * bel[0, 0, 0] + 0.8 * bel[0, 0, 1], 0.2 * bel[0, 0, 1]]]], np.float32)
    assert abs(bel2[0, 0, 0] - 0.95) < 1e-6
    s = K.sample_update(bel2, z, z, 0.0, 2 * math.pi, vol, 0.0, 0.0, 1.0, 0.0, 2 * math.pi, True,
                        float(vol.max()), float(vol.min()), 1.0, 40.0, active, lsum)
    assert abs(bel2[0, 0, 0] / s - 0.57 / 0.58) < 1e-6  # 0.983


def test_update_is_bayes_rule_on_random_volume(rng):
    f = _filter(n=12, A=8)
    prior = rng.random((8, 12, 12)).astype(np.float32)
    prior /= prior.sum()
    f.bel[:] = prior
    L = (rng.standard_normal((8, 12, 12)) * 3).astype(np.float32)
    lp = f.update(LikelihoodVolume(L, f.row0, f.col0, 0.0, 2 * math.pi / 8))
    ref = prior.astype(np.float64) * np.exp(L - L.max())
    assert abs(lp - math.log(ref.sum())) < 1e-5
    ref /= ref.sum()
    assert np.max(np.abs(f.bel - ref)) < 1e-6


def test_likelihood_weight_tempers(rng):
    f = _filter(n=8, A=4, likelihood_weight=0.5)
    f.bel[:] = 1.0 / f.n_cells
    L = (rng.standard_normal((4, 8, 8)) * 2).astype(np.float32)
    f.update(LikelihoodVolume(L, f.row0, f.col0, 0.0, 2 * math.pi / 4))
    ref = np.exp(0.5 * (L - L.max()).astype(np.float64))
    assert np.max(np.abs(f.bel - ref / ref.sum())) < 1e-6


@pytest.mark.parametrize("fill", ["mean", "min"])
def test_poses_the_volume_does_not_cover_get_the_chosen_fill(rng, fill):
    # the volume covers only the west half of the window and headings 0..3 of 8: the rest is
    # "not seen" by this frame; with "mean" it keeps the volume's average log-likelihood (no
    # information), with "min" the worst value (the old behaviour, which starved a true pose
    # outside the tracking box)
    f = _filter(n=12, A=8, outside_fill=fill)
    prior = rng.random((8, 12, 12)).astype(np.float32)
    prior /= prior.sum()
    f.bel[:] = prior
    L = (rng.standard_normal((4, 12, 6)) * 3).astype(np.float32)
    f.update(LikelihoodVolume(L, f.row0, f.col0, 0.0, 2 * math.pi / 8))
    lout = float(L.mean(dtype=np.float64)) if fill == "mean" else float(L.min())
    Lf = np.full((8, 12, 12), lout)
    Lf[:4, :, :6] = L
    ref = prior.astype(np.float64) * np.exp(Lf - L.max())
    ref /= ref.sum()
    assert np.max(np.abs(f.bel - ref)) < 1e-6


def test_outside_fill_is_validated():
    from tinyloc.errors import InputError

    with pytest.raises(InputError, match="outside_fill"):
        TrackParams(outside_fill="median")
    with pytest.raises(InputError, match="fallback_weight"):
        TrackParams(fallback_weight=1.5)


# ---------------------------------------------------------------------------------------------
# Predict on a grid: mass is conserved, the shift is exact, the diffusion matches a
# hand-computed convolution and the reference libraries.
# ---------------------------------------------------------------------------------------------
def test_predict_shift_conserves_mass_and_moves_whole_cells():
    f = _filter(n=32, A=4)
    f.bel[:] = 0.0
    f.bel[0, 16, 10] = 1.0  # layer 0 faces east (yaw 0)
    f.bel[1, 16, 16] = 1.0  # layer 1 faces north (yaw pi/2)
    f.normalise()
    f.predict(3 * 0.5, 0.0, 0.0)  # 3 cells forward
    assert abs(float(f.bel.sum(dtype=np.float64)) - 1.0) < 1e-6
    assert f.bel[0, 16, 13] == pytest.approx(0.5)  # east: +3 columns
    assert f.bel[1, 13, 16] == pytest.approx(0.5)  # north: -3 rows (row 0 is the north edge)
    assert np.max(np.abs(f.dr)) < 1e-9 and np.max(np.abs(f.dc)) < 1e-9


def test_predict_keeps_sub_cell_offsets():
    f = _filter(n=32, A=4)
    f.bel[:] = 0.0
    f.bel[0, 16, 10] = 1.0
    for _ in range(5):
        f.predict(0.1, 0.0, 0.0)  # 5 x 0.2 cells = 1 cell in total, never smeared
    assert f.bel[0, 16, 11] == pytest.approx(1.0)
    assert abs(f.dc[0]) < 1e-9
    f.predict(0.1, 0.0, 0.0)
    assert f.bel[0, 16, 11] == pytest.approx(1.0) and abs(f.dc[0] - 0.2) < 1e-9
    e = f.estimate()
    # pose = cell centre + offset: x = x_min + (col0 + 11 + 0.5 + 0.2) * res
    assert abs(e.x - GEOM.xy_of(0, f.col0 + 11.7)[0]) < 1e-9


def test_predict_left_motion_and_heading_roll():
    f = _filter(n=32, A=4)
    f.bel[:] = 0.0
    f.bel[0, 16, 16] = 1.0  # facing east; "left" is north
    f.predict(0.0, 1.0, 0.0)  # 2 cells left
    assert f.bel[0, 14, 16] == pytest.approx(1.0)
    f.predict(0.0, 0.0, math.pi / 2)  # quarter turn: layer 0 -> layer 1
    assert f.bel[1, 14, 16] == pytest.approx(1.0)
    assert abs(f.hoff) < 1e-9


def test_diffusion_matches_hand_computed_convolution():
    # 3-tap kernel [w, 1-2w, w], w = 0.1, applied twice to a unit impulse (by hand):
    # once: [0.1, 0.8, 0.1]; twice: [0.01, 0.16, 0.66, 0.16, 0.01].
    src = np.zeros((1, 1, 9), np.float32)
    src[0, 0, 4] = 1.0
    dst = np.zeros_like(src)
    tmp = np.zeros((1, 9), np.float32)
    act = np.ones(1, np.uint8)
    K.blur3_space(src, dst, tmp, 0.0, 0.1, np.float32(0.0), act)
    K.blur3_space(dst, src, tmp, 0.0, 0.1, np.float32(0.0), act)
    assert np.max(np.abs(src[0, 0] - [0, 0, 0.01, 0.16, 0.66, 0.16, 0.01, 0, 0])) < 1e-7
    # np.convolve as an independent reference
    ref = np.convolve(np.convolve([0, 0, 0, 0, 1.0, 0, 0, 0, 0], [0.1, 0.8, 0.1], "same"), [0.1, 0.8, 0.1], "same")
    assert np.max(np.abs(src[0, 0] - ref)) < 1e-7


def test_blur_space_matches_scipy(rng):
    a = rng.random((3, 20, 24)).astype(np.float32)
    dst = np.zeros_like(a)
    K.blur3_space(a, dst, np.zeros((20, 24), np.float32), 0.2, 0.15, np.float32(0.0), np.ones(3, np.uint8))
    k_r = np.array([0.2, 0.6, 0.2])
    k_c = np.array([0.15, 0.7, 0.15])
    ref = ndimage.convolve1d(ndimage.convolve1d(a.astype(np.float64), k_r, axis=1, mode="constant"),
                             k_c, axis=2, mode="constant")
    assert np.max(np.abs(dst - ref)) < 1e-6


def test_blur_heading_matches_scipy_wrap(rng):
    a = rng.random((12, 5, 6)).astype(np.float32)
    dst = np.zeros_like(a)
    K.blur3_heading(a, dst, 0.25, np.ones(12, np.uint8), np.zeros(12))
    ref = ndimage.convolve1d(a.astype(np.float64), [0.25, 0.5, 0.25], axis=0, mode="wrap")
    assert np.max(np.abs(dst - ref)) < 1e-6


def test_added_noise_has_the_model_variance():
    f = _filter(n=48, A=4)
    f.bel[:] = 0.0
    f.bel[0, 24, 24] = 1.0
    var_m2 = 0.3
    f.add_noise(var_m2, 0.0, now=True)
    m = f.bel[0].astype(np.float64)
    m /= m.sum()
    ii, jj = np.mgrid[0:48, 0:48]
    var_c = float((m * (jj - 24.0) ** 2).sum()) * 0.25
    var_r = float((m * (ii - 24.0) ** 2).sum()) * 0.25
    assert abs(var_c - var_m2) < 1e-6 and abs(var_r - var_m2) < 1e-6
    # compare with the Gaussian of the same variance from scipy (shape, not only the moment)
    g = np.zeros((48, 48))
    g[24, 24] = 1.0
    g = ndimage.gaussian_filter(g, math.sqrt(var_m2) / 0.5)
    assert np.max(np.abs(m - g)) < 0.02


# ---------------------------------------------------------------------------------------------
# Kernels against slow, obviously right references.
# ---------------------------------------------------------------------------------------------
def _slow_sample(bel, dr, dc, hoff, dyaw, vol, vrow, vcol, vscale, vyaw0, vdyaw, circ, lmax, lout, w, clip):
    A, H, W = bel.shape
    VA, VH, VW = vol.shape
    out = bel.astype(np.float64).copy()

    def lin(u, n):
        if u < -0.5 or u > n - 0.5:
            return None
        u = min(max(u, 0.0), n - 1.0)
        i0 = min(int(math.floor(u)), max(n - 2, 0))
        return i0, (u - i0) if n > 1 else 0.0

    for a in range(A):
        u = ((a + hoff) * dyaw - vyaw0) / vdyaw
        if not circ:
            span = 2 * math.pi / vdyaw
            while u >= span - 0.5:
                u -= span
            while u < -0.5:
                u += span
        for i in range(H):
            for j in range(W):
                L = lout
                if circ:
                    u2 = u % VA
                    a0 = int(math.floor(u2)) % VA
                    fa = u2 - math.floor(u2)
                    a1 = (a0 + 1) % VA
                    ha = (a0, fa, a1)
                else:
                    r = lin(u, VA)
                    ha = None if r is None else (r[0], r[1], r[0] + 1 if VA > 1 else r[0])
                # volume cell u is centred at vscale * (u + 0.5) cells from the volume's origin
                rr = lin((vrow + i + 0.5 + dr[a]) / vscale - 0.5, VH)
                cc = lin((vcol + j + 0.5 + dc[a]) / vscale - 0.5, VW)
                if ha is not None and rr is not None and cc is not None:
                    a0, fa, a1 = ha
                    i0, fr = rr
                    j0, fc = cc
                    i1, j1 = min(i0 + 1, VH - 1), min(j0 + 1, VW - 1)
                    val = 0.0
                    for ia, wa in ((a0, 1 - fa), (a1, fa)):
                        for ii, wi in ((i0, 1 - fr), (i1, fr)):
                            for jj, wj in ((j0, 1 - fc), (j1, fc)):
                                val += wa * wi * wj * vol[ia, ii, jj]
                    L = val
                out[a, i, j] *= math.exp(max(-clip, w * (L - lmax)))
    return out


@pytest.mark.parametrize("circ,vyaw0,vscale", [(True, 0.1, 1.0), (False, -0.2, 1.0), (False, 5.9, 1.0),
                                               (False, 0.3, 2.0)])
def test_sample_update_matches_slow_reference(rng, circ, vyaw0, vscale):
    # vyaw0 = 5.9 rad: the partial volume's headings run past 2 pi and wrap to the first layers
    A, H, W = 8, 7, 9
    bel = rng.random((A, H, W)).astype(np.float32)
    dr = rng.uniform(-0.5, 0.5, A)
    dc = rng.uniform(-0.5, 0.5, A)
    VA = 8 if circ else 5
    vol = (rng.standard_normal((VA, 6, 8)) * 2).astype(np.float32)
    dyaw = 2 * math.pi / A
    vdyaw = 2 * math.pi / VA if circ else dyaw
    args = (0.3, dyaw, vol, -1.3, 0.7, vscale, vyaw0, vdyaw, circ, float(vol.max()), float(vol.min()), 0.8, 40.0)
    ref = _slow_sample(bel, dr, dc, *args)
    fast = bel.copy()
    lsum = np.zeros(A)
    s = K.sample_update(fast, dr, dc, *args, np.ones(A, np.uint8), lsum)
    assert np.max(np.abs(fast - ref)) < 1e-5 * ref.max()
    assert abs(s - ref.sum()) < 1e-4 * ref.sum()
    assert np.max(np.abs(lsum - ref.sum(axis=(1, 2)))) < 1e-4 * ref.sum()


def test_shift_roll_matches_numpy(rng):
    A, H, W = 6, 10, 11
    src = rng.random((A, H, W)).astype(np.float32)
    kr = rng.integers(-3, 4, A)
    kc = rng.integers(-3, 4, A)
    dst = np.zeros_like(src)
    K.shift_roll(src, dst, kr, kc, 2, np.float32(-1.0), np.ones(A, np.uint8))
    for a in range(A):
        ref = np.full((H, W), -1.0, np.float32)
        r, c = kr[a], kc[a]
        ref[max(r, 0):H + min(r, 0), max(c, 0):W + min(c, 0)] = src[a, max(-r, 0):H - max(r, 0),
                                                                    max(-c, 0):W - max(c, 0)]
        assert np.array_equal(dst[(a + 2) % A], ref)


def test_robust_xy_update_matches_numpy(rng):
    A, H, W = 3, 9, 10
    bel = rng.random((A, H, W)).astype(np.float32)
    dr = rng.uniform(-0.5, 0.5, A)
    dc = rng.uniform(-0.5, 0.5, A)
    fast = bel.copy()
    K.xy_robust_update(fast, dr, dc, 100.0, 50.0, 104.2, 55.1, 3.0, 3.0, 0.7, np.ones(A, np.uint8))
    ii, jj = np.mgrid[0:H, 0:W]
    for a in range(A):
        r2 = (100 + ii + 0.5 + dr[a] - 104.2) ** 2 + (50 + jj + 0.5 + dc[a] - 55.1) ** 2
        ref = bel[a] * (1 + r2 / (3.0 * 9.0)) ** (-0.5 * 5.0 * 0.7)
        assert np.max(np.abs(fast[a] - ref)) < 1e-6


def test_moments_match_numpy(rng):
    A, H, W = 8, 6, 7
    bel = rng.random((A, H, W)).astype(np.float32)
    dr = rng.uniform(-0.5, 0.5, A)
    dc = rng.uniform(-0.5, 0.5, A)
    acc = np.zeros(10)
    hoff, dyaw = 0.2, 2 * math.pi / A
    K.moments_about(bel, dr, dc, hoff, dyaw, 3.1, 2.7, 3.0, 0.0, acc, np.ones(A, np.uint8))
    a, i, j = np.meshgrid(np.arange(A), np.arange(H), np.arange(W), indexing="ij")
    drow = i + 0.5 + dr[a] - 3.1
    dcol = j + 0.5 + dc[a] - 2.7
    da = np.angle(np.exp(1j * ((a + hoff) * dyaw - 3.0)))
    w = bel.astype(np.float64)
    ref = [w.sum(), (w * drow).sum(), (w * dcol).sum(), (w * da).sum(), (w * drow ** 2).sum(),
           (w * dcol ** 2).sum(), (w * da ** 2).sum(), (w * drow * dcol).sum(), (w * drow * da).sum(),
           (w * dcol * da).sum()]
    assert np.max(np.abs(acc - ref)) < 1e-4


def test_inactive_layers_are_carried_as_their_mass():
    f = _filter(n=16, A=16)
    f.bel[:] = 0.0
    f.bel[3, 8, 8] = 1.0
    f.normalise()
    L = np.zeros((16, 16, 16), np.float32)
    f.update(LikelihoodVolume(L, f.row0, f.col0, 0.0, 2 * math.pi / 16))
    assert f.active.sum() == 7  # layer 3 and 3 on each side
    assert abs(f.lsum.sum() - 1.0) < 1e-9
    f.activate_all()
    assert abs(float(f.bel.sum(dtype=np.float64)) - 1.0) < 1e-6


# ---------------------------------------------------------------------------------------------
# Estimates: the refined mode, and a covariance that is honest about several modes.
# ---------------------------------------------------------------------------------------------
def _gauss_volume(f, x, y, yaw, sx, syaw):
    A = f.A
    a = (np.arange(A) + f.hoff) * f.dyaw
    da = np.angle(np.exp(1j * (a - yaw)))
    ii, jj = np.mgrid[0:f.H, 0:f.W]
    r, c = GEOM.cell_of(x, y)
    d2 = ((f.row0 + ii + 0.5 - r) ** 2 + (f.col0 + jj + 0.5 - c) ** 2) * GEOM.res_m ** 2
    L = -0.5 * (da[:, None, None] / syaw) ** 2 - 0.5 * d2[None] / sx ** 2
    return LikelihoodVolume(L.astype(np.float32), f.row0, f.col0, 0.0, f.dyaw)


def test_estimate_recovers_a_sub_cell_gaussian_peak():
    f = GridFilter(GEOM, TrackParams(window_cells=32, headings=64, floor=0.0, likelihood_weight=1.0))
    f.reset(50.0, 150.0)
    x, y, yaw = 50.37, 149.81, 0.4321
    e = None
    for sx in (1.0, 0.3, 0.15):  # broad to sharper than a cell: the refined peak must not snap to the lattice
        f.reset(50.0, 150.0)
        f.update(_gauss_volume(f, x, y, yaw, sx, 0.05))
        e = f.estimate()
        assert math.hypot(e.x - x, e.y - y) < 0.01, sx
        assert abs(e.yaw - yaw) < 0.01
    # covariance: at least the true variance (0.15 m) and the cell quantisation
    assert e.cov[0, 0] >= 0.15 ** 2 * 0.9


def test_two_modes_give_a_large_covariance_not_a_confident_mean():
    f = GridFilter(GEOM, TrackParams(window_cells=64, headings=32, floor=0.0, likelihood_weight=1.0))
    f.reset(50.0, 150.0)
    v1 = _gauss_volume(f, 45.0, 150.0, 0.0, 0.5, 0.05)
    v2 = _gauss_volume(f, 55.0, 150.0, 0.0, 0.5, 0.05)
    L = np.logaddexp(v1.loglik, v2.loglik).astype(np.float32)
    f.update(LikelihoodVolume(L, f.row0, f.col0, 0.0, f.dyaw))
    e = f.estimate()
    # the pose is one of the modes, not the mean between them
    assert min(abs(e.x - 45.0), abs(e.x - 55.0)) < 0.1
    # the second mode, 10 m away with half the mass, adds about 0.5 * 10^2 = 50 m^2 along x
    assert e.cov[0, 0] > 40.0
    assert len(e.modes) >= 2 and abs(e.modes[0][3] - 0.5) < 0.05 and abs(e.modes[1][3] - 0.5) < 0.05


# ---------------------------------------------------------------------------------------------
# The robust GNSS prior against scipy's multivariate Student-t and normal densities.
# ---------------------------------------------------------------------------------------------
def test_student_t_matches_scipy():
    for nu in (2.0, 3.0, 7.0):
        for s in (1.0, 4.0):
            ref = stats.multivariate_t(loc=[0, 0], shape=np.eye(2) * s * s, df=nu)
            for r in (0.0, 1.0, 5.0, 30.0):
                assert abs(student_t_logpdf(r, s, nu) - ref.logpdf([r, 0.0])) < 1e-9


def test_student_t_tends_to_gaussian_and_has_heavy_tail():
    g = stats.multivariate_normal(mean=[0, 0], cov=np.eye(2) * 9.0)
    assert abs(student_t_logpdf(2.0, 3.0, 1e7) - g.logpdf([2.0, 0])) < 1e-5
    # a 30 m outlier with a 3 m scale: the Gaussian calls it impossible, the t-prior only unlikely
    assert student_t_logpdf(30.0, 3.0, 3.0) - g.logpdf([30.0, 0]) > 40.0


def test_effective_sigma_distrusts_optimistic_accuracy():
    p = GnssParams(sigma_floor_m=3.0, acc_scale=1.5)
    assert effective_sigma_m(0.5, p) == 3.0
    assert effective_sigma_m(4.0, p) == 6.0
    assert effective_sigma_m(float("nan"), p) == 3.0
