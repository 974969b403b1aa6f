"""A frame's evidence weight follows the path it stands for (track.evidence_step_m, track.evidence_max).

``likelihood_weight`` is the share of a frame that is new evidence at the spacing it was chosen for
(0.25 m a frame: 5 Hz at walking pace). A frame taken further along the path (a slower camera, or
frames the loop dropped because they were late) holds the evidence of the frames it stands for.
Worked by hand below; the loop-level figures are in docs/tracking.md, "Evidence per metre".
"""

import math

import pytest

from tinyloc.errors import InputError
from tinyloc.track import TrackParams
from tinyloc.track.gridfilter import evidence_factor

import test_track_tracker as T


@pytest.mark.parametrize("step_m, factor", [
    (0.0, 1.0),     # standing still: a frame still counts as one
    (0.1, 1.0),     # closer than 0.25 m: full weight, no more
    (0.25, 1.0),
    (0.5, 2.0),     # two frames' worth
    (0.6, 2.4),
    (1.0, 4.0),
    (5.0, 4.0),     # capped at evidence_max
])
def test_factor_by_hand(step_m, factor):
    assert evidence_factor(step_m, TrackParams()) == pytest.approx(factor, abs=1e-12)


def test_factor_one_restores_equal_weights_and_bad_values_are_refused():
    p = TrackParams(evidence_max=1.0)
    assert all(evidence_factor(d, p) == 1.0 for d in (0.0, 0.3, 2.0, 50.0))
    assert evidence_factor(0.9, TrackParams(evidence_step_m=0.3, evidence_max=10.0)) == pytest.approx(3.0)
    for bad in (dict(evidence_max=0.5), dict(evidence_step_m=0.0), dict(evidence_step_m=-1.0)):
        with pytest.raises(InputError, match="evidence"):
            TrackParams(**bad)


def test_the_tracker_passes_the_weighted_evidence_to_the_update(monkeypatch):
    """Planted drive at 5 m/s and 10 Hz: 0.5 m of wheel path a frame (1 % long, as the planted odometry
    is) gives the update weight likelihood_weight x 0.505 / 0.25 = 2.02 x, capped at evidence_max."""
    import numpy as np

    seen = []
    for p, want in ((T._params(likelihood_weight=0.1), 0.1 * 2.02),
                    (T._params(likelihood_weight=0.1, evidence_max=1.5), 0.1 * 1.5),
                    (T._params(likelihood_weight=0.1, evidence_max=1.0), 0.1)):
        seen.clear()
        from tinyloc.track import gridfilter as G

        orig = G.GridFilter.update

        def spy(self, vol, *, weight=None, _orig=orig):
            seen.append(weight)
            return _orig(self, vol, weight=weight)

        monkeypatch.setattr(G.GridFilter, "update", spy)
        T.drive(np.random.default_rng(3), 12, speed=5.0, turn=0.0, params=p)
        monkeypatch.setattr(G.GridFilter, "update", orig)
        # the first frame has no odometry increment yet (a frame counts as one); later ones the path
        # (the learnt wheel scale stays 1 this early)
        assert seen[0] == pytest.approx(0.1, abs=1e-12)
        assert all(w == pytest.approx(want, rel=1e-9) for w in seen[1:]), (want, seen)
        assert math.isfinite(sum(seen)) and len(seen) >= 10
