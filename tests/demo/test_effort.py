"""Tile IoU and NoC@90 (actions to reach IoU 0.90, at most 20)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import jaccard_score

from labeler.demo.effort import (
    NOC_CAP,
    NOC_THRESHOLD,
    noc_at,
    region_fix_bound,
    summarise_noc,
    tile_iou,
)


def test_protocol_constants():
    # NoC@90 with at most 20 clicks (Xu et al. 2016 and the interactive segmentation
    # literature after it)
    assert NOC_THRESHOLD == 0.90 and NOC_CAP == 20


def test_tile_iou_of_the_worked_overlap_example():
    # TP 8000, FP 2000, FN 1000, TN 89000 for class 1 (recomputed by hand): IoU of class 1
    # 8000 / 11000 = 0.727273, of class 0 89000 / 92000 = 0.967391, mean 0.847332
    truth = np.zeros(100_000, np.uint8)
    mask = np.zeros(100_000, np.uint8)
    truth[:9000] = 1  # 8000 TP + 1000 FN
    mask[:8000] = 1
    mask[9000:11000] = 1  # 2000 FP
    got = tile_iou(truth.reshape(250, 400), mask.reshape(250, 400), n_classes=4)
    assert got == pytest.approx((8000 / 11000 + 89000 / 92000) / 2, abs=1e-12)
    assert got == pytest.approx(0.847332, abs=1e-6)


def test_tile_iou_matches_sklearn_macro_jaccard_over_the_truth_classes():
    rng = np.random.default_rng(5)
    for _ in range(20):
        truth = rng.integers(0, 3, size=(9, 11)).astype(np.uint8)
        mask = rng.integers(0, 4, size=(9, 11)).astype(np.uint8)
        present = sorted(set(truth.ravel().tolist()))
        # oracle: scikit-learn jaccard_score, macro mean over the classes of the truth
        # (per-image class average, Csurka, Larlus & Perronnin 2013, BMVC)
        expected = jaccard_score(truth.ravel(), mask.ravel(), labels=present, average="macro")
        assert tile_iou(truth, mask, n_classes=4) == pytest.approx(expected, abs=1e-12)


def test_a_class_only_the_mask_holds_adds_no_term_but_its_pixels_count_as_wrong():
    # by hand: truth 10 crop + 90 soil; the mask has the crop and one stray symptom pixel
    # on soil: soil IoU 89 / 90, crop 1.0, mean (89 / 90 + 1) / 2; a term for symptom
    # (IoU 0) would have made it at most 2 / 3
    truth = np.zeros((10, 10), np.uint8)
    truth[0] = 1
    mask = truth.copy()
    mask[5, 5] = 3
    assert tile_iou(truth, mask, n_classes=4) == pytest.approx((89 / 90 + 1) / 2, abs=1e-12)


def test_tile_iou_leaves_unlabelled_truth_out_and_counts_unlabelled_mask_as_wrong():
    truth = np.array([[1, 1], [0, 255]], np.uint8)
    mask = np.array([[255, 1], [0, 2]], np.uint8)
    # class 1: TP 1, FN 1 -> 0.5; class 0: TP 1 -> 1.0; class 2 only on an ignored pixel
    assert tile_iou(truth, mask, n_classes=4) == pytest.approx(0.75, abs=1e-12)
    assert tile_iou(np.full((2, 2), 255, np.uint8), mask, n_classes=4) == 1.0
    assert tile_iou(truth, np.where(truth == 255, 3, truth).astype(np.uint8), n_classes=4) == 1.0


def test_tile_iou_error():
    with pytest.raises(ValueError, match=r"mask: expected a 2-D mask of the truth's shape"):
        tile_iou(np.zeros((2, 2), np.uint8), np.zeros((2, 3), np.uint8), n_classes=4)


@pytest.mark.parametrize(
    ("ious", "expected"),
    [
        ([0.5, 0.8, 0.92], 2),
        ([0.95, 0.2], 0),  # good enough as proposed: 0 actions
        ([0.3, 0.9], 1),  # exactly 0.90 counts as reached
        ([0.1] * 30, 20),  # never reached: the cap
        ([0.1] * 21 + [0.99], 20),  # reached only after the cap: the cap
        ([0.1] * 20 + [0.99], 20),  # reached at the cap itself
        ([0.1] * 5, 20),  # the session stopped early without reaching it
    ],
)
def test_noc_at_on_hand_made_traces(ious, expected):
    assert noc_at(ious) == expected


def test_noc_at_other_threshold_and_cap():
    assert noc_at([0.5, 0.8, 0.85], threshold=0.85, cap=5) == 2
    assert noc_at([0.5, 0.6, 0.7], threshold=0.85, cap=1) == 1


def test_summarise_noc():
    s = summarise_noc([[0.95], [0.5, 0.91], [0.1] * 25, [0.2, 0.3, 0.95]])
    assert (s.mean, s.n_tiles, s.n_capped, s.n_unchanged, s.cap) == ((0 + 1 + 20 + 2) / 4, 4, 1, 1, 20)


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda: noc_at([0.5], threshold=1.5), r"threshold: expected an IoU in 0\.\.1"),
        (lambda: noc_at([0.5], cap=0), "cap: expected at least 1 action"),
        (lambda: noc_at([]), "ious: expected the IoU before the first action"),
        (lambda: summarise_noc([]), "runs: expected the IoU trace of at least one tile"),
    ],
)
def test_noc_errors(call, match):
    with pytest.raises(ValueError, match=match):
        call()


def test_region_fix_bound_sets_the_largest_error_regions_right_first():
    # by hand: truth 20 x 20 soil with a 6 x 6 crop square (36 px) and a 2 x 2 weed
    # square (4 px); the start misses the weed and has the crop one pixel too small on
    # its right edge (a 6 x 1 sliver) and a 3 x 3 soil hole inside it (9 px)
    truth = np.zeros((20, 20), np.uint8)
    truth[2:8, 2:8] = 1
    truth[12:14, 12:14] = 2
    start = truth.copy()
    start[12:14, 12:14] = 0
    start[2:8, 7] = 0
    start[3:6, 3:6] = 0
    # regions: hole 9 px, sliver 6 px, weed 4 px (the hole and sliver are apart)
    one = truth.copy()
    one[2:8, 7] = 0
    one[12:14, 12:14] = 0
    assert region_fix_bound(truth, start, n_classes=4, n_regions=1) == pytest.approx(
        tile_iou(truth, one, n_classes=4), abs=1e-12)
    two = truth.copy()
    two[12:14, 12:14] = 0
    assert region_fix_bound(truth, start, n_classes=4, n_regions=2) == pytest.approx(
        tile_iou(truth, two, n_classes=4), abs=1e-12)
    assert region_fix_bound(truth, start, n_classes=4, n_regions=3) == 1.0
    assert region_fix_bound(truth, start, n_classes=4, n_regions=0) == tile_iou(
        truth, start, n_classes=4)
    with pytest.raises(ValueError, match="n_regions: expected at least 0"):
        region_fix_bound(truth, start, n_classes=4, n_regions=-1)
    with pytest.raises(ValueError, match="start: expected a 2-D mask"):
        region_fix_bound(truth, start[:5], n_classes=4)
