"""Consensus of labeler/agreement/consensus.py: majority vote and STAPLE.

STAPLE is Warfield, Zou & Wells (2004), IEEE TMI 23(7): checked on seeded synthetic
raters whose true flip rates are known, so the estimated rates can be compared with them.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labeler import agreement as ag
from tests.common import zoo_four_classes, zoo_ring, zoo_two_touching

PROPS = settings(max_examples=40, deadline=None)


def loop_majority(masks: np.ndarray, ignore: int = 255) -> np.ndarray:
    r, h, w = masks.shape
    out = np.full((h, w), 255, np.uint8)
    for i in range(h):
        for j in range(w):
            votes = Counter(int(v) for v in masks[:, i, j] if v != ignore)
            if not votes:
                continue
            counts = votes.most_common()
            if len(counts) > 1 and counts[0][1] == counts[1][1]:
                continue
            out[i, j] = counts[0][0]
    return out


def flip_raters(truth: np.ndarray, confusions: list[np.ndarray], seed: int) -> np.ndarray:
    """Rater masks drawn from ``P(label | true class)`` rows of each confusion matrix."""
    rng = np.random.default_rng(seed)
    out = []
    for conf in confusions:
        cum = np.cumsum(conf, axis=1)[truth]  # (H, W, K)
        u = rng.random(truth.shape)[..., None]
        out.append(np.minimum((u > cum).sum(axis=-1), conf.shape[0] - 1).astype(np.uint8))
    return np.stack(out)


# ---------------------------------------------------------------------------------------
# majority vote
# ---------------------------------------------------------------------------------------
def test_majority_vote_hand_example():
    # common practice, no source: counted by hand
    masks = np.array([
        [[0, 1, 2, 255]],
        [[0, 1, 1, 255]],
        [[1, 2, 255, 255]],
    ], np.uint8)
    # pixel 0: 0,0,1 -> 0; pixel 1: 1,1,2 -> 1; pixel 2: 2,1 -> tie; pixel 3: nobody
    np.testing.assert_array_equal(ag.majority_vote(masks, n_classes=3),
                                  np.array([[0, 1, 255, 255]], np.uint8))


def test_majority_vote_identical_and_two_raters():
    m = zoo_four_classes()
    out = ag.majority_vote(np.stack([m, m, m]), n_classes=4)
    assert out.dtype == np.uint8
    np.testing.assert_array_equal(out, m)
    # two raters: every disagreement is a tie -> unlabelled
    a, b = zoo_ring(), zoo_two_touching()[:8, :8]
    a = a[:8, :8]
    out = ag.majority_vote(np.stack([a, b]), n_classes=3)
    np.testing.assert_array_equal(out, np.where(a == b, a, 255))


@PROPS
@given(
    seed=st.integers(0, 2**32 - 1),
    raters=st.integers(1, 6),
    h=st.integers(1, 10),
    w=st.integers(1, 10),
    k=st.integers(1, 5),
)
def test_majority_vote_matches_loop(seed, raters, h, w, k):
    rng = np.random.default_rng(seed)
    masks = rng.integers(0, k, (raters, h, w)).astype(np.uint8)
    masks[rng.random(masks.shape) < 0.15] = 255
    np.testing.assert_array_equal(ag.majority_vote(masks, n_classes=k), loop_majority(masks))


def test_majority_vote_errors():
    with pytest.raises(ValueError, match=r"masks: expected a stack of shape \(R raters, H, W\)"):
        ag.majority_vote(np.zeros((4, 4), np.uint8), n_classes=2)
    with pytest.raises(ValueError, match=r"masks: holds values \[5\]"):
        ag.majority_vote(np.full((2, 2, 2), 5, np.uint8), n_classes=3)
    with pytest.raises(ValueError, match="n_classes: a uint8 consensus holds at most 255"):
        ag.majority_vote(np.zeros((2, 2, 2), np.uint16), n_classes=300, ignore=None)
    with pytest.raises(TypeError, match="masks: expected integer class-index masks"):
        ag.majority_vote(np.zeros((2, 2, 2)), n_classes=2)


# ---------------------------------------------------------------------------------------
# STAPLE
# ---------------------------------------------------------------------------------------
def test_staple_binary_recovers_known_rates():
    # Warfield et al. 2004 binary form: sensitivity p, specificity q per rater. Five
    # seeded raters with known p, q on a 200 x 200 truth with 30 % foreground; the
    # estimates must lie within 0.02 of the true rates.
    rng = np.random.default_rng(20240501)
    truth = (rng.random((200, 200)) < 0.3).astype(np.uint8)
    p = np.array([0.92, 0.80, 0.95, 0.85, 0.90])
    q = np.array([0.95, 0.90, 0.86, 0.97, 0.88])
    confusions = [np.array([[qj, 1 - qj], [1 - pj, pj]]) for pj, qj in zip(p, q, strict=True)]
    masks = flip_raters(truth, confusions, seed=7)
    res = ag.staple(masks, n_classes=2)
    assert res.converged and res.iterations < 50
    np.testing.assert_allclose(res.sensitivity[:, 1], p, atol=0.02)
    np.testing.assert_allclose(res.specificity[:, 1], q, atol=0.02)
    # one-vs-rest of class 0 swaps the roles of p and q
    np.testing.assert_allclose(res.sensitivity[:, 0], res.specificity[:, 1], atol=1e-9)
    np.testing.assert_allclose(res.specificity[:, 0], res.sensitivity[:, 1], atol=1e-9)
    np.testing.assert_allclose(res.performance[:, 1, 1], res.sensitivity[:, 1], atol=1e-12)
    # the consensus beats the best single rater (common practice, no source)
    best_single = max(float((m == truth).mean()) for m in masks)
    assert float((res.consensus == truth).mean()) > best_single


def test_staple_three_raters_binary_within_looser_bound():
    # With only three raters each posterior is less certain and the fixed vote prior
    # biases the rates a little (seen in our runs up to about 0.03): a looser bound.
    rng = np.random.default_rng(3)
    truth = (rng.random((200, 200)) < 0.3).astype(np.uint8)
    p, q = np.array([0.9, 0.8, 0.95]), np.array([0.95, 0.9, 0.85])
    confusions = [np.array([[qj, 1 - qj], [1 - pj, pj]]) for pj, qj in zip(p, q, strict=True)]
    res = ag.staple(flip_raters(truth, confusions, seed=11), n_classes=2)
    np.testing.assert_allclose(res.sensitivity[:, 1], p, atol=0.04)
    np.testing.assert_allclose(res.specificity[:, 1], q, atol=0.04)


def test_staple_multiclass_recovers_confusions():
    # Warfield et al. 2004 multi-class form: one K x K confusion per rater
    rng = np.random.default_rng(99)
    truth = rng.choice(3, size=(150, 150), p=[0.5, 0.3, 0.2]).astype(np.uint8)
    confusions = [
        np.array([[0.90, 0.05, 0.05], [0.10, 0.85, 0.05], [0.05, 0.10, 0.85]]),
        np.array([[0.95, 0.03, 0.02], [0.05, 0.90, 0.05], [0.10, 0.10, 0.80]]),
        np.array([[0.85, 0.10, 0.05], [0.05, 0.90, 0.05], [0.02, 0.08, 0.90]]),
    ]
    masks = flip_raters(truth, confusions, seed=5)
    res = ag.staple(masks, n_classes=3)
    assert res.performance.shape == (3, 3, 3)
    np.testing.assert_allclose(res.performance, np.stack(confusions), atol=0.02)
    np.testing.assert_allclose(res.performance.sum(axis=2), 1.0, atol=1e-9)
    np.testing.assert_allclose(res.prior.sum(), 1.0, atol=1e-12)


def test_staple_identical_raters_and_unlabelled():
    m = zoo_four_classes()
    m[0, 0] = 255  # nobody labelled this pixel
    res = ag.staple(np.stack([m, m, m]), n_classes=4)
    np.testing.assert_array_equal(res.consensus, m)
    assert res.probabilities.shape == (4, 8, 8)
    np.testing.assert_allclose(res.probabilities.sum(axis=0), 1.0, atol=1e-6)
    # where nobody voted the posterior is the prior (the global vote frequencies)
    np.testing.assert_allclose(res.probabilities[:, 0, 0], res.prior, atol=1e-6)
    np.testing.assert_allclose(res.prior, np.bincount(m[m != 255], minlength=4) / 63,
                               atol=1e-12)
    for j in range(3):
        np.testing.assert_allclose(np.diag(res.performance[j]), 1.0, atol=1e-6)


def test_staple_weak_labels_use_only_labelled_votes():
    # a rater who left half the tile unlabelled is scored on his labelled half only
    rng = np.random.default_rng(1)
    truth = (rng.random((60, 60)) < 0.4).astype(np.uint8)
    masks = np.stack([truth, truth, truth]).copy()
    masks[2, :, 30:] = 255
    res = ag.staple(masks, n_classes=2)
    np.testing.assert_array_equal(res.consensus, truth)
    np.testing.assert_allclose(res.sensitivity, 1.0, atol=1e-6)


def test_staple_many_raters_takes_the_unique_pattern_path():
    # 12 raters over 3 classes exceed the direct pattern table (4**12 codes)
    rng = np.random.default_rng(4)
    truth = rng.integers(0, 3, (40, 40)).astype(np.uint8)
    conf = np.array([[0.9, 0.05, 0.05], [0.05, 0.9, 0.05], [0.05, 0.05, 0.9]])
    masks = flip_raters(truth, [conf] * 12, seed=2)
    res = ag.staple(masks, n_classes=3)
    np.testing.assert_array_equal(res.consensus, truth)
    np.testing.assert_allclose(res.performance.mean(axis=0), conf, atol=0.03)


def test_staple_iteration_limit_and_errors():
    rng = np.random.default_rng(2)
    truth = (rng.random((30, 30)) < 0.5).astype(np.uint8)
    conf = np.array([[0.8, 0.2], [0.3, 0.7]])
    masks = flip_raters(truth, [conf, conf, conf], seed=3)
    res = ag.staple(masks, n_classes=2, max_iter=1)
    assert res.iterations == 1 and not res.converged
    with pytest.raises(ValueError, match="n_classes: STAPLE needs at least 2 classes"):
        ag.staple(masks, n_classes=1)
    with pytest.raises(ValueError, match="max_iter: expected an integer >= 1"):
        ag.staple(masks, n_classes=2, max_iter=0)
    with pytest.raises(ValueError, match="tol: expected a positive tolerance"):
        ag.staple(masks, n_classes=2, tol=0)
    with pytest.raises(ValueError, match=r"masks: holds values \[2\]"):
        ag.staple(masks + 1, n_classes=2)
