"""Exactness of the correlator against a direct-sum reference and against OpenCV (warpAffine + matchTemplate).

References: the direct sum over rotated templates in tests/_correlate_helpers.py (plain loops, by the
definition in docs/correlator.md); OpenCV 4.x ``cv2.getRotationMatrix2D`` / ``cv2.warpAffine`` /
``cv2.matchTemplate(TM_CCORR)`` as an independent library. OpenCV's documented convention: a positive
angle in getRotationMatrix2D rotates counter-clockwise as the image is displayed (origin top-left),
which in a north-up map is our +yaw.
"""

import math
import warnings

import cv2
import numpy as np
import pytest

from _correlate_helpers import blob_map, direct_score, direct_volume, plain_model, random_bev, rotate_template

warnings.filterwarnings("ignore", message="nopython is set for njit")

from tinyloc.classes import NUM_MAP_CLASSES  # noqa: E402
from tinyloc.correlate import Correlator, CorrelatorParams, ScoringModel  # noqa: E402
from tinyloc.correlate.correlator import template_reach  # noqa: E402
from tinyloc.correlate.synth import SyntheticBev  # noqa: E402


def bev_features(model, bev):
    """E_f = sum_k w[f, k] * channel_k in float64 (the scoring definition, independent of the kernel)."""
    chans = np.concatenate([bev.evidence, bev.free[None], bev.visible[None]]).astype(np.float64)
    return np.einsum("fk,khw->fhw", model.bev_weights.astype(np.float64), chans)


SMALL = CorrelatorParams(n_headings=16, window_shape=(40, 40), bev_shape=(16, 16), origin_row=8.0, origin_col=0.0,
                         track_radius_cells=5, track_half_headings=3)


def test_small_full_volume_equals_direct_sum(rng):
    model = ScoringModel.default()
    corr = Correlator(SMALL, model)
    win = rng.uniform(size=(NUM_MAP_CLASSES, 40, 40)).astype(np.float32)
    corr.set_map(win)
    bev = random_bev(rng, (16, 16), (8.0, 0.0))
    vol = np.zeros((16, 40, 40), np.float32)
    res = corr.search(bev, volume=vol)
    assert res.ok
    feat = bev_features(model, bev)
    G = model.map_features(win).astype(np.float64)
    P = template_reach((16, 16), 8.0, 0.0)
    worst = 0.0
    peak = 0.0
    for a in range(16):
        ref = direct_volume(rotate_template(feat, 2 * math.pi * a / 16, 8.0, 0.0, P), G) / model.temperature
        worst = max(worst, float(np.max(np.abs(ref - vol[a]))))
        peak = max(peak, float(np.max(np.abs(ref))))
    assert worst <= 1e-4 * peak, (worst, peak)
    # Reduced forms are the volume's own maxima.
    assert np.array_equal(res.best, vol.max(axis=0))
    assert np.array_equal(res.heading_max, vol.reshape(16, -1).max(axis=1))


@pytest.fixture(scope="module")
def default_problem():
    """The full default problem (256 headings, 256 x 256 window, 64 x 64 grid) on random inputs, its exact volume
    and the pieces of the direct-sum reference; built once for the tests below (the volume is 64 MB)."""
    rng = np.random.default_rng(1234)
    model = ScoringModel.default()
    corr = Correlator(CorrelatorParams(), model)
    win = rng.uniform(size=(NUM_MAP_CLASSES, 256, 256)).astype(np.float32)
    corr.set_map(win)
    bev = random_bev(rng)
    vol = np.zeros((256, 256, 256), np.float32)
    corr.search(bev, volume=vol)
    feat = bev_features(model, bev)
    G = model.map_features(win).astype(np.float64)
    P = template_reach((64, 64), 32.0, 0.0)
    return model, corr, bev, vol, feat, G, P, float(np.max(np.abs(vol)))


def test_default_size_matches_direct_sum_at_sampled_poses(default_problem):
    """Full default problem: sampled cells in every quarter turn."""
    model, corr, bev, vol, feat, G, P, peak = default_problem
    worst = 0.0
    heads = [0, 1, 31, 64, 97, 128, 150, 191, 200, 255]
    cells = [(0, 0), (255, 255), (128, 5), (3, 250), (140, 120)]
    for a in heads:
        canvas = rotate_template(feat, 2 * math.pi * a / 256, 32.0, 0.0, P)
        for i, j in cells:
            ref = direct_score(canvas, G, i, j) / model.temperature
            worst = max(worst, abs(ref - float(vol[a, i, j])))
    assert worst <= 1e-4 * peak, (worst, peak)


def test_reduced_forms_and_pose_scores_match_the_references(default_problem):
    """Without a volume buffer the reduced forms are read out per quarter turn in the inverse buffers' own
    orientation: they must equal the volume's own maxima. The direct sums of the refinement (only A/4 base
    grids, turned by exact quarter turns) must equal the plain-loop reference at cells in every quarter,
    including cells whose view runs off the window."""
    from tinyloc.correlate.peaks import Mode
    model, corr, bev, vol, feat, G, P, peak = default_problem
    res = corr.search(bev)
    assert np.array_equal(res.best, vol.max(axis=0))
    ii, jj = np.mgrid[0:256, 0:256]
    # The heading given attains the maximum (equal float32 values at two headings may be listed either way).
    assert np.array_equal(vol[res.best_heading.astype(np.int64), ii, jj], res.best)
    assert np.array_equal(res.heading_max, vol.reshape(256, -1).max(axis=1))
    assert np.array_equal(vol.reshape(256, -1)[np.arange(256), res.heading_argmax], res.heading_max)
    heads = [0, 5, 63, 64, 100, 128, 170, 192, 230, 255]
    cells = [(0, 0), (255, 255), (128, 5), (3, 250), (140, 120)]
    sc = corr._scorer
    sc.new_frame(corr._feat)
    modes = [Mode(i, j, a, 0.0, (a, i, j)) for a in heads for i, j in cells]
    got = sc.climb(corr._G_hwf8, modes, 1.0 / model.temperature, max_steps=0)
    worst = 0.0
    for m, g in zip(modes, got):
        a, i, j = m.cell
        assert g.cell == m.cell
        ref = direct_score(rotate_template(feat, 2 * math.pi * a / 256, 32.0, 0.0, P), G, i, j) / model.temperature
        worst = max(worst, abs(ref - g.cell_loglik))
    assert worst <= 1e-4 * peak, (worst, peak)


def opencv_heading(feat, G, yaw, origin_row, origin_col, P):
    """Independent reference: rotate each channel with getRotationMatrix2D + warpAffine, matchTemplate, sum."""
    F = feat.shape[0]
    H, W = G.shape[1:]
    n = 2 * P + 1
    # Pixel-index coords (centre of pixel (r, c) at (c, r)); the robot origin sits at (ocol - 0.5, orow - 0.5).
    shift = np.array([[1.0, 0.0, P - (origin_col - 0.5)], [0.0, 1.0, P - (origin_row - 0.5)], [0, 0, 1]])
    rot = np.vstack([cv2.getRotationMatrix2D((float(P), float(P)), math.degrees(yaw), 1.0), [0, 0, 1]])
    M = (rot @ shift)[:2]
    acc = np.zeros((H, W), np.float64)
    for f in range(F):
        canvas = cv2.warpAffine(feat[f].astype(np.float32), M, (n, n), flags=cv2.INTER_LINEAR,
                                borderMode=cv2.BORDER_CONSTANT, borderValue=0.0)
        Gp = cv2.copyMakeBorder(G[f].astype(np.float32), P, P, P, P, cv2.BORDER_CONSTANT, value=0.0)
        acc += cv2.matchTemplate(Gp, canvas, cv2.TM_CCORR)
    return acc


def test_volume_matches_opencv_warpaffine_matchtemplate(rng):
    model = ScoringModel.default()
    p = CorrelatorParams(window_shape=(128, 128))
    corr = Correlator(p, model)
    win = blob_map(rng, 128)
    corr.set_map(win)
    bev = random_bev(rng)
    vol = np.zeros((256, 128, 128), np.float32)
    corr.search(bev, volume=vol)
    feat = bev_features(model, bev)
    G = model.map_features(win).astype(np.float64)
    P = template_reach((64, 64), 32.0, 0.0)
    for a in (0, 20, 64, 100, 128, 170, 224, 250):
        ref = opencv_heading(feat, G, 2 * math.pi * a / 256, 32.0, 0.0, P) / model.temperature
        ours = vol[a].astype(np.float64)
        peak = float(np.max(np.abs(ref)))
        # OpenCV's bilinear warp quantizes sample positions to 1/32 pixel: agreement to ~1 %, not to rounding.
        assert float(np.max(np.abs(ref - ours))) <= 0.02 * peak, a
        assert np.unravel_index(np.argmax(ref), ref.shape) == np.unravel_index(np.argmax(ours), ours.shape)


@pytest.mark.parametrize("steps", [0, 21, 64, 100, 127, 128, 129, 192, 235, 255])
def test_rotation_recovered_at_plus_theta_like_opencv(steps):
    """A world turned counter-clockwise by +theta (OpenCV getRotationMatrix2D, positive angle) about the robot
    is found at heading +theta, also across +-180 deg (steps 127..129 of 256)."""
    rng = np.random.default_rng(2024)
    S = 160
    world = blob_map(rng, S, n_blobs=90)
    r0, c0 = 80, 80  # robot cell; origin at its centre
    # Grid seen at yaw 0 in the unturned world: the map patch east of the robot, rows south.
    ev = np.ascontiguousarray(world[:, r0 - 32:r0 + 32, c0:c0 + 64])
    one = np.ones((64, 64), np.float32)
    bev = SyntheticBev(ev, np.zeros_like(one), one, 0.5, 32.5, 0.5)
    theta = 2 * math.pi * steps / 256
    M = cv2.getRotationMatrix2D((float(c0), float(r0)), math.degrees(theta), 1.0)
    turned = np.stack([cv2.warpAffine(world[c], M, (S, S), flags=cv2.INTER_LINEAR) for c in range(NUM_MAP_CLASSES)])
    p = CorrelatorParams(window_shape=(S, S), origin_row=32.5, origin_col=0.5)
    corr = Correlator(p, plain_model(classes=tuple(range(NUM_MAP_CLASSES))))
    corr.set_map(turned)
    best = corr.search(bev).modes[0]
    a, i, j = best.cell
    assert (i, j) == (r0, c0)
    assert min((a - steps) % 256, (steps - a) % 256) == 0
    yaw = corr.pose_of(best)[2]
    assert abs(math.remainder(yaw - theta, 2 * math.pi)) <= 0.5 * p.dyaw


def test_tracking_volume_equals_exact_volume(rng):
    model = ScoringModel.default()
    p = CorrelatorParams(window_shape=(128, 128))
    corr = Correlator(p, model)
    corr.set_map(blob_map(rng, 128))
    bev = random_bev(rng)
    vol = np.zeros((256, 128, 128), np.float32)
    corr.search(bev, volume=vol)
    tol = 1e-4 * float(np.max(np.abs(vol)))
    for row, col, a in ((60, 70, 3), (10, 120, 250)):  # second one runs off the window and wraps the headings
        trk = corr.track(bev, row, col, a, exact=True)
        assert trk.ok
        T, Ho, Wo = trk.volume.shape
        for t in range(T):
            aa = (trk.a0 + t) % 256
            for u in range(Ho):
                i = trk.row0 + u
                if not 0 <= i < 128:
                    continue
                js = [trk.col0 + v for v in range(Wo) if 0 <= trk.col0 + v < 128]
                ref = vol[aa, i, js[0]:js[-1] + 1]
                got = trk.volume[t, u, js[0] - trk.col0:js[-1] - trk.col0 + 1]
                assert np.max(np.abs(ref - got)) <= tol


def test_two_threads_give_the_same_volume(rng):
    win = rng.uniform(size=(NUM_MAP_CLASSES, 40, 40)).astype(np.float32)
    bev = random_bev(rng, (16, 16), (8.0, 0.0))
    vols = []
    for threads in (1, 2):
        corr = Correlator(CorrelatorParams(**{**SMALL.__dict__, "threads": threads}))
        corr.set_map(win)
        v = np.zeros((16, 40, 40), np.float32)
        res = corr.search(bev, volume=v)
        vols.append((v, res.best.copy()))
    assert np.array_equal(vols[0][0], vols[1][0]) and np.array_equal(vols[0][1], vols[1][1])
