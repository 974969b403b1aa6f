"""Coarse-to-fine search vs exact, planted poses, ambiguity, allocation, failure as data, bad input.

The fast modes are approximations of the exact search: they are checked against it on planted-pose
trials with noise and map errors. The issue asks for 200 trials (>= 99 % agreement); that many take
several minutes, so this file runs 12 and ``tinyloc bench correlate --agreement 200`` runs the full
set (figures in docs/correlator.md).
"""

import math
import tracemalloc
import warnings

import numpy as np
import pytest

from _correlate_helpers import random_bev

warnings.filterwarnings("ignore", message="nopython is set for njit")

from tinyloc.classes import NUM_MAP_CLASSES  # noqa: E402
from tinyloc.correlate import Correlator, CorrelatorParams, ScoringModel  # noqa: E402
from tinyloc.correlate import synth  # noqa: E402
from tinyloc.errors import InputError  # noqa: E402


@pytest.fixture(scope="module")
def corr():
    c = Correlator(CorrelatorParams())
    c.warm_up(("exact", "fast", "track", "track_exact"))
    return c


@pytest.fixture(scope="module")
def site():
    return synth.street_map(320, 101)


def circ(a, b, n=256):
    return min((a - b) % n, (b - a) % n)


def test_fast_search_agrees_with_exact_on_planted_poses(corr, site):
    rng = np.random.default_rng(77)
    strict = tolerant = 0
    trials = 12
    for _ in range(trials):
        r0, c0 = rng.integers(0, 64, size=2)
        win = np.ascontiguousarray(site[:, r0:r0 + 256, c0:c0 + 256])
        corr.set_map(win)
        row, col = rng.uniform(60, 196, size=2)
        bev = synth.cut_bev(win, row, col, rng.uniform(-math.pi, math.pi), rng, noise=rng.uniform(0.05, 0.3),
                            dropout=rng.uniform(0.1, 0.4), clutter=0.03, map_error_cells=rng.uniform(0.0, 1.0))
        exm = corr.search(bev).modes[0]
        fam = corr.search_fast(bev).modes[0]
        ex, fa = exm.cell, fam.cell
        ok = abs(ex[1] - fa[1]) <= 1 and abs(ex[2] - fa[2]) <= 1 and circ(ex[0], fa[0]) <= 1
        strict += ok
        # A different pose whose exact score ties with the maximum (within 0.05 nats) is also a best pose.
        tolerant += ok or exm.cell_loglik - fam.cell_loglik <= 0.05
        assert fam.cell_loglik <= exm.cell_loglik + 1e-3  # the exact search really is the maximum
    assert strict >= trials - 2 and tolerant == trials, (strict, tolerant)


def test_fast_tracking_agrees_with_exact_tracking(corr, site):
    rng = np.random.default_rng(5)
    win = np.ascontiguousarray(site[:, 20:276, 30:286])
    corr.set_map(win)
    for _ in range(6):
        row, col = rng.uniform(90, 166, size=2)
        yaw = rng.uniform(-math.pi, math.pi)
        bev = synth.cut_bev(win, row, col, yaw, rng, noise=0.15, map_error_cells=0.5)
        a = yaw / corr.params.dyaw
        prior = (row + rng.uniform(-6, 6), col + rng.uniform(-6, 6), int(round(a + rng.uniform(-6, 6))) % 256)
        ex = corr.track(bev, *prior, exact=True).modes[0].cell
        fa = corr.track(bev, *prior).modes[0].cell
        assert abs(ex[1] - fa[1]) <= 1 and abs(ex[2] - fa[2]) <= 1 and circ(ex[0], fa[0]) <= 1


def test_tracking_modes_are_worked_out_when_read_and_only_before_the_next_call(corr, site):
    win = np.ascontiguousarray(site[:, 20:276, 30:286])
    corr.set_map(win)
    bev = synth.cut_bev(win, 120.0, 130.0, 0.7, np.random.default_rng(2), noise=0.1)
    a = int(round(0.7 / corr.params.dyaw))
    for exact in (False, True):
        trk = corr.track(bev, 121, 128, a + 3, exact=exact)
        m = trk.modes[0]
        assert trk.modes[0] is m  # worked out once
        assert abs(m.row - 119.5) <= 1.5 and abs(m.col - 129.5) <= 1.5 and circ(m.cell[0], a) <= 2, m
        stale = corr.track(bev, 121, 128, a + 3, exact=exact)
        corr.search_fast(bev)
        with pytest.raises(InputError, match="read it before the next call"):
            stale.modes


def test_planted_pose_recovered_with_subcell_refinement(corr, site):
    """Clean grid cut at a planted pose between cells and headings: the refined mode is near the truth."""
    rng = np.random.default_rng(9)
    win = np.ascontiguousarray(site[:, 0:256, 0:256])
    corr.set_map(win)
    hits = 0
    for _ in range(8):
        row, col = rng.uniform(70, 186, size=2)
        yaw = rng.uniform(-math.pi, math.pi)
        bev = synth.cut_bev(win, row, col, yaw, rng, noise=0.05, dropout=0.05, clutter=0.0)
        m = corr.search_fast(bev).modes[0]
        r, c, y = corr.pose_of(m)
        err_m = math.hypot(r - row, c - col) * 0.5
        err_deg = abs(math.degrees(math.remainder(y - yaw, 2 * math.pi)))
        hits += err_m <= 1.0 and err_deg <= 3.0
    assert hits >= 6, hits


def test_straight_street_is_multimodal(corr):
    """On a featureless straight street the pose along the street is unobservable: several modes, far apart
    along the street, with likelihoods close to the best (not a falsely confident single peak)."""
    street = synth.street_map(256, 0, straight=True)
    corr.set_map(street)
    rng = np.random.default_rng(3)
    bev = synth.cut_bev(street, 128.0, 100.0, 0.0, rng, noise=0.1)
    res = corr.search_fast(bev)
    best = res.modes[0]
    rivals = [m for m in res.modes[1:] if abs(m.col - best.col) >= 6 and best.loglik - m.loglik <= math.log(10.0)]
    assert len(rivals) >= 2, [(m.row, m.col, m.heading, m.loglik) for m in res.modes]
    # Across the street the pose is observable: the rivals stay on the same line.
    assert all(abs(m.row - best.row) <= 2 for m in rivals)


def test_repeated_calls_allocate_nothing(corr, site):
    corr.set_map(np.ascontiguousarray(site[:, 0:256, 0:256]))
    bev = synth.cut_bev(site, 128.0, 128.0, 0.3, np.random.default_rng(1))
    vol = np.zeros((256, 256, 256), np.float32)
    for _ in range(1):
        corr.search(bev, volume=vol)
        corr.search_fast(bev)
        corr.track(bev, 128, 128, 14)
        corr.track(bev, 128, 128, 14, exact=True)
    tracemalloc.start()
    tracemalloc.reset_peak()
    corr.search(bev, volume=vol)
    corr.search_fast(bev)
    corr.track(bev, 128, 128, 14)
    corr.track(bev, 128, 128, 14, exact=True)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    # No array is allocated; what remains are small Python objects (modes, lists, dict of scores).
    assert peak < 64_000, peak


def test_bad_frames_are_data_not_exceptions(corr, site):
    corr.set_map(np.ascontiguousarray(site[:, 0:256, 0:256]))
    rng = np.random.default_rng(0)
    bev = random_bev(rng)
    unusable = synth.SyntheticBev(bev.evidence, bev.free, bev.visible, 0.5, 32.0, 0.0, status="camera dark")
    res = corr.search_fast(unusable)
    assert not res.ok and "camera dark" in res.status and res.modes == []
    small = random_bev(rng, shape=(32, 32), origin=(16.0, 0.0))
    for r in (corr.search(small), corr.search_fast(small), corr.track(small, 100, 100, 0)):
        assert not r.ok and "expected float32" in r.status
    coarse = synth.SyntheticBev(bev.evidence, bev.free, bev.visible, 1.0, 32.0, 0.0)
    assert "resolution or origin" in corr.track(coarse, 100, 100, 0).status


def test_bad_parameters_and_windows_raise_one_line_errors():
    with pytest.raises(InputError, match="multiple of 8"):
        CorrelatorParams(n_headings=100)
    with pytest.raises(InputError, match="must be even"):
        CorrelatorParams(window_shape=(255, 256))
    with pytest.raises(InputError, match="multiple of 4, got 200 / 4"):
        CorrelatorParams(n_headings=200, coarse_heading_step=4)
    assert CorrelatorParams(n_headings=200).coarse_step == 2 and CorrelatorParams().coarse_step == 4
    assert CorrelatorParams(coarse_heading_step=8).coarse_step == 8
    with pytest.raises(InputError, match="coarse_heading_step must be"):
        CorrelatorParams(coarse_heading_step=3)
    c = Correlator(CorrelatorParams(window_shape=(64, 64), n_headings=32, track_half_headings=4))
    with pytest.raises(InputError, match=r"expected shape \(9, 64, 64\), got \(9, 64, 65\)"):
        c.set_map(np.zeros((NUM_MAP_CLASSES, 64, 65), np.float32))
    bad = np.zeros((NUM_MAP_CLASSES, 64, 64), np.float32)
    bad[2, 3, 4] = np.nan
    with pytest.raises(InputError, match="finite"):
        c.set_map(bad)
    res = c.search_fast(random_bev(np.random.default_rng(0)))
    assert not res.ok and res.status == "no map window set"


def test_workspace_is_within_budget():
    c = Correlator(CorrelatorParams())
    c.warm_up(("exact",))
    rep = c.workspace_report()
    assert (rep["shared"] + rep["exact"]) <= 64e6
    c.warm_up(("fast", "track"))
    rep = c.workspace_report()
    assert (rep["shared"] + rep["coarse"] + rep["track"]) <= 64e6


def test_scoring_model_round_trip_and_rejects_bad_files(tmp_path):
    m = ScoringModel.default()
    p = tmp_path / "s.json"
    m.save(p)
    back = ScoringModel.load(p)
    assert back.names == m.names and back.temperature == m.temperature
    assert np.array_equal(back.bev_weights, m.bev_weights) and np.array_equal(back.map_weights, m.map_weights)
    p.write_text(p.read_text()[:40])
    with pytest.raises(InputError, match=r"s\.json: not valid JSON"):
        ScoringModel.load(p)
    p.write_text('{"format": "something-else", "version": 1}')
    with pytest.raises(InputError, match="not a tinyloc-scoring version 1 file"):
        ScoringModel.load(p)
    assert "temperature" in m.provenance and m.provenance["temperature"].get("trials", 0) >= 20


def test_accepts_the_perception_bev_grid(corr, site):
    """The perception stage's BevGrid (docs/interfaces.md) goes straight in, as the synthetic grid does."""
    from tinyloc.perception.overhead import BevGrid
    win = np.ascontiguousarray(site[:, 0:256, 0:256])
    corr.set_map(win)
    syn = synth.cut_bev(win, 120.5, 130.5, 1.0, np.random.default_rng(4), noise=0.05)
    grid = BevGrid(syn.evidence, syn.free, syn.visible, 0.5, 32.0, 0.0, "ok")
    a = corr.search_fast(grid).modes[0]
    b = corr.search_fast(syn).modes[0]
    assert a.cell == b.cell and a.loglik == b.loglik
    assert not corr.search_fast(BevGrid(syn.evidence, syn.free, syn.visible)).ok  # default status "empty"


def test_coarse_loglik_is_on_the_full_resolution_scale(corr, site):
    win = np.ascontiguousarray(site[:, 40:296, 20:276])
    corr.set_map(win)
    bev = synth.cut_bev(win, 128.5, 128.5, 2.0, np.random.default_rng(8), noise=0.1)
    fine_max = float(corr.search(bev).best.max())
    coarse_max = float(corr.search_fast(bev).best.max())
    assert 0.7 <= coarse_max / fine_max <= 1.1  # block means lose a little contrast: under-, never over-confident


def test_fast_search_reduced_forms_speak_their_heading_units(corr, site):
    """best_heading is in steps of heading_scale full headings, heading_max has A / heading_max_scale entries:
    the per-cell heading at the best mode's coarse cell points at that mode's heading."""
    win = np.ascontiguousarray(site[:, 10:266, 30:286])
    corr.set_map(win)
    bev = synth.cut_bev(win, 120.5, 140.5, -2.3, np.random.default_rng(12), noise=0.05)
    res = corr.search_fast(bev)
    p = corr.params
    assert res.scale == 2 and res.heading_scale == 2 and res.heading_max_scale == p.coarse_step
    assert res.heading_max.shape == (p.n_headings // p.coarse_step,)
    m = res.modes[0]
    i, j = m.cell[1] // 2, m.cell[2] // 2
    a_full = int(res.best_heading[i, j]) * res.heading_scale
    assert circ(a_full, m.cell[0]) <= p.coarse_step + 2, (a_full, m.cell)
    t = int(np.argmax(res.heading_max))
    assert circ(t * res.heading_max_scale, m.cell[0]) <= p.coarse_step + 2


def test_temperature_fit_recovers_a_known_temperature():
    """Temperature scaling (maximum likelihood of the true class under softmax(logits / T), common practice):
    truths drawn from softmax(v / T0) must give back about T0."""
    from tinyloc.correlate.scoring import calibrate_temperature
    rng = np.random.default_rng(21)
    t0 = 3.0
    data = []
    for _ in range(300):
        v = rng.normal(0.0, 6.0, size=(4, 5, 5))
        p = np.exp(v.ravel() / t0 - np.max(v / t0))
        k = rng.choice(v.size, p=p / p.sum())
        data.append((v, np.unravel_index(k, v.shape)))
    t, info = calibrate_temperature(data, grid=np.geomspace(0.5, 20.0, 60))
    assert 2.4 <= t <= 3.7, t
