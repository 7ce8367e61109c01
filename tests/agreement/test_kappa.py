"""Chance-corrected agreement of labeler/agreement/kappa.py: kappa, alpha, bands.

Published worked examples (Cohen 1960; Fleiss 1971; Krippendorff 2011; Landis & Koch 1977)
and reference libraries (scikit-learn, statsmodels) as oracles; slow pure-Python loops
as references for the vectorised code.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss_kappa

from labeler import agreement as ag
from labeler import metrics as mt
from tests.common import random_masks

NAN = math.nan
PROPS = settings(max_examples=40, deadline=None)


# ---------------------------------------------------------------------------------------
# slow references
# ---------------------------------------------------------------------------------------
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
# Cohen's kappa
# ---------------------------------------------------------------------------------------
def test_cohen_kappa_worked_examples():
    # Cohen 1960, 2 x 2 table (recomputed by hand): p_o 0.70, p_e 0.50 -> 0.40
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
    cm = mt.confusion_matrix(a, b, n_classes=k)
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


def test_cohen_kappa_input_errors():
    with pytest.raises(ValueError, match="cm: expected finite non-negative counts"):
        ag.cohen_kappa(np.array([[1, -1], [0, 2]]))


# ---------------------------------------------------------------------------------------
# Fleiss' kappa
# ---------------------------------------------------------------------------------------
FLEISS_TABLE = np.array(
    # Fleiss 1971 worked example (10 subjects x 14 raters x 5 categories)
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
    # Fleiss 1971 worked example: kappa = 0.20993 (statsmodels' tests assert 0.210)
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


# Krippendorff 2011, the 4 observers x 12 units example
KRIPP_4x12 = np.array([
    [1, 2, 3, 3, 2, 1, 4, 1, 2, N, N, N],
    [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, N, 3],
    [N, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, N],
    [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, N],
])


# Krippendorff 2011, the 3 coders x 15 units example
KRIPP_3x15 = np.array([
    [N, N, N, N, N, 3, 4, 1, 2, 1, 1, 3, 3, N, 3],
    [1, N, 2, 1, 3, 3, 4, 3, N, N, N, N, N, N, N],
    [N, N, 2, 1, 3, 4, 4, N, 2, 1, 1, 3, 3, N, 4],
])


@pytest.mark.parametrize(
    ("level", "expected", "atol"),
    [
        # Krippendorff 2011 values, published to 3 decimals
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
    # Krippendorff 2011 second example (published to 6 decimals)
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
# Landis & Koch bands
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
