"""The ring helpers shared by the satellite-course and wheel-scale fits, on hand-worked rings."""

import numpy as np

from tinyloc.track.pathring import gather_centred, newest_rows


def test_newest_rows_across_the_wrap():
    cap = 5
    # rows written at path 0, 1, 2, ..., 6: the ring holds 2..6, the newest (6) at index 1, head 2
    path = np.array([5.0, 6.0, 2.0, 3.0, 4.0])
    assert newest_rows(path, head=2, n=5, cap=cap, span_m=2.5) == (4, 3.0)  # 6, 5, 4, 3: 3 m >= 2.5
    assert newest_rows(path, head=2, n=5, cap=cap, span_m=9.0) == (5, 4.0)  # all of them cover only 4 m


def test_gather_centred_takes_both_pieces_and_centres():
    cap = 4
    a = np.array([[10.0, 0.0], [20.0, 0.0], [0.0, 3.0], [0.0, 5.0]])  # newest rows at 0, 1 (head 2)
    b = a * 2.0
    wa, wb = np.zeros((cap, 2)), np.zeros((cap, 2))
    oa, ob = gather_centred(a, b, wa, wb, head=2, m=3, cap=cap)  # rows 3, 0, 1
    rows = np.array([[0.0, 5.0], [10.0, 0.0], [20.0, 0.0]])
    want = rows - rows.mean(axis=0)
    assert np.max(np.abs(np.sort(oa, axis=0) - np.sort(want, axis=0))) < 1e-12
    assert np.max(np.abs(np.sort(ob, axis=0) - np.sort(2.0 * want, axis=0))) < 1e-12
    assert oa.base is wa and oa.shape == (3, 2)
