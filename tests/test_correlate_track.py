"""The tracking update over a frame's support: exact against the direct-sum reference, smaller boxes per call.

Reference: the direct sum over the rotated template in tests/_correlate_helpers.py (the rotated grid by its
definition in plain loops, then a sum over the map; docs/correlator.md), computed in float64 from the
scoring model's definition. The frames here see only a wedge of their grid and lack some features (the
case the per-frame support engine is built for), unlike the fully random grids of test_correlate_exact.py.
"""

import math
import tracemalloc
import warnings

import numpy as np
import pytest

from _correlate_helpers import blob_map, direct_score, rotate_template

warnings.filterwarnings("ignore", message="nopython is set for njit")

from tinyloc.classes import BUILDING, NUM_MAP_CLASSES  # noqa: E402
from tinyloc.correlate import Correlator, CorrelatorParams, ScoringModel  # noqa: E402
from tinyloc.correlate.correlator import template_reach  # noqa: E402
from tinyloc.correlate.synth import SyntheticBev  # noqa: E402
from tinyloc.errors import InputError  # noqa: E402

W = 128


def wedge_bev(rng, *, no_buildings=True, rows=(9, 54), max_col=39):
    """Random evidence inside a forward wedge (rows 9..54, columns up to 39 of a 64 x 64 grid, robot at (32, 0)):
    the shape of the live loop's frames (20 m range); without building evidence by default."""
    h = w = 64
    rr, cc = np.mgrid[0:h, 0:w]
    inside = (rr >= rows[0]) & (rr <= rows[1]) & (cc <= max_col) & (np.abs(rr + 0.5 - 32.0) <= cc + 2.0)
    ev = rng.uniform(size=(NUM_MAP_CLASSES, h, w)).astype(np.float32) * inside
    if no_buildings:
        ev[BUILDING] = 0.0
    free = (rng.uniform(size=(h, w)) * inside).astype(np.float32)
    return SyntheticBev(ev.astype(np.float32), free, inside.astype(np.float32), 0.5, 32.0, 0.0)


def features64(model, bev):
    chans = np.concatenate([bev.evidence, bev.free[None], bev.visible[None]]).astype(np.float64)
    return np.einsum("fk,khw->fhw", model.bev_weights.astype(np.float64), chans)


@pytest.fixture(scope="module")
def setup():
    rng = np.random.default_rng(77)
    model = ScoringModel.default()
    win = blob_map(rng, W)
    support = Correlator(CorrelatorParams(window_shape=(W, W)), model)
    fixed = Correlator(CorrelatorParams(window_shape=(W, W), track_engine="fixed"), model)
    for c in (support, fixed):
        c.set_map(win)
    return rng, model, win, support, fixed


def test_support_engine_equals_direct_sum_on_a_wedge_frame(setup):
    rng, model, win, corr, fixed = setup
    bev = wedge_bev(rng)
    feat = features64(model, bev)
    assert np.all(feat[0] == 0.0)  # the building feature is absent: the engine skips it
    G = model.map_features(win).astype(np.float64)
    P = template_reach((64, 64), 32.0, 0.0)
    for row, col, a in ((60, 70, 40), (12, 118, 250)):  # the second runs off the window and wraps the headings
        trk = corr.track(bev, row, col, a, exact=True)
        assert trk.ok and trk.volume.shape == (31, 41, 41)
        vol = trk.volume.copy()
        peak = float(np.max(np.abs(vol)))
        assert peak > 0
        worst = 0.0
        for t in (0, 7, 15, 30):
            canvas = rotate_template(feat, 2 * math.pi * ((trk.a0 + t) % 256) / 256, 32.0, 0.0, P)
            for u, v in ((0, 0), (40, 40), (20, 20), (3, 37), (33, 9)):
                i, j = trk.row0 + u, trk.col0 + v
                if not (0 <= i < W and 0 <= j < W):
                    continue
                ref = direct_score(canvas, G, i, j) / model.temperature
                worst = max(worst, abs(ref - float(vol[t, u, v])))
        assert worst <= 1e-4 * peak, (worst, peak)
        # The earlier engine (whole grid, every feature, fixed sizes) gives the same volume.
        ref_vol = fixed.track(bev, row, col, a, exact=True).volume
        assert np.max(np.abs(ref_vol - vol)) <= 1e-6 * peak
    # The engine did work at sizes below its largest ones, with 5 of the 6 features.
    e = corr._track
    assert e.last_sizes[2] == 5 and e.last_sizes[0] < e.Nr and e.last_sizes[1] < e.Nc


def test_smaller_boxes_are_slices_of_the_full_box(setup):
    rng, model, win, corr, fixed = setup
    bev = wedge_bev(rng, no_buildings=False)
    full = corr.track(bev, 64, 60, 100, exact=True).volume.copy()
    peak = float(np.max(np.abs(full)))
    small = corr.track(bev, 64, 60, 100, exact=True, radius_cells=7, half_headings=4)
    assert small.volume.shape == (9, 15, 15) and small.volume.flags.c_contiguous
    assert (small.row0, small.col0, small.a0) == (57, 53, 96)
    assert np.max(np.abs(small.volume - full[11:20, 13:28, 13:28])) <= 1e-6 * peak
    m = small.modes[0]  # modes come from the smaller volume
    assert 96 <= m.cell[0] <= 104 and 57 <= m.cell[1] <= 71 and 53 <= m.cell[2] <= 67
    # The coarse (half-resolution) volume likewise.
    cfull = corr.track(bev, 64, 60, 100).volume.copy()
    csmall = corr.track(bev, 64, 60, 100, radius_cells=8, half_headings=6)
    assert csmall.volume.shape == (7, 9, 9) and csmall.scale == 2
    assert np.max(np.abs(csmall.volume - cfull[5:12, 6:15, 6:15])) <= 1e-6 * float(np.max(np.abs(cfull)))
    for bad in (dict(radius_cells=21), dict(radius_cells=0), dict(half_headings=16), dict(half_headings=-1)):
        with pytest.raises(InputError, match="tracking box"):
            corr.track(bev, 64, 60, 100, exact=True, **bad)


def test_nothing_in_view_scores_zero_everywhere(setup):
    rng, model, win, corr, fixed = setup
    z = np.zeros((64, 64), np.float32)
    empty = SyntheticBev(np.zeros((NUM_MAP_CLASSES, 64, 64), np.float32), z, z, 0.5, 32.0, 0.0)
    trk = corr.track(empty, 64, 64, 0, exact=True)
    assert trk.ok and np.all(trk.volume == 0.0)
    assert np.array_equal(trk.volume, fixed.track(empty, 64, 64, 0, exact=True).volume)


def test_two_tracking_threads_give_the_same_volume(setup):
    rng, model, win, corr, fixed = setup
    c2 = Correlator(CorrelatorParams(window_shape=(W, W), track_threads=2), model)
    c2.set_map(win)
    bev = wedge_bev(rng)
    assert np.array_equal(c2.track(bev, 70, 50, 3, exact=True).volume, corr.track(bev, 70, 50, 3, exact=True).volume)


def test_tracking_with_varying_frames_and_boxes_allocates_nothing(setup):
    rng, model, win, corr, fixed = setup
    frames = [wedge_bev(rng), wedge_bev(rng, no_buildings=False, rows=(0, 63), max_col=63),
              wedge_bev(rng, rows=(20, 40), max_col=15)]
    calls = [(None, None), (5, 3), (20, 15), (12, 0)]
    for bev in frames:  # sizes the engine works at differ from frame to frame and call to call
        for R, hh in calls:
            corr.track(bev, 64, 64, 30, exact=True, radius_cells=R, half_headings=hh)
            corr.track(bev, 64, 64, 30, radius_cells=R, half_headings=hh)
    tracemalloc.start()
    tracemalloc.reset_peak()
    for bev in frames:
        for R, hh in calls:
            corr.track(bev, 64, 64, 30, exact=True, radius_cells=R, half_headings=hh)
            corr.track(bev, 64, 64, 30, radius_cells=R, half_headings=hh)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 64_000, peak


def test_random_supports_feature_subsets_priors_and_boxes_match_the_fixed_engine(setup):
    """Seeded random frames: a random rectangle of evidence (down to one cell), a random subset of the features
    (evidence classes zeroed), priors anywhere including off the window, random smaller boxes; the support
    engine's volume must equal the slice of the fixed engine's full volume (that engine is itself checked
    against the direct sum and OpenCV in test_correlate_exact.py)."""
    rng, model, win, corr, fixed = setup
    r = np.random.default_rng(2024)
    for trial in range(12):
        h0, w0 = (int(x) for x in r.integers(0, 64, size=2))
        h1, w1 = h0 + int(r.integers(1, 65 - h0)), w0 + int(r.integers(1, 65 - w0))
        ev = np.zeros((NUM_MAP_CLASSES, 64, 64), np.float32)
        keep = r.uniform(size=NUM_MAP_CLASSES) < 0.5
        ev[:, h0:h1, w0:w1] = r.uniform(size=(NUM_MAP_CLASSES, h1 - h0, w1 - w0)) * keep[:, None, None]
        vis = np.zeros((64, 64), np.float32)
        free = np.zeros((64, 64), np.float32)
        if r.uniform() < 0.7:
            vis[h0:h1, w0:w1] = 1.0
        if r.uniform() < 0.5:
            free[h0:h1, w0:w1] = r.uniform(size=(h1 - h0, w1 - w0))
        bev = SyntheticBev(ev, free, vis, 0.5, 32.0, 0.0)
        row, col = (int(x) for x in r.integers(-10, W + 10, size=2))
        a = int(r.integers(0, 256))
        R, hh = int(r.integers(1, 21)), int(r.integers(0, 16))
        full = fixed.track(bev, row, col, a, exact=True).volume.copy()
        got = corr.track(bev, row, col, a, exact=True, radius_cells=R, half_headings=hh).volume
        sl = full[15 - hh:16 + hh, 20 - R:21 + R, 20 - R:21 + R]
        assert got.shape == sl.shape
        peak = float(np.max(np.abs(full)))
        assert np.max(np.abs(got - sl)) <= 1e-6 * max(peak, 1e-30), (trial, h0, h1, w0, w1, keep, R, hh)
