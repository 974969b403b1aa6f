"""The demo's short figures on hand-worked drives (definitions in tinyloc/runtime/summary.py)."""

import math

import numpy as np
import pytest
from scipy.stats import chi2

from tinyloc.runtime.loop import PoseEstimate
from tinyloc.runtime.summary import CHI2_95_2DOF, summarize


def _pose(t, x, y, yaw, sd_m, quality="tracking"):
    cov = np.diag([sd_m ** 2, sd_m ** 2, 0.01])
    return PoseEstimate(t=t, x=x, y=y, yaw=yaw, lat=0.0, lon=0.0, cov=cov, quality=quality, modes=[],
                        frame_ms=10.0, status="ok")


def test_chi_square_95_value_matches_scipy():
    # Standard tables give 5.991 for 2 degrees of freedom at 95 %; SciPy is the reference library.
    assert CHI2_95_2DOF == pytest.approx(chi2.ppf(0.95, 2), abs=5e-4)


def test_ellipse_share_and_median_d2_on_a_hand_worked_drive():
    # Truth drives east 1 m per frame; skip_m = 0 so every frame counts once it has moved (frame 0 is at 0 m).
    truth = np.array([[float(i), 0.0, 0.0] for i in range(5)])
    # Errors (m) and standard deviations: d^2 = (err / sd)^2 = 0, 1, 4, 9, 16 -> inside for 0, 1, 4 (<= 5.991).
    errs = [0.0, 0.5, 1.0, 1.5, 2.0]
    poses = [_pose(float(i), i + e, 0.0, 0.0, 0.5) for i, e in enumerate(errs)]
    s = summarize(poses, truth, None, skip_m=0.0)
    assert s["inside_95_tested"] == 5
    assert s["inside_95_ellipse"] == pytest.approx(3 / 5)
    assert s["mahalanobis_d2_median"] == pytest.approx(4.0)
    assert s["median_error_m"] == pytest.approx(1.0)
    assert s["recall_1m_3deg"] == pytest.approx(3 / 5)  # errors 0, 0.5 and 1.0 m are within 1 m


def test_no_fix_frames_are_misses_and_not_tested_for_the_ellipse():
    truth = np.array([[float(i), 0.0, 0.0] for i in range(4)])
    poses = [_pose(0.0, 0.0, 0.0, 0.0, 0.5), _pose(1.0, math.nan, math.nan, math.nan, 0.5, "no-fix"),
             _pose(2.0, 2.0, 0.0, 0.0, 0.5), _pose(3.0, 3.0, 0.0, 0.0, 0.5)]
    s = summarize(poses, truth, None, skip_m=0.0)
    assert s["inside_95_tested"] == 3
    assert s["recall_1m_3deg"] == pytest.approx(3 / 4)
