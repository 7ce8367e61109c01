"""The on-tile rule benchmark's own arithmetic: the disk correction and the session gains
(hand-made masks and stand-in learners; common practice, no source)."""

from __future__ import annotations

import numpy as np

from benchmarks.ontile_rule import WAYS, disk_correction, session_gains


def test_disk_correction_paints_the_interior_disk_of_the_largest_error():
    truth = np.zeros((9, 9), np.uint8)
    truth[2:7, 2:7] = 1  # a 5 x 5 crop square, all missed by an empty mask
    marks = disk_correction(truth, np.zeros_like(truth))
    # interior point (4, 4), depth 3 (the square's centre is 3 pixels from outside):
    # radius 2.5 covers the 21 pixels within 2.5 of the centre, all inside the square
    rr, cc = np.mgrid[:9, :9]
    want = np.where((rr - 4) ** 2 + (cc - 4) ** 2 <= 6.25, 1, 255).astype(np.uint8)
    np.testing.assert_array_equal(marks, want)
    assert int((marks == 1).sum()) == 21
    assert disk_correction(truth, truth.copy()) is None


class _Learner:
    """A stand-in: proposes all soil; a fit paints class 1 over the whole 5 x 5 square
    whenever any mark falls in it (a perfect look-alike generaliser)."""

    def __init__(self, truth):
        self.truth = truth

    def proposal(self):
        return np.zeros_like(self.truth)

    def fit(self, marks):
        out = self.proposal()
        if (marks == 1).any():
            out[self.truth == 1] = 1
        out[marks != 255] = marks[marks != 255]
        return out


def test_session_gains_follow_each_way_on_its_own_masks():
    truth = np.zeros((9, 9), np.uint8)
    truth[2:7, 2:7] = 1
    learner = _Learner(truth)
    gains = session_gains(truth, {"fit_whole": learner, "look_alike_rule": learner},
                          clicks=1, n_classes=2)
    assert set(gains) == set(WAYS)
    # start: soil IoU 56/81, crop 0 -> mean 56/162; after the fit: both classes exact
    start = 56 / 162
    assert abs(gains["fit_whole"] - (1.0 - start)) < 1e-12
    assert abs(gains["look_alike_rule"] - (1.0 - start)) < 1e-12
    # marks only: 21 of 25 crop pixels right; soil 56 / 60, crop 21 / 25
    assert abs(gains["marks_only"] - ((56 / 60 + 21 / 25) / 2 - start)) < 1e-12
