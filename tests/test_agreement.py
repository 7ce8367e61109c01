"""Agreement metrics of labeler/agreement.py: confusion matrix, overlap, kappa, alpha, bands.

Published worked examples (values in ../shared/notes-checks.md, section "Agreement") and
reference libraries (scikit-learn, statsmodels, scipy) as oracles; slow pure-Python loops
as references for the vectorised code.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from sklearn.metrics import cohen_kappa_score, jaccard_score
from sklearn.metrics import confusion_matrix as sk_confusion_matrix
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss_kappa

from labeler import agreement as ag
from tests.common import zoo_four_classes, zoo_square, zoo_unlabelled

NAN = math.nan
PROPS = settings(max_examples=40, deadline=None)


def random_masks(seed: int, shape: tuple[int, ...], k: int, unlabelled: float = 0.1):
    """Two seeded random masks with about ``unlabelled`` share of 255 in each."""
    rng = np.random.default_rng(seed)
    a = rng.integers(0, k, shape).astype(np.uint8)
    b = np.where(rng.random(shape) < 0.6, a, rng.integers(0, k, shape)).astype(np.uint8)
    a[rng.random(shape) < unlabelled] = 255
    b[rng.random(shape) < unlabelled] = 255
    return a, b


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


def loop_fleiss_masks(masks: np.ndarray, k: int, ignore: int = 255) -> float:
    r = masks.shape[0]
    rows = []
    for pix in masks.reshape(r, -1).T.tolist():
        if ignore in pix:
            continue
        rows.append([pix.count(c) for c in range(k)])
    n_sub = len(rows)
    p_i = [(sum(c * c for c in row) - r) / (r * (r - 1)) for row in rows]
    p_bar = sum(p_i) / n_sub
    p_j = [sum(row[c] for row in rows) / (n_sub * r) for c in range(k)]
    p_e = sum(p * p for p in p_j)
    return (p_bar - p_e) / (1 - p_e)


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


def loop_alpha(data: np.ndarray, level: str) -> float:
    """Krippendorff (2011) step by step: coincidences from every ordered pair in a unit."""
    units = []
    for u in range(data.shape[1]):
        vals = [v for v in data[:, u].tolist() if not math.isnan(v)]
        if len(vals) >= 2:
            units.append(vals)
    values = sorted({v for vals in units for v in vals})
    pos = {v: i for i, v in enumerate(values)}
    o = np.zeros((len(values), len(values)))
    for vals in units:
        m = len(vals)
        for i in range(m):
            for j in range(m):
                if i != j:
                    o[pos[vals[i]], pos[vals[j]]] += 1.0 / (m - 1)
    n_c = o.sum(axis=1)
    n = n_c.sum()

    def delta(c, k):
        vc, vk = values[c], values[k]
        if level == "nominal":
            return float(vc != vk)
        if level == "interval":
            return (vc - vk) ** 2
        if level == "ratio":
            return 0.0 if vc + vk == 0 else ((vc - vk) / (vc + vk)) ** 2
        lo, hi = min(c, k), max(c, k)
        return (sum(n_c[g] for g in range(lo, hi + 1)) - (n_c[c] + n_c[k]) / 2) ** 2

    v = len(values)
    d_o = sum(o[c, k] * delta(c, k) for c in range(v) for k in range(v))
    d_e = sum(n_c[c] * n_c[k] * delta(c, k) for c in range(v) for k in range(v)) / (n - 1)
    return 1 - d_o / d_e


# ---------------------------------------------------------------------------------------
# confusion matrix
# ---------------------------------------------------------------------------------------
def test_confusion_matrix_hand_example():
    # common practice, no source: counted by hand
    a = np.array([[0, 0, 1], [1, 2, 255]], np.uint8)
    b = np.array([[0, 1, 1], [255, 2, 2]], np.uint8)
    expected = np.array([[1, 1, 0], [0, 1, 0], [0, 0, 1]])
    cm = ag.confusion_matrix(a, b, n_classes=3)
    assert cm.dtype == np.int64
    np.testing.assert_array_equal(cm, expected)


def test_confusion_matrix_zoo_quadrants_and_identity():
    m = zoo_four_classes()
    np.testing.assert_array_equal(ag.confusion_matrix(m, m, n_classes=4), np.diag([16] * 4))
    np.testing.assert_array_equal(
        ag.confusion_matrix(zoo_unlabelled(), zoo_square(), n_classes=2), np.zeros((2, 2))
    )


def test_confusion_matrix_empty_masks():
    e = np.zeros((0, 5), np.uint8)
    np.testing.assert_array_equal(ag.confusion_matrix(e, e, n_classes=3), np.zeros((3, 3)))


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    h=st.integers(1, 30),
    w=st.integers(1, 30),
    k=st.integers(1, 6),
)
def test_confusion_matrix_matches_sklearn_and_loop(seed, h, w, k):
    a, b = random_masks(seed, (h, w), k)
    cm = ag.confusion_matrix(a, b, n_classes=k)
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
    fast = ag.confusion_matrix(a, b, n_classes=k)
    general = ag.confusion_matrix(a.astype(np.int16), b.astype(np.int16), n_classes=k)
    np.testing.assert_array_equal(fast, general)
    assert fast.sum() == np.count_nonzero((a != 255) & (b != 255))


def test_confusion_matrix_across_chunks():
    # more than one chunk of about a million pixels, fast and general paths agree
    a, b = random_masks(7, (1_100_001,), 4)
    fast = ag.confusion_matrix(a, b, n_classes=4)
    general = ag.confusion_matrix(a.astype(np.int32), b.astype(np.int32), n_classes=4)
    np.testing.assert_array_equal(fast, general)
    # oracle: np.bincount over int64 codes in one go (reference library function)
    keep = (a != 255) & (b != 255)
    ref = np.bincount(a[keep].astype(np.int64) * 4 + b[keep], minlength=16).reshape(4, 4)
    np.testing.assert_array_equal(fast, ref)


def test_confusion_matrix_bad_value_in_a_late_chunk():
    a, b = random_masks(8, (1_100_000,), 3)
    b[-1] = 200
    with pytest.raises(ValueError, match=r"mask_test: holds values \[200\]"):
        ag.confusion_matrix(a, b, n_classes=3)


def test_confusion_matrix_other_ignore_and_none():
    a = np.array([0, 1, 2, 9, 1], np.uint16)
    b = np.array([0, 1, 9, 1, 2], np.uint16)
    cm = ag.confusion_matrix(a, b, n_classes=3, ignore=9)
    np.testing.assert_array_equal(cm, loop_confusion(a, b, 3, ignore=9))
    c = np.array([[0, 1], [2, 2]], np.uint8)
    np.testing.assert_array_equal(ag.confusion_matrix(c, c, n_classes=3, ignore=None),
                                  np.diag([1, 1, 2]))


def test_confusion_matrix_non_contiguous_input():
    a, b = random_masks(3, (40, 40), 3)
    np.testing.assert_array_equal(
        ag.confusion_matrix(a[::2, 1::3], b[::2, 1::3], n_classes=3),
        loop_confusion(a[::2, 1::3], b[::2, 1::3], 3),
    )


def test_confusion_matrix_errors():
    a = np.zeros((4, 4), np.uint8)
    with pytest.raises(ValueError, match=r"mask_test: expected shape \(4, 4\) like mask_true"):
        ag.confusion_matrix(a, np.zeros((4, 5), np.uint8), n_classes=2)
    with pytest.raises(TypeError, match="mask_true: expected an integer class-index array"):
        ag.confusion_matrix(a.astype(float), a, n_classes=2)
    with pytest.raises(TypeError, match="mask_test: expected an integer"):
        ag.confusion_matrix(a, a.astype(bool), n_classes=2)
    bad = a.copy()
    bad[0, 0] = 7
    with pytest.raises(ValueError, match=r"mask_test: holds values \[7\] outside the class"):
        ag.confusion_matrix(a, bad, n_classes=4)
    with pytest.raises(ValueError, match=r"mask_true: holds values \[7\]"):
        ag.confusion_matrix(bad.astype(np.int32), a.astype(np.int32), n_classes=4)
    with pytest.raises(ValueError, match=r"mask_true: holds values \[-1\]"):
        ag.confusion_matrix(np.array([-1, 0]), np.array([0, 0]), n_classes=2)
    with pytest.raises(ValueError, match="ignore: the unlabelled value must not be a class"):
        ag.confusion_matrix(a, a, n_classes=4, ignore=2)
    with pytest.raises(ValueError, match="n_classes: expected 1..4096"):
        ag.confusion_matrix(a, a, n_classes=0)
    with pytest.raises(TypeError, match="n_classes: expected an int"):
        ag.confusion_matrix(a, a, n_classes=2.0)


# ---------------------------------------------------------------------------------------
# overlap metrics
# ---------------------------------------------------------------------------------------
def test_iou_dice_accuracy_worked_example():
    # notes-checks "Overlap": TP 8000, FP 2000, FN 1000, TN 89000 (recomputed)
    cm = np.array([[89000, 2000], [1000, 8000]])
    np.testing.assert_allclose(ag.iou_per_class(cm)[1], 0.727273, atol=5e-7)
    np.testing.assert_allclose(ag.dice_per_class(cm)[1], 0.842105, atol=5e-7)
    np.testing.assert_allclose(ag.pixel_accuracy(cm), 0.97, atol=1e-12)
    # identity D = 2J / (1 + J) (notes-checks "Overlap")
    j = ag.iou_per_class(cm)
    np.testing.assert_allclose(ag.dice_per_class(cm), 2 * j / (1 + j), atol=1e-12)
    # Long, Shelhamer & Darrell 2015: mean IoU = mean of the per-class IoU
    np.testing.assert_allclose(ag.mean_iou(cm), (89000 / 92000 + 8000 / 11000) / 2, atol=1e-12)


def test_absent_class_is_nan_and_skipped_in_mean():
    # Long, Shelhamer & Darrell 2015: classes absent from both sides are skipped
    cm = np.array([[5, 0, 1], [0, 0, 0], [1, 0, 3]])
    iou = ag.iou_per_class(cm)
    assert math.isnan(iou[1]) and math.isnan(ag.dice_per_class(cm)[1])
    np.testing.assert_allclose(ag.mean_iou(cm), (5 / 7 + 3 / 5) / 2, atol=1e-12)
    assert math.isnan(ag.mean_iou(np.zeros((3, 3))))
    assert math.isnan(ag.pixel_accuracy(np.zeros((2, 2))))
    # a class only one side uses has IoU 0, not nan
    assert ag.iou_per_class(np.array([[3, 2], [0, 0]]))[1] == 0.0


@PROPS
@given(seed=st.integers(0, 2**32 - 1), k=st.integers(2, 6), n=st.integers(2, 400))
def test_iou_matches_sklearn_jaccard(seed, k, n):
    a, b = random_masks(seed, (n,), k, unlabelled=0.0)
    cm = ag.confusion_matrix(a, b, n_classes=k)
    # oracle: sklearn.metrics.jaccard_score(average=None); sklearn scores a class absent
    # from both sides 0 (zero_division=0), we give nan there
    ref = jaccard_score(a, b, labels=list(range(k)), average=None, zero_division=0)
    absent = ~np.isin(np.arange(k), np.concatenate([a, b]))
    got = ag.iou_per_class(cm)
    np.testing.assert_array_equal(np.isnan(got), absent)
    np.testing.assert_allclose(got[~absent], ref[~absent], atol=1e-12)
    np.testing.assert_allclose(ag.iou_per_class(cm.T), ag.iou_per_class(cm), atol=1e-12)


def test_metric_input_errors():
    with pytest.raises(ValueError, match=r"cm: expected a square \(K, K\)"):
        ag.iou_per_class(np.zeros((2, 3)))
    with pytest.raises(ValueError, match="cm: expected finite non-negative counts"):
        ag.cohen_kappa(np.array([[1, -1], [0, 2]]))


# ---------------------------------------------------------------------------------------
# Cohen's kappa
# ---------------------------------------------------------------------------------------
def test_cohen_kappa_worked_examples():
    # Cohen 1960 via notes-checks: p_o 0.70, p_e 0.50 -> 0.40
    np.testing.assert_allclose(ag.cohen_kappa(np.array([[20, 5], [10, 15]])), 0.40, atol=1e-12)
    table10 = np.array([[0, 4, 1], [0, 8, 0], [0, 1, 5]])
    # statsmodels stats/tests/test_inter_rater.py (SAS output): 0.4842, linear 0.4701
    np.testing.assert_allclose(ag.cohen_kappa(table10), 0.4842, atol=5e-5)
    np.testing.assert_allclose(ag.cohen_kappa(table10, weights="linear"), 0.4701, atol=5e-5)


def test_cohen_kappa_edge_cases():
    # module convention: p_e = 1 with perfect observed agreement -> 1.0; empty -> nan
    assert ag.cohen_kappa(np.array([[9, 0], [0, 0]])) == 1.0
    assert math.isnan(ag.cohen_kappa(np.zeros((2, 2))))
    # perfect disagreement with balanced margins: -1 (common practice, no source)
    np.testing.assert_allclose(ag.cohen_kappa(np.array([[0, 5], [5, 0]])), -1.0, atol=1e-12)
    with pytest.raises(ValueError, match="weights: expected None, 'linear' or 'quadratic'"):
        ag.cohen_kappa(np.eye(2), weights="cubic")


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    k=st.integers(2, 5),
    n=st.integers(5, 300),
    weights=st.sampled_from([None, "linear", "quadratic"]),
)
def test_cohen_kappa_matches_sklearn(seed, k, n, weights):
    a, b = random_masks(seed, (n,), k, unlabelled=0.0)
    assume(len(np.unique(a)) > 1 or len(np.unique(b)) > 1)
    cm = ag.confusion_matrix(a, b, n_classes=k)
    # oracle: sklearn.metrics.cohen_kappa_score with the same weights
    ref = cohen_kappa_score(a, b, labels=list(range(k)), weights=weights)
    np.testing.assert_allclose(ag.cohen_kappa(cm, weights=weights), ref, atol=1e-10)


def test_kappa_per_class_one_vs_rest():
    cm = np.array([[5, 1, 0], [2, 4, 0], [0, 0, 0]])
    got = ag.kappa_per_class(cm)
    # class 0 vs rest is the 2x2 [[5, 1], [2, 4]]; oracle: sklearn cohen_kappa_score
    y_true = np.repeat([0, 0, 1, 1], [5, 1, 2, 4])
    y_test = np.repeat([0, 1, 0, 1], [5, 1, 2, 4])
    np.testing.assert_allclose(got[0], cohen_kappa_score(y_true, y_test), atol=1e-12)
    np.testing.assert_allclose(got[1], got[0], atol=1e-12)  # two-class symmetry
    assert math.isnan(got[2])  # absent from both sides
    assert np.isnan(ag.kappa_per_class(np.zeros((2, 2)))).all()


# ---------------------------------------------------------------------------------------
# Fleiss' kappa
# ---------------------------------------------------------------------------------------
FLEISS_TABLE = np.array(
    # Fleiss 1971 worked example via notes-checks (10 subjects x 14 raters x 5 categories)
    [[0, 0, 0, 0, 14], [0, 2, 6, 4, 2], [0, 0, 3, 5, 6], [0, 3, 9, 2, 0], [2, 2, 8, 1, 1],
     [7, 7, 0, 0, 0], [3, 2, 6, 3, 0], [2, 5, 3, 2, 2], [6, 5, 2, 1, 0], [0, 2, 2, 3, 7]]
)

# Fleiss 1971's 30 patients x 6 psychiatrists diagnoses (categories 1..5), copied from
# statsmodels' own test file statsmodels/stats/tests/test_inter_rater.py (``diagnoses``);
# that test asserts kappa = 0.4302445 (R irr::kappam.fleiss). Source: Fleiss 1971.
DIAGNOSES = np.array(
    [[4, 4, 4, 4, 4, 4], [2, 2, 2, 5, 5, 5], [2, 3, 3, 3, 3, 5], [5, 5, 5, 5, 5, 5],
     [2, 2, 2, 4, 4, 4], [1, 1, 3, 3, 3, 3], [3, 3, 3, 3, 5, 5], [1, 1, 3, 3, 3, 4],
     [1, 1, 4, 4, 4, 4], [5, 5, 5, 5, 5, 5], [1, 4, 4, 4, 4, 4], [1, 2, 4, 4, 4, 4],
     [2, 2, 2, 3, 3, 3], [1, 4, 4, 4, 4, 4], [2, 2, 4, 4, 4, 5], [3, 3, 3, 3, 3, 5],
     [1, 1, 1, 4, 5, 5], [1, 1, 1, 1, 1, 2], [2, 2, 4, 4, 4, 4], [1, 3, 3, 5, 5, 5],
     [5, 5, 5, 5, 5, 5], [2, 4, 4, 4, 4, 4], [2, 2, 4, 5, 5, 5], [1, 1, 4, 4, 4, 4],
     [1, 4, 4, 4, 4, 5], [2, 2, 2, 2, 2, 4], [1, 1, 1, 1, 5, 5], [2, 2, 4, 4, 4, 4],
     [1, 3, 3, 3, 3, 3], [5, 5, 5, 5, 5, 5]]
)


def test_fleiss_kappa_worked_example():
    # Fleiss 1971 (notes-checks "Agreement", seen): kappa = 0.20993
    np.testing.assert_allclose(ag.fleiss_kappa(FLEISS_TABLE), 0.20993, atol=5e-6)


def test_fleiss_kappa_diagnoses():
    counts = np.stack([(DIAGNOSES == c).sum(axis=1) for c in range(1, 6)], axis=1)
    assert (counts.sum(axis=1) == 6).all()
    # Fleiss 1971 diagnoses; value from statsmodels' test_inter_rater.py (R irr agrees)
    np.testing.assert_allclose(ag.fleiss_kappa(counts), 0.4302445, atol=5e-8)
    # the same ratings as masks: 6 raters, 30 "pixels" in one row, classes 0..4
    masks = (DIAGNOSES.T - 1).astype(np.uint8)[:, None, :]
    np.testing.assert_allclose(ag.fleiss_kappa_masks(masks, n_classes=5), 0.4302445, atol=5e-8)


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    n_sub=st.integers(1, 40),
    k=st.integers(2, 6),
    raters=st.integers(2, 9),
)
def test_fleiss_kappa_matches_statsmodels(seed, n_sub, k, raters):
    rng = np.random.default_rng(seed)
    counts = np.stack([np.bincount(rng.integers(0, k, raters), minlength=k)
                       for _ in range(n_sub)])
    p_e = np.sum((counts.sum(axis=0) / counts.sum()) ** 2)
    assume(p_e < 1 - 1e-9)
    # oracle: statsmodels.stats.inter_rater.fleiss_kappa
    np.testing.assert_allclose(ag.fleiss_kappa(counts), sm_fleiss_kappa(counts), atol=1e-10)


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    raters=st.integers(2, 5),
    h=st.integers(1, 12),
    w=st.integers(1, 12),
    k=st.integers(2, 4),
)
def test_fleiss_kappa_masks_matches_loop(seed, raters, h, w, k):
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, k, (h, w))
    masks = np.where(rng.random((raters, h, w)) < 0.7, truth,
                     rng.integers(0, k, (raters, h, w))).astype(np.uint8)
    masks[rng.random(masks.shape) < 0.05] = 255
    got = ag.fleiss_kappa_masks(masks, n_classes=k)
    keep = ~(masks == 255).any(axis=0)
    if not keep.any():
        assert math.isnan(got)
        return
    counts = np.stack([(masks[:, keep] == c).sum(axis=0) for c in range(k)], axis=1)
    assume(np.sum((counts.sum(axis=0) / counts.sum()) ** 2) < 1 - 1e-9)
    np.testing.assert_allclose(got, loop_fleiss_masks(masks, k), atol=1e-10)


def test_fleiss_edge_cases_and_errors():
    assert ag.fleiss_kappa(np.array([[3, 0], [3, 0]])) == 1.0  # P_e = 1, module convention
    with pytest.raises(ValueError, match="counts: every row must sum to the same number"):
        ag.fleiss_kappa(np.array([[2, 1], [1, 1]]))
    with pytest.raises(ValueError, match="counts: expected at least 2 raters"):
        ag.fleiss_kappa(np.array([[1, 0], [0, 1]]))
    with pytest.raises(ValueError, match=r"counts: expected shape \(N subjects, K categories\)"):
        ag.fleiss_kappa(np.array([1, 2, 3]))
    with pytest.raises(ValueError, match="counts: expected non-negative whole numbers"):
        ag.fleiss_kappa(np.array([[1.5, 0.5], [1.0, 1.0]]))
    with pytest.raises(ValueError, match="masks: expected at least 2 raters"):
        ag.fleiss_kappa_masks(np.zeros((1, 3, 3), np.uint8), n_classes=2)
    with pytest.raises(ValueError, match=r"masks: expected a stack of shape \(R raters, H, W\)"):
        ag.fleiss_kappa_masks(np.zeros((3, 3), np.uint8), n_classes=2)
    assert math.isnan(ag.fleiss_kappa_masks(np.full((2, 2, 2), 255, np.uint8), n_classes=2))


# ---------------------------------------------------------------------------------------
# Krippendorff's alpha
# ---------------------------------------------------------------------------------------
N = np.nan
# Krippendorff 2011, the 4 observers x 12 units example (notes-checks "Agreement")
KRIPP_4x12 = np.array([
    [1, 2, 3, 3, 2, 1, 4, 1, 2, N, N, N],
    [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, N, 3],
    [N, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, N],
    [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, N],
])
# Krippendorff 2011, the 3 coders x 15 units example (notes-checks "Agreement")
KRIPP_3x15 = np.array([
    [N, N, N, N, N, 3, 4, 1, 2, 1, 1, 3, 3, N, 3],
    [1, N, 2, 1, 3, 3, 4, 3, N, N, N, N, N, N, N],
    [N, N, 2, 1, 3, 4, 4, N, 2, 1, 1, 3, 3, N, 4],
])


@pytest.mark.parametrize(
    ("level", "expected", "atol"),
    [
        # Krippendorff 2011 values, published to 3 decimals (notes-checks)
        ("nominal", 0.743, 5e-4),
        ("ordinal", 0.815, 5e-4),
        ("interval", 0.849, 5e-4),
        ("ratio", 0.797, 5e-4),
    ],
)
def test_krippendorff_4x12(level, expected, atol):
    got = ag.krippendorff_alpha(KRIPP_4x12, level=level)
    np.testing.assert_allclose(got, expected, atol=atol)
    np.testing.assert_allclose(got, loop_alpha(KRIPP_4x12, level), atol=1e-12)


@pytest.mark.parametrize(("level", "expected"), [("nominal", 0.691358), ("interval", 0.810845)])
def test_krippendorff_3x15(level, expected):
    # Krippendorff 2011 second example (notes-checks, seen, 6 decimals)
    np.testing.assert_allclose(ag.krippendorff_alpha(KRIPP_3x15, level=level), expected,
                               atol=5e-7)


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    raters=st.integers(2, 5),
    units=st.integers(2, 20),
    level=st.sampled_from(["nominal", "ordinal", "interval", "ratio"]),
)
def test_krippendorff_matches_loop(seed, raters, units, level):
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 5, (raters, units)).astype(float)
    data[rng.random(data.shape) < 0.2] = np.nan
    present = (~np.isnan(data)).sum(axis=0) >= 2
    assume(present.any())
    vals = data[:, present]
    assume(len(np.unique(vals[~np.isnan(vals)])) > 1)
    np.testing.assert_allclose(ag.krippendorff_alpha(data, level=level),
                               loop_alpha(data, level), atol=1e-9)


def test_krippendorff_nominal_two_raters_relates_to_scotts_pi():
    # Relation from memory (Krippendorff 2011 remarks that nominal alpha of two coders is
    # Scott's pi with a small-sample correction): alpha = 1 - (1 - pi) (2N - 1) / (2N).
    # Fleiss' kappa with two raters is Scott's pi (Fleiss 1971), so it gives pi here.
    a = np.array([0, 1, 1, 0, 2, 2, 1, 0, 0, 1])
    b = np.array([0, 1, 0, 0, 2, 1, 1, 0, 2, 1])
    n = a.size
    counts = np.stack([(a == c).astype(int) + (b == c) for c in range(3)], axis=1)
    pi = ag.fleiss_kappa(counts)
    alpha = ag.krippendorff_alpha(np.stack([a, b]).astype(float), level="nominal")
    np.testing.assert_allclose(alpha, 1 - (1 - pi) * (2 * n - 1) / (2 * n), atol=1e-12)


def test_krippendorff_edge_cases_and_errors():
    assert math.isnan(ag.krippendorff_alpha(np.array([[1.0, N], [N, 2.0]])))
    assert ag.krippendorff_alpha(np.array([[2.0, 2.0], [2.0, 2.0]])) == 1.0
    with pytest.raises(ValueError, match="level: expected one of nominal, ordinal"):
        ag.krippendorff_alpha(KRIPP_4x12, level="circular")
    with pytest.raises(ValueError, match=r"reliability: expected shape \(raters, units\)"):
        ag.krippendorff_alpha(np.array([1.0, 2.0]))
    with pytest.raises(ValueError, match="reliability: ratio level needs non-negative"):
        ag.krippendorff_alpha(np.array([[-1.0, 2.0], [1.0, 2.0]]), level="ratio")
    with pytest.raises(ValueError, match="reliability: expected finite values"):
        ag.krippendorff_alpha(np.array([[np.inf, 2.0], [1.0, 2.0]]))


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
    cm = ag.confusion_matrix(a, b, n_classes=2)
    assert ag.pixel_accuracy(cm) > 0.89
    assert ag.iou_per_class(cm)[1] > 0.77
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
# bands and the tile scalar
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("kappa", "band"),
    [
        # Landis & Koch 1977 bands; upper bounds inclusive is our documented choice
        (-0.01, "poor"), (0.0, "slight"), (0.20, "slight"), (0.2001, "fair"), (0.40, "fair"),
        (0.41, "moderate"), (0.60, "moderate"), (0.61, "substantial"), (0.80, "substantial"),
        (0.81, "almost perfect"), (1.0, "almost perfect"), (NAN, "undefined"),
    ],
)
def test_landis_koch_band(kappa, band):
    assert ag.landis_koch_band(kappa) == band


def test_landis_koch_band_rejects_above_one():
    with pytest.raises(ValueError, match="kappa: expected a value <= 1, got 1.5"):
        ag.landis_koch_band(1.5)


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
