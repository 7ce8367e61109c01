"""Pixel metrics of labeler/metrics.py: confusion matrix, overlap, class fractions, IoU line.

Published worked examples (Long, Shelhamer & Darrell 2015 for the segmentation metrics)
and reference libraries (scikit-learn, numpy) as oracles; slow pure-Python loops as
references for the vectorised code.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import confusion_matrix as sk_confusion_matrix
from sklearn.metrics import jaccard_score

from labeler import metrics as mt
from tests.common import random_masks, zoo_four_classes, zoo_square, zoo_unlabelled

PROPS = settings(max_examples=40, deadline=None)


# ---------------------------------------------------------------------------------------
# slow references
# ---------------------------------------------------------------------------------------
def loop_confusion(a: np.ndarray, b: np.ndarray, k: int, ignore: int | None = 255):
    out = np.zeros((k, k), np.int64)
    for x, y in zip(a.ravel().tolist(), b.ravel().tolist(), strict=True):
        if ignore is not None and (x == ignore or y == ignore):
            continue
        out[x, y] += 1
    return out


# ---------------------------------------------------------------------------------------
# confusion matrix
# ---------------------------------------------------------------------------------------
def test_confusion_matrix_hand_example():
    # common practice, no source: counted by hand
    a = np.array([[0, 0, 1], [1, 2, 255]], np.uint8)
    b = np.array([[0, 1, 1], [255, 2, 2]], np.uint8)
    expected = np.array([[1, 1, 0], [0, 1, 0], [0, 0, 1]])
    cm = mt.confusion_matrix(a, b, n_classes=3)
    assert cm.dtype == np.int64
    np.testing.assert_array_equal(cm, expected)


def test_confusion_matrix_zoo_quadrants_and_identity():
    m = zoo_four_classes()
    np.testing.assert_array_equal(mt.confusion_matrix(m, m, n_classes=4), np.diag([16] * 4))
    np.testing.assert_array_equal(
        mt.confusion_matrix(zoo_unlabelled(), zoo_square(), n_classes=2), np.zeros((2, 2))
    )


def test_confusion_matrix_empty_masks():
    e = np.zeros((0, 5), np.uint8)
    np.testing.assert_array_equal(mt.confusion_matrix(e, e, n_classes=3), np.zeros((3, 3)))


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    h=st.integers(1, 30),
    w=st.integers(1, 30),
    k=st.integers(1, 6),
)
def test_confusion_matrix_matches_sklearn_and_loop(seed, h, w, k):
    a, b = random_masks(seed, (h, w), k)
    cm = mt.confusion_matrix(a, b, n_classes=k)
    keep = (a != 255) & (b != 255)
    # oracle: sklearn.metrics.confusion_matrix on the commonly labelled pixels (it warns
    # for a single class, so K = 1 is left to the loop reference)
    if keep.any() and k >= 2:
        ref = sk_confusion_matrix(a[keep], b[keep], labels=list(range(k)))
        np.testing.assert_array_equal(cm, ref)
    np.testing.assert_array_equal(cm, loop_confusion(a, b, k))


@PROPS
@given(seed=st.integers(0, 2**32 - 1), k=st.integers(1, 17), odd=st.booleans())
def test_confusion_fast_path_equals_general_path(seed, k, odd):
    # the byte fast path (uint8, ignore 255, K <= 15) against the int64 path of int16 input;
    # 70001 / 70000 pixels exercise the two-pixels-per-element counting and its odd tail
    a, b = random_masks(seed, (70000 + int(odd),), k)
    fast = mt.confusion_matrix(a, b, n_classes=k)
    general = mt.confusion_matrix(a.astype(np.int16), b.astype(np.int16), n_classes=k)
    np.testing.assert_array_equal(fast, general)
    assert fast.sum() == np.count_nonzero((a != 255) & (b != 255))


def test_confusion_matrix_across_chunks():
    # more than one chunk of about a million pixels, fast and general paths agree
    a, b = random_masks(7, (1_100_001,), 4)
    fast = mt.confusion_matrix(a, b, n_classes=4)
    general = mt.confusion_matrix(a.astype(np.int32), b.astype(np.int32), n_classes=4)
    np.testing.assert_array_equal(fast, general)
    # oracle: np.bincount over int64 codes in one go (reference library function)
    keep = (a != 255) & (b != 255)
    ref = np.bincount(a[keep].astype(np.int64) * 4 + b[keep], minlength=16).reshape(4, 4)
    np.testing.assert_array_equal(fast, ref)


def test_confusion_matrix_bad_value_in_a_late_chunk():
    a, b = random_masks(8, (1_100_000,), 3)
    b[-1] = 200
    with pytest.raises(ValueError, match=r"mask_test: holds values \[200\]"):
        mt.confusion_matrix(a, b, n_classes=3)


def test_confusion_matrix_other_ignore_and_none():
    a = np.array([0, 1, 2, 9, 1], np.uint16)
    b = np.array([0, 1, 9, 1, 2], np.uint16)
    cm = mt.confusion_matrix(a, b, n_classes=3, ignore=9)
    np.testing.assert_array_equal(cm, loop_confusion(a, b, 3, ignore=9))
    c = np.array([[0, 1], [2, 2]], np.uint8)
    np.testing.assert_array_equal(mt.confusion_matrix(c, c, n_classes=3, ignore=None),
                                  np.diag([1, 1, 2]))


def test_confusion_matrix_non_contiguous_input():
    a, b = random_masks(3, (40, 40), 3)
    np.testing.assert_array_equal(
        mt.confusion_matrix(a[::2, 1::3], b[::2, 1::3], n_classes=3),
        loop_confusion(a[::2, 1::3], b[::2, 1::3], 3),
    )


def test_confusion_matrix_errors():
    a = np.zeros((4, 4), np.uint8)
    with pytest.raises(ValueError, match=r"mask_test: expected shape \(4, 4\) like mask_true"):
        mt.confusion_matrix(a, np.zeros((4, 5), np.uint8), n_classes=2)
    with pytest.raises(TypeError, match="mask_true: expected an integer class-index array"):
        mt.confusion_matrix(a.astype(float), a, n_classes=2)
    with pytest.raises(TypeError, match="mask_test: expected an integer"):
        mt.confusion_matrix(a, a.astype(bool), n_classes=2)
    bad = a.copy()
    bad[0, 0] = 7
    with pytest.raises(ValueError, match=r"mask_test: holds values \[7\] outside the class"):
        mt.confusion_matrix(a, bad, n_classes=4)
    with pytest.raises(ValueError, match=r"mask_true: holds values \[7\]"):
        mt.confusion_matrix(bad.astype(np.int32), a.astype(np.int32), n_classes=4)
    with pytest.raises(ValueError, match=r"mask_true: holds values \[-1\]"):
        mt.confusion_matrix(np.array([-1, 0]), np.array([0, 0]), n_classes=2)
    with pytest.raises(ValueError, match="ignore: the unlabelled value must not be a class"):
        mt.confusion_matrix(a, a, n_classes=4, ignore=2)
    with pytest.raises(ValueError, match="n_classes: expected 1..4096"):
        mt.confusion_matrix(a, a, n_classes=0)
    with pytest.raises(TypeError, match="n_classes: expected an int"):
        mt.confusion_matrix(a, a, n_classes=2.0)


# ---------------------------------------------------------------------------------------
# overlap metrics
# ---------------------------------------------------------------------------------------
def test_iou_dice_accuracy_worked_example():
    # worked by hand from the definitions (Long, Shelhamer & Darrell 2015): TP 8000,
    # FP 2000, FN 1000, TN 89000 give IoU 0.727273, Dice 0.842105, accuracy 0.97
    cm = np.array([[89000, 2000], [1000, 8000]])
    np.testing.assert_allclose(mt.iou_per_class(cm)[1], 0.727273, atol=5e-7)
    np.testing.assert_allclose(mt.dice_per_class(cm)[1], 0.842105, atol=5e-7)
    np.testing.assert_allclose(mt.pixel_accuracy(cm), 0.97, atol=1e-12)
    # identity D = 2J / (1 + J) (follows from the definitions of Dice and Jaccard)
    j = mt.iou_per_class(cm)
    np.testing.assert_allclose(mt.dice_per_class(cm), 2 * j / (1 + j), atol=1e-12)
    # Long, Shelhamer & Darrell 2015: mean IoU = mean of the per-class IoU
    np.testing.assert_allclose(mt.mean_iou(cm), (89000 / 92000 + 8000 / 11000) / 2, atol=1e-12)


def test_absent_class_is_nan_and_skipped_in_mean():
    # Long, Shelhamer & Darrell 2015: classes absent from both sides are skipped
    cm = np.array([[5, 0, 1], [0, 0, 0], [1, 0, 3]])
    iou = mt.iou_per_class(cm)
    assert math.isnan(iou[1]) and math.isnan(mt.dice_per_class(cm)[1])
    np.testing.assert_allclose(mt.mean_iou(cm), (5 / 7 + 3 / 5) / 2, atol=1e-12)
    assert math.isnan(mt.mean_iou(np.zeros((3, 3))))
    assert math.isnan(mt.pixel_accuracy(np.zeros((2, 2))))
    # a class only one side uses has IoU 0, not nan
    assert mt.iou_per_class(np.array([[3, 2], [0, 0]]))[1] == 0.0


@PROPS
@given(seed=st.integers(0, 2**32 - 1), k=st.integers(2, 6), n=st.integers(2, 400))
def test_iou_matches_sklearn_jaccard(seed, k, n):
    a, b = random_masks(seed, (n,), k, unlabelled=0.0)
    cm = mt.confusion_matrix(a, b, n_classes=k)
    # oracle: sklearn.metrics.jaccard_score(average=None); sklearn scores a class absent
    # from both sides 0 (zero_division=0), we give nan there
    ref = jaccard_score(a, b, labels=list(range(k)), average=None, zero_division=0)
    absent = ~np.isin(np.arange(k), np.concatenate([a, b]))
    got = mt.iou_per_class(cm)
    np.testing.assert_array_equal(np.isnan(got), absent)
    np.testing.assert_allclose(got[~absent], ref[~absent], atol=1e-12)
    np.testing.assert_allclose(mt.iou_per_class(cm.T), mt.iou_per_class(cm), atol=1e-12)


def test_metric_input_errors():
    with pytest.raises(ValueError, match=r"cm: expected a square \(K, K\)"):
        mt.iou_per_class(np.zeros((2, 3)))
    with pytest.raises(ValueError, match="cm: expected finite non-negative counts"):
        mt.mean_iou(np.array([[1, -1], [0, 2]]))
    with pytest.raises(ValueError, match="cm: expected finite non-negative counts"):
        mt.pixel_accuracy(np.array([[1.0, np.nan], [0.0, 2.0]]))
    with pytest.raises(TypeError, match="cm: expected numbers, got dtype <U1"):
        mt.dice_per_class(np.array([["a", "b"], ["c", "d"]]))


# ---------------------------------------------------------------------------------------
# class fractions
# ---------------------------------------------------------------------------------------
def loop_fractions(mask: np.ndarray, indices) -> list[float]:
    counts = [sum(1 for v in mask.ravel().tolist() if v == c) for c in indices]
    total = sum(counts)
    return [c / total if total else 0.0 for c in counts]


def test_class_fractions_hand_example():
    # common practice, no source: counted by hand; 255 (unlabelled) is not a class
    mask = np.array([[0, 1, 1], [255, 3, 1]], np.uint8)
    np.testing.assert_allclose(mt.class_fractions(mask, (0, 1, 2, 3)), [0.2, 0.6, 0.0, 0.2],
                               atol=1e-12)
    # the order of the result is the order of the indices; unlisted classes do not count
    np.testing.assert_allclose(mt.class_fractions(mask, [3, 0]), [0.5, 0.5], atol=1e-12)
    out = mt.class_fractions(np.full((2, 2), 255, np.uint8), (0, 1))
    assert out.dtype == np.float64 and out.tolist() == [0.0, 0.0]
    assert mt.class_fractions(np.zeros((0, 3), np.uint8), (0, 1)).tolist() == [0.0, 0.0]


@PROPS
@given(seed=st.integers(0, 2**32 - 1), h=st.integers(0, 12), w=st.integers(1, 12))
def test_class_fractions_matches_loop(seed, h, w):
    a, _ = random_masks(seed, (h, w), 5, unlabelled=0.2)
    indices = (0, 2, 3, 4)
    got = mt.class_fractions(a, indices)
    np.testing.assert_allclose(got, loop_fractions(a, indices), atol=1e-12)
    # any integer dtype gives the same shares
    np.testing.assert_array_equal(mt.class_fractions(a.astype(np.int32), indices), got)


def test_class_fractions_errors():
    with pytest.raises(TypeError, match="mask: expected an integer class-index array"):
        mt.class_fractions(np.zeros((2, 2)), (0, 1))
    with pytest.raises(ValueError, match=r"class_indices: expected indices >= 0, got \[0, -1\]"):
        mt.class_fractions(np.zeros((2, 2), np.uint8), (0, -1))
    with pytest.raises(ValueError, match="mask: expected class indices >= 0, got a minimum of -3"):
        mt.class_fractions(np.array([[0, -3]]), (0, 1))


# ---------------------------------------------------------------------------------------
# the IoU line
# ---------------------------------------------------------------------------------------
def test_format_iou():
    # common practice, no source: three decimals, "-" where a class has no figure
    iou = {"soil": 0.97912, "crop": 0.8123, "weed": None, "symptom": math.nan}
    assert mt.format_iou(iou) == "soil 0.979 · crop 0.812 · weed - · symptom -"
    assert mt.format_iou(iou, names=("crop", "weed", "ghost")) == "crop 0.812 · weed - · ghost -"
    assert mt.format_iou(iou, names=("crop",), miou=0.72949) == "crop 0.812 · mIoU 0.729"
    assert mt.format_iou({"crop": 0.8123}, miou=math.nan) == "crop 0.812 · mIoU -"
    assert mt.format_iou(iou, names=("soil",), digits=2) == "soil 0.98"
    assert mt.format_iou(None) == ""
    assert mt.format_iou(None, names=("crop",)) == "crop -"


# ---------------------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------------------
def test_validation_helpers():
    assert mt.check_n_classes(np.int64(4)) == 4
    with pytest.raises(TypeError, match="n_classes: expected an int, got bool"):
        mt.check_n_classes(True)
    assert mt.check_ignore(None, n_classes=3) is None
    assert mt.check_ignore(np.uint8(255), n_classes=3) == 255
    with pytest.raises(TypeError, match="ignore: expected an int or None, got float"):
        mt.check_ignore(255.0, n_classes=3)
    a = np.array([0, 1], np.uint8)
    assert mt.as_label_array(a, name="mask") is a
    mt.check_label_values(np.array([0, 2, 9]), name="m", n_classes=3, ignore=9)
    with pytest.raises(ValueError, match=r"m: holds values \[9\] outside the class indices 0..2;"):
        mt.check_label_values(np.array([0, 2, 9]), name="m", n_classes=3, ignore=None)
    np.testing.assert_array_equal(mt.as_confusion([[1, 2], [3, 4]], name="t"), [[1, 2], [3, 4]])
    with pytest.raises(ValueError, match=r"t: expected a square \(K, K\) confusion matrix"):
        mt.as_confusion(np.zeros((0, 0)), name="t")
