"""Agreement on one tile, labeler/agreement/tile.py: the tile scalar and the boundary F score.

scikit-learn as oracle for the tile scalar; a slow pure-Python loop as reference for the
boundary F score.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import cohen_kappa_score, jaccard_score

from labeler import agreement as ag
from labeler import metrics as mt
from tests.common import random_masks, zoo_square

PROPS = settings(max_examples=40, deadline=None)


# ---------------------------------------------------------------------------------------
# slow references
# ---------------------------------------------------------------------------------------
def loop_boundary(region: np.ndarray) -> set[tuple[int, int]]:
    h, w = region.shape
    out = set()
    for i in range(h):
        for j in range(w):
            if not region[i, j]:
                continue
            for di, dj in ((-1, 0), (1, 0), (0, -1), (0, 1)):
                ii, jj = i + di, j + dj
                if 0 <= ii < h and 0 <= jj < w and not region[ii, jj]:
                    out.add((i, j))
    return out


def loop_boundary_f(a, b, cls, tol):
    bt, bs = loop_boundary(a == cls), loop_boundary(b == cls)
    if not bt and not bs:
        return 1.0, 1.0, 1.0
    if not bt:
        return 0.0, 1.0, 0.0
    if not bs:
        return 1.0, 0.0, 0.0

    def near(p, pts):
        return min(math.hypot(p[0] - q[0], p[1] - q[1]) for q in pts) <= tol

    prec = sum(near(p, bt) for p in bs) / len(bs)
    rec = sum(near(p, bs) for p in bt) / len(bt)
    f = 0.0 if prec + rec == 0 else 2 * prec * rec / (prec + rec)
    return prec, rec, f


# ---------------------------------------------------------------------------------------
# boundary F score
# ---------------------------------------------------------------------------------------
def test_boundary_f_drifting_edges_show_despite_high_iou():
    # common practice, no source: a 60 x 60 plot grown by 4 px on every side keeps a high
    # pixel agreement but no boundary pixel lies within 2 px of the other border
    a = np.zeros((100, 100), np.uint8)
    a[20:80, 20:80] = 1
    b = np.zeros_like(a)
    b[16:84, 16:84] = 1
    cm = mt.confusion_matrix(a, b, n_classes=2)
    assert mt.pixel_accuracy(cm) > 0.89
    assert mt.iou_per_class(cm)[1] > 0.77
    p, r, f = ag.boundary_f_score(a, b, class_index=1, tolerance_px=2)
    assert (p, r, f) == (0.0, 0.0, 0.0)
    # with a tolerance covering the drift the borders match
    assert ag.boundary_f_score(a, b, class_index=1, tolerance_px=4 * math.sqrt(2))[2] == 1.0


def test_boundary_f_edge_cases():
    sq, empty = zoo_square(), np.zeros((8, 8), np.uint8)
    assert ag.boundary_f_score(empty, empty, class_index=1) == (1.0, 1.0, 1.0)
    assert ag.boundary_f_score(empty, sq, class_index=1) == (0.0, 1.0, 0.0)
    assert ag.boundary_f_score(sq, empty, class_index=1) == (1.0, 0.0, 0.0)
    assert ag.boundary_f_score(sq, sq, class_index=1) == (1.0, 1.0, 1.0)
    # a region filling the tile has no border: the tile edge is not a boundary
    full = np.ones((8, 8), np.uint8)
    assert ag.boundary_f_score(full, full, class_index=1) == (1.0, 1.0, 1.0)


def test_boundary_f_errors():
    a = np.zeros((4, 4), np.uint8)
    with pytest.raises(ValueError, match=r"mask_test: expected shape \(4, 4\) like mask_true"):
        ag.boundary_f_score(a, np.zeros((4, 3), np.uint8), class_index=1)
    with pytest.raises(ValueError, match="tolerance_px: expected a distance >= 0"):
        ag.boundary_f_score(a, a, class_index=1, tolerance_px=-1)
    with pytest.raises(ValueError, match=r"mask_true: expected a 2-D \(H, W\) mask"):
        ag.boundary_f_score(a[None], a[None], class_index=1)


@PROPS
@given(seed=st.integers(0, 2**32 - 1), tol=st.sampled_from([0, 1, 1.5, 2, 3]))
def test_boundary_f_matches_loop(seed, tol):
    rng = np.random.default_rng(seed)
    h, w = rng.integers(3, 16, 2)
    a = (rng.random((h, w)) < 0.5).astype(np.uint8)
    b = np.where(rng.random((h, w)) < 0.8, a, 1 - a).astype(np.uint8)
    got = ag.boundary_f_score(a, b, class_index=1, tolerance_px=tol)
    np.testing.assert_allclose(got, loop_boundary_f(a, b, 1, tol), atol=1e-12)


# ---------------------------------------------------------------------------------------
# the tile scalar
# ---------------------------------------------------------------------------------------
def test_tile_agreement():
    a, b = random_masks(11, (32, 32), 4)
    keep = (a != 255) & (b != 255)
    # oracle: sklearn cohen_kappa_score on the pixels both labelled
    np.testing.assert_allclose(ag.tile_agreement(a, b, n_classes=4),
                               cohen_kappa_score(a[keep], b[keep]), atol=1e-12)
    ref_iou = jaccard_score(a[keep], b[keep], labels=[0, 1, 2, 3], average="macro")
    np.testing.assert_allclose(ag.tile_agreement(a, b, n_classes=4, metric="iou"), ref_iou,
                               atol=1e-12)
    # no commonly labelled pixel: nan (the caller does not contest)
    left = np.full((4, 4), 255, np.uint8)
    left[:, :2] = 1
    right = np.full((4, 4), 255, np.uint8)
    right[:, 2:] = 1
    assert math.isnan(ag.tile_agreement(left, right, n_classes=2))
    # both all soil: perfect agreement, not a disagreement
    soil = np.zeros((4, 4), np.uint8)
    assert ag.tile_agreement(soil, soil, n_classes=4) == 1.0
    assert ag.tile_agreement(soil, soil, n_classes=4, metric="iou") == 1.0
    with pytest.raises(ValueError, match="metric: expected 'kappa' or 'iou', got 'dice'"):
        ag.tile_agreement(soil, soil, n_classes=4, metric="dice")
