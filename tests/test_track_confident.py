"""``track.confident_sigma_m``: the flag says "tracking" only while the posterior is tight enough.

Hand-worked decisions on a stated posterior (the decision is a pure function of the estimate's
largest-axis 1-sigma and the thresholds), then the planted drive of test_track_tracker.py to show
the check leaves the estimate alone and only changes the flag. The threshold semantics are ours;
nothing here is a figure from outside the project.
"""

import math

import numpy as np
import pytest

from tinyloc.errors import InputError
from tinyloc.track import MapGeometry, TrackParams, Tracker
from tinyloc.track.gridfilter import FilterEstimate

GEOM = MapGeometry(0.0, 400.0, 0.5)


def _est(sigma_m):
    cov = np.diag([sigma_m ** 2, 0.01, 1e-4])
    return FilterEstimate(10.0, 20.0, 0.0, cov, [], 0.9, sigma_m, 0.01)


def _tracker(headings=64, **kw):
    return Tracker(GEOM, TrackParams(window_cells=32, headings=headings, course_span_m=0.0, **kw))


@pytest.mark.parametrize("sigma_m, confident, want", [
    (0.90, 0.0, "tracking"),    # off: only track_sigma_m (1.0) counts
    (0.90, 0.85, "degraded"),   # 0.90 > 0.85: keep the belief, say it is not confident
    (0.85, 0.85, "tracking"),   # at the threshold: still tracking (the test is "above")
    (0.60, 0.85, "tracking"),
    (1.20, 0.85, "degraded"),   # above track_sigma_m as well: degraded for that reason first
])
def test_flag_while_tracking_by_hand(sigma_m, confident, want):
    tr = _tracker(confident_sigma_m=confident)
    tr.state, tr.started = "tracking", True
    notes = []
    tr._decide(_est(sigma_m), notes)
    assert tr.state == want
    if want == "degraded" and sigma_m <= 1.0:
        assert notes == [f"degraded: position spread {sigma_m:.2f} m"]


def test_back_to_tracking_when_the_posterior_tightens():
    tr = _tracker(confident_sigma_m=0.85)
    tr.state, tr.started = "tracking", True
    notes = []
    tr._decide(_est(0.95), notes)
    assert tr.state == "degraded"
    notes = []
    tr._decide(_est(0.50), notes)
    assert tr.state == "tracking" and notes == ["tracking again"]


def test_lock_on_with_a_broad_posterior_is_degraded_not_tracking():
    # searching -> locked after converge_frames (3) confident updates under track_sigma_m (1.0);
    # with a 0.95 m posterior and the check at 0.85 m the lock-on is said, the flag is "degraded"
    for confident, want in ((0.0, "tracking"), (0.85, "degraded")):
        tr = _tracker(confident_sigma_m=confident)
        tr.state, tr.started = "searching", True
        for _ in range(3):
            notes = []
            tr._decide(_est(0.95), notes)
        assert tr.state == want
        assert "locked on" in notes
        assert tr.counters["recovered"] == 1


@pytest.mark.parametrize("bad", [-0.1, math.nan, math.inf, 101.0])
def test_bad_values_are_rejected_with_the_key_named(bad):
    with pytest.raises(InputError, match="track.confident_sigma_m"):
        TrackParams(confident_sigma_m=bad)


def test_planted_drive_same_estimate_only_the_flag_moves():
    # the check must not move any estimate (the belief is kept), and with a threshold below the planted
    # posterior's 1-sigma (0.11-0.21 m, 5-95 %, while tracking) it must turn tracking frames degraded
    import test_track_tracker as T

    T.check_only_the_flag_moves(T._params(confident_sigma_m=0.0), T._params(confident_sigma_m=0.15))

def _est_heading(sigma_deg, sigma_m=0.4):
    s = math.radians(sigma_deg)
    cov = np.diag([sigma_m ** 2, 0.01, s ** 2])
    return FilterEstimate(10.0, 20.0, 0.0, cov, [], 0.9, sigma_m, s)


@pytest.mark.parametrize("sigma_deg, confident, want", [
    (2.1, 0.0, "tracking"),    # off: only track_sigma_deg (4.0) counts
    (2.1, None, "degraded"),   # the default (1.6)
    (2.1, 1.6, "degraded"),    # a 2.1 deg heading cannot promise a pose within 3 deg
    (1.6, 1.6, "tracking"),    # at the threshold: still tracking (the test is "above")
    (1.3, 1.6, "tracking"),
])
def test_heading_spread_while_tracking_by_hand(sigma_deg, confident, want):
    tr = _tracker(256) if confident is None else _tracker(256, confident_sigma_deg=confident)
    tr.state, tr.started = "tracking", True
    notes = []
    tr._decide(_est_heading(sigma_deg), notes)
    assert tr.state == want
    if want == "degraded":
        assert notes == [f"degraded: heading spread {sigma_deg:.1f} deg"]


def test_lock_on_with_a_broad_heading_is_degraded_and_either_spread_counts():
    tr = _tracker(256, confident_sigma_deg=1.6)
    tr.state, tr.started = "searching", True
    for _ in range(3):
        notes = []
        tr._decide(_est_heading(2.5), notes)
    assert tr.state == "degraded" and "locked on" in notes and "degraded: heading spread 2.5 deg" in notes
    # with both checks on, a broad position is named first
    tr = _tracker(256, confident_sigma_m=0.85, confident_sigma_deg=1.6)
    tr.state, tr.started = "tracking", True
    notes = []
    tr._decide(_est_heading(2.5, sigma_m=0.95), notes)
    assert tr.state == "degraded" and notes == ["degraded: position spread 0.95 m"]


@pytest.mark.parametrize("bad", [-0.1, math.nan, math.inf, 181.0])
def test_bad_heading_values_are_rejected_with_the_key_named(bad):
    with pytest.raises(InputError, match="track.confident_sigma_deg"):
        TrackParams(confident_sigma_deg=bad)


@pytest.mark.parametrize("headings, sigma_deg, want", [
    (256, 2.0, "degraded"),   # 1.1 layers = 1.55 deg: the 1.6 deg threshold holds
    (256, 1.58, "tracking"),
    (128, 2.0, "tracking"),   # 1.1 layers = 3.09 deg: a right heading on this lattice spreads 2.1-2.4 deg
    (128, 3.2, "degraded"),
])
def test_heading_threshold_never_below_the_lattice(headings, sigma_deg, want):
    tr = _tracker(headings, confident_sigma_deg=1.6)
    tr.state, tr.started = "tracking", True
    notes = []
    tr._decide(_est_heading(sigma_deg), notes)
    assert tr.state == want
