"""``track.catchup_m``: the flag says "tracking" only while the map has stopped pulling the estimate.

Hand-worked corrections of tinyloc/track/catchup.py (dead reckoning along the mid-step heading, the
decaying sum, the breaks), hand-worked decisions of the tracker on a stated drift, then planted drives
(tests/test_track_tracker.py) to show the check leaves every estimate alone, flags a mode that jumps
after a biased stretch, and keeps the ambiguity and kidnapping behaviour. The check and its threshold
are ours; the only outside fact used is plane geometry (a rotation by the heading, common practice).
"""

import math
import tracemalloc

import numpy as np
import pytest

from tinyloc.errors import InputError
from tinyloc.track import MapGeometry, TrackParams, Tracker
from tinyloc.track.catchup import CatchUp
from tinyloc.track.gridfilter import FilterEstimate

import test_track_tracker as T

GEOM = MapGeometry(0.0, 400.0, 0.5)


# ---- the sum, by hand ---------------------------------------------------------------------------
def test_estimate_moving_with_the_odometry_has_no_drift():
    cu = CatchUp(0.9)
    cu.observe(10.0, 20.0, 0.0)
    # 1 m forward and 0.5 m left at yaw 0, no turn: dead reckoning gives (11.0, 20.5)
    cu.moved(1.0, 0.5, 0.0)
    cu.observe(11.0, 20.5, 0.0)
    assert cu.drift_m < 1e-12


def test_mid_step_heading_by_hand():
    # from yaw 0 with a quarter turn the step goes along h = pi/4: 1 m forward -> (cos 45, sin 45)
    cu = CatchUp(0.9)
    cu.observe(0.0, 0.0, 0.0)
    cu.moved(1.0, 0.0, math.pi / 2)
    cu.observe(math.sqrt(0.5), math.sqrt(0.5), math.pi / 2)
    assert cu.drift_m < 1e-12
    # then at yaw pi/2: 1 m forward is +y, 0.5 m left is -x
    cu.moved(1.0, 0.5, 0.0)
    cu.observe(math.sqrt(0.5) - 0.5, math.sqrt(0.5) + 1.0, math.pi / 2)
    assert cu.drift_m < 1e-12


def test_a_steady_pull_adds_up_with_the_memory():
    # the estimate falls 0.1 m short of each 1 m step east: corrections (-0.1, 0), sums -0.1, -0.19, -0.271
    cu = CatchUp(0.9)
    cu.observe(0.0, 0.0, 0.0)
    x = 0.0
    for want in (0.1, 0.19, 0.271):
        cu.moved(1.0, 0.0, 0.0)
        x += 0.9
        cu.observe(x, 0.0, 0.0)
        assert abs(cu.drift_m - want) < 1e-12
        assert cu.sx < 0.0 and cu.sy == 0.0
    # the steady state of a pull c per frame is c / (1 - memory): 0.1 / 0.1 = 1 m
    for _ in range(300):
        cu.moved(1.0, 0.0, 0.0)
        x += 0.9
        cu.observe(x, 0.0, 0.0)
    assert abs(cu.drift_m - 1.0) < 1e-9


def test_random_corrections_largely_cancel():
    rng = np.random.default_rng(4)
    cu = CatchUp(0.9)
    x = y = 0.0
    cu.observe(x, y, 0.0)
    d = []
    for _ in range(2000):
        cu.moved(0.25, 0.0, 0.0)
        x += 0.25 + rng.normal(0, 0.03)
        y += rng.normal(0, 0.03)
        cu.observe(x, y, 0.0)
        d.append(cu.drift_m)
    # independent 3 cm corrections: each axis of the sum has sd 0.03 / sqrt(1 - 0.81) = 0.069 m,
    # so its length stays far below a steady 0.03 m pull's 0.3 m
    assert np.percentile(d, 99) < 0.25
    assert abs(np.sqrt(np.mean(np.square(d)) / 2.0) - 0.03 / math.sqrt(0.19)) < 0.01


def test_breaks_forget_the_sum():
    cu = CatchUp(0.9)
    cu.observe(0.0, 0.0, 0.0)
    cu.moved(1.0, 0.0, 0.0)
    cu.observe(0.5, 0.0, 0.0)
    assert abs(cu.drift_m - 0.5) < 1e-12
    cu.observe(0.6, 0.0, 0.0)  # no increment applied this frame: nothing to compare against
    assert cu.drift_m == 0.0
    cu.moved(1.0, 0.0, 0.0)
    cu.observe(math.nan, 0.0, 0.0)  # no estimate
    assert cu.drift_m == 0.0
    cu.moved(1.0, 0.0, 0.0)
    cu.observe(5.0, 5.0, 0.0)  # first estimate after the break: only remembered
    assert cu.drift_m == 0.0


def test_no_allocation_per_frame():
    cu = CatchUp(0.9)
    cu.observe(0.0, 0.0, 0.0)
    cu.moved(0.25, 0.0, 0.01)
    cu.observe(0.25, 0.0, 0.01)
    tracemalloc.start()
    for k in range(2000):
        cu.moved(0.25, 0.01, 0.001)
        cu.observe(0.25 * k, 0.0, 0.001 * k)
        cu.drift_m
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 1024, peak


# ---- the tracker's decision, by hand --------------------------------------------------------------
def _est(sigma_m=0.5):
    return FilterEstimate(10.0, 20.0, 0.0, np.diag([sigma_m ** 2, 0.01, 1e-4]), [], 0.9, sigma_m, 0.01)


def _tracker(**kw):
    return Tracker(GEOM, TrackParams(window_cells=32, headings=64, course_span_m=0.0, **kw))


@pytest.mark.parametrize("drift, catchup, want", [
    (0.60, 0.0, "tracking"),   # off
    (0.60, 0.5, "degraded"),   # the map moved the estimate 0.6 m against the odometry lately
    (0.50, 0.5, "tracking"),   # at the threshold: still tracking (the test is "above")
    (0.20, 0.5, "tracking"),
])
def test_flag_while_tracking_by_hand(drift, catchup, want):
    tr = _tracker(catchup_m=catchup)
    tr.state, tr.started = "tracking", True
    tr.catchup.sx, tr.catchup.sy = 0.6 * drift, -0.8 * drift  # a sum of length `drift`
    notes = []
    tr._decide(_est(), notes)
    assert tr.state == want
    if want == "degraded":
        assert notes == [f"degraded: catching up {drift:.2f} m"]
        assert tr._learn_while_degraded  # the only reason: the wheel scale learns as if tracking
    else:
        assert not tr._learn_while_degraded


def test_with_another_reason_the_wheel_scale_does_not_learn():
    tr = _tracker(catchup_m=0.5, confident_sigma_m=0.85)
    tr.state, tr.started = "tracking", True
    tr.catchup.sx = 0.7
    notes = []
    tr._decide(_est(0.9), notes)  # also broader than the confident check allows
    assert tr.state == "degraded" and notes == ["degraded: position spread 0.90 m"]
    assert not tr._learn_while_degraded


def test_back_to_tracking_when_the_pull_stops():
    tr = _tracker(catchup_m=0.5)
    tr.state, tr.started = "tracking", True
    tr.catchup.sx = 0.7
    tr._decide(_est(), [])
    assert tr.state == "degraded"
    tr.catchup.sx = 0.3
    notes = []
    tr._decide(_est(), notes)
    assert tr.state == "tracking" and notes == ["tracking again"]


def test_search_moves_do_not_count():
    # while searching the belief jumps by metres on purpose (global candidates): the sum covers the frames
    # since the lock-on only, so a lock-on is not held back by the search that found it
    cu = CatchUp(0.9)
    cu.observe(0.0, 0.0, 0.0)
    cu.moved(0.25, 0.0, 0.0)
    cu.observe(8.0, 3.0, 0.0, add=False)  # a search move of 8 m
    assert cu.drift_m == 0.0
    cu.moved(0.25, 0.0, 0.0)
    cu.observe(8.15, 3.0, 0.0)  # locked on: 0.1 m short of the step
    assert abs(cu.drift_m - 0.1) < 1e-12
    tr = _tracker(catchup_m=0.5)
    tr.state, tr.started = "searching", True
    tr.catchup.sx = 0.8
    for _ in range(3):
        notes = []
        tr._decide(_est(), notes)
    # the lock-on decision does not read the sum (it is zero there: the frame starts in searching)
    assert tr.state == "tracking" and notes == ["locked on"]


def test_lost_and_missing_odometry_forget_the_sum():
    tr = _tracker(catchup_m=0.5)
    tr.begin(0.0, None, (100.0, 100.0, 1.0, 0.0))  # starts the filter at the fix
    tr.state = "tracking"
    tr.catchup.sx = 0.9
    tr._lose([], "test")
    assert tr.catchup.drift_m == 0.0
    tr.state = "tracking"
    tr.catchup.sx = 0.9
    tr.begin(0.2, None, None)  # a frame without odometry
    assert tr.catchup.drift_m == 0.0
    tr.catchup.sx = 0.9
    tr.begin(0.4, (25.0, 0.0, 0.0), None)  # an odometry jump the filter ignores
    assert tr.catchup.drift_m == 0.0


@pytest.mark.parametrize("key, bad", [("catchup_m", -0.1), ("catchup_m", math.nan), ("catchup_m", 101.0),
                                      ("catchup_memory", 1.0), ("catchup_memory", -0.1)])
def test_bad_values_are_rejected_with_the_key_named(key, bad):
    with pytest.raises(InputError, match=f"track.{key}"):
        TrackParams(**{key: bad})


# ---- planted drives ------------------------------------------------------------------------------------
def test_planted_drive_same_estimate_only_the_flag_moves():
    # the check must not move any estimate (the wheel scale still learns on the frames it flags), and with
    # a threshold inside the planted drive's spread of drift it must turn some tracking frames degraded
    T.check_only_the_flag_moves(T._params(catchup_m=0.0), T._params(catchup_m=0.05))


class _BiasedThenTrue(T.PlantedMatcher):
    """Evidence ``bias_m`` ahead of the truth along its heading for the first ``until`` tracking frames."""

    def __init__(self, rng, until, bias_m, **kw):
        super().__init__(rng, **kw)
        self.k, self.until, self.bias = 0, until, bias_m

    def _measure(self):
        tx, ty, tyaw = self.truth
        b = self.bias if self.k < self.until else 0.0
        return (tx + b * math.cos(tyaw) + self.rng.normal(0, self.sx),
                ty + b * math.sin(tyaw) + self.rng.normal(0, self.sx), tyaw + self.rng.normal(0, self.syaw))

    def track(self, x, y, yaw):
        self.k += 1
        return super().track(x, y, yaw)


def test_a_mode_that_jumps_after_a_biased_stretch_is_not_called_tracking():
    # tempered frames (weight 0.2) hold the belief 2.5 m ahead while the evidence is biased; when the bias
    # ends the belief closes in, first slowly, then its mode jumps to the truth. Without the check the
    # flag is "tracking" again within 3 frames of the jump; with it the flag stays "degraded" until the
    # sum of corrections decays, and the filter is tracking again by the end with the same estimates
    runs = {}
    for c in (0.0, 0.5):
        rng = np.random.default_rng(3)
        m = _BiasedThenTrue(rng, 150, 2.5)
        _, out = T.drive(rng, 300, matcher=m, gnss_off=set(range(300)),
                         params=T._params(likelihood_weight=0.2, catchup_m=c))
        runs[c] = out
    a, b = runs[0.0], runs[0.5]
    ea = [T._err(t, o)[0] for t, o in a]
    jump = next(i for i in range(150, 300) if ea[i] < 0.5)  # the first frame at the truth again
    assert ea[jump - 1] > 1.5  # it is a jump, not a slow approach
    assert np.nanmax(np.abs(np.array([[o.x, o.y] for _, o in a]) - np.array([[o.x, o.y] for _, o in b]))) < 1e-9
    qa = [o.quality for _, o in a]
    qb = [o.quality for _, o in b]
    back = next(i for i in range(jump, 300) if qa[i] == "tracking")  # without the check: "tracking" again here
    assert back - jump <= 3
    assert qb[back:back + 3] == ["degraded"] * 3  # with it: the mode has just moved 2 m, not settled
    assert all(qa[i] == "tracking" for i in range(300) if qb[i] == "tracking")  # it only ever takes "tracking" away
    assert qb[-1] == "tracking"


def test_keeps_ambiguity_and_kidnapping_behaviour():
    T.check_ambiguity_and_kidnapping(T._params(catchup_m=0.5))
