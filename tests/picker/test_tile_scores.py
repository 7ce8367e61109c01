"""Per-tile scores of labeler/picker/tile_scores.py: tile uncertainty, rarity, disagreement.

Worked values by hand (named beside each check); slow loops as references for the
vectorised code.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labeler.picker import (
    class_rarity,
    disagreement_scores,
    rarity_weights,
    tile_uncertainty,
)
from tests.picker.references import LN2, entropy_loop, random_probs, rarity_loop

# -- per tile ------------------------------------------------------------------------------


def test_tile_uncertainty_hand_made():
    # pixel 0 is the worked example (0.5, 0.3, 0.2) of test_uncertainty.py (entropy
    # 1.029653 nats, margin 0.2, least confidence 0.5, recomputed by hand); pixel 1 is certain
    p = np.array([[[0.5, 1.0]], [[0.3, 0.0]], [[0.2, 0.0]]])
    t = tile_uncertainty(p)
    assert t.entropy == pytest.approx(1.029653 / 2, abs=1e-6)
    assert t.margin == pytest.approx(0.6, abs=1e-12)
    assert t.least_confidence == pytest.approx(0.25, abs=1e-12)
    assert math.isnan(t.bald)
    np.testing.assert_allclose(t.class_fractions, [1.0, 0.0, 0.0])
    assert t.n_scored == 2
    # both pixels are predicted soil: scoring vegetation only leaves nothing -> certain
    v = tile_uncertainty(p, vegetation_only=True)
    assert (v.entropy, v.margin, v.least_confidence, v.n_scored) == (0.0, 1.0, 0.0, 0)
    assert math.isnan(v.bald)


def test_tile_uncertainty_vegetation_only_scores_plant_pixels():
    # pixel 0 predicted crop (class 1) with the worked-example probabilities; pixel 1 soil
    p = np.array([[[0.2, 1.0]], [[0.5, 0.0]], [[0.3, 0.0]]])
    v = tile_uncertainty(p, vegetation_only=True)
    assert v.entropy == pytest.approx(1.029653, abs=1e-6)
    assert v.margin == pytest.approx(0.2, abs=1e-12)
    assert v.least_confidence == pytest.approx(0.5, abs=1e-12)
    assert v.n_scored == 1
    np.testing.assert_allclose(v.class_fractions, [0.5, 0.5, 0.0])  # over the whole tile
    # with crop declared the background, the soil pixel is the one scored
    w = tile_uncertainty(p, vegetation_only=True, background_class=1)
    assert (w.entropy, w.n_scored) == (0.0, 1)


def test_tile_uncertainty_bald_from_samples():
    # pixel 0: samples (0.9, 0.1), (0.1, 0.9); pixel 1: (1, 0), (0, 1) -> BALD 0.368064 and
    # ln 2 (recomputed by hand from the BALD formula); their mean. Argmax of (0.5, 0.5) ties -> class 0.
    s = np.array([[[[0.9, 1.0]], [[0.1, 0.0]]], [[[0.1, 0.0]], [[0.9, 1.0]]]])
    p = s.mean(axis=0)
    t = tile_uncertainty(p, samples=s)
    assert t.bald == pytest.approx((0.368064 + LN2) / 2, abs=1e-6)
    np.testing.assert_allclose(t.class_fractions, [1.0, 0.0])
    assert tile_uncertainty(p, samples=s, vegetation_only=True).bald == 0.0


def test_tile_uncertainty_matches_loop():
    rng = np.random.default_rng(14)
    p = random_probs(rng, (4, 5, 6))
    s = np.stack([random_probs(rng, (4, 5, 6)) for _ in range(3)])
    t = tile_uncertainty(p, samples=s, vegetation_only=True)
    ent, mar, bal, counts, n = 0.0, 0.0, 0.0, [0] * 4, 0
    for r in range(5):
        for c in range(6):
            q = list(p[:, r, c])
            top = q.index(max(q))
            counts[top] += 1
            if top == 0:
                continue
            n += 1
            ent += entropy_loop(q)
            srt = sorted(q, reverse=True)
            mar += srt[0] - srt[1]
            mean = [sum(s[i, j, r, c] for i in range(3)) / 3 for j in range(4)]
            bal += entropy_loop(mean) - sum(entropy_loop(s[i, :, r, c]) for i in range(3)) / 3
    assert t.n_scored == n
    assert t.entropy == pytest.approx(ent / n, abs=1e-12)
    assert t.margin == pytest.approx(mar / n, abs=1e-12)
    assert t.bald == pytest.approx(bal / n, abs=1e-12)
    np.testing.assert_allclose(t.class_fractions, np.array(counts) / 30, atol=1e-12)


def test_tile_uncertainty_errors():
    p = np.full((2, 2, 2), 0.5)
    with pytest.raises(ValueError, match="background_class: expected a class index in 0..1"):
        tile_uncertainty(p, background_class=2)
    with pytest.raises(ValueError, match="probs: expected probabilities summing to 1"):
        tile_uncertainty(np.full((2, 2, 2), 0.7))
    with pytest.raises(ValueError, match="probs: expected probabilities >= 0"):
        tile_uncertainty(np.stack([np.full((2, 2), 1.5), np.full((2, 2), -0.5)]))
    with pytest.raises(ValueError, match="probs: expected finite probabilities"):
        tile_uncertainty(np.full((2, 2, 2), np.nan))
    with pytest.raises(ValueError, match="probs: expected class probabilities of shape"):
        tile_uncertainty(np.zeros((2, 0, 3)))
    with pytest.raises(ValueError, match="samples: expected dropout samples"):
        tile_uncertainty(p, samples=p)
    with pytest.raises(TypeError, match="background_class: expected an integer"):
        tile_uncertainty(p, background_class=0.0)


# -- rarity and disagreement ---------------------------------------------------------------


def test_rarity_weights_hand_made():
    # worked by hand: pool (1, 0), (0.5, 0.5) -> shares (0.75, 0.25); smoothing 0.25 ->
    # (1.0, 0.5); rarity 1/share = (1, 2) -> normalised (0.5, 1);
    # weights 1 + f . rho = 1.5, 1.75
    pool = np.array([[1.0, 0.0], [0.5, 0.5]])
    np.testing.assert_allclose(class_rarity(pool, smoothing=0.25), [0.5, 1.0], atol=1e-12)
    np.testing.assert_allclose(rarity_weights(pool, smoothing=0.25), [1.5, 1.75], atol=1e-12)
    # power 2 squares the raw rarity: (1, 4) -> (0.25, 1) -> weights 1.25, 1.625
    np.testing.assert_allclose(
        rarity_weights(pool, smoothing=0.25, power=2.0), [1.25, 1.625], atol=1e-12
    )
    # power 0: every class equally rare, every tile weighs 2
    np.testing.assert_allclose(rarity_weights(pool, smoothing=0.25, power=0.0), [2.0, 2.0])


def test_rarity_weights_from_labelled_set():
    # labelled set holds only class 0: shares (1, 0) -> smoothed (1.25, 0.25) -> rarity
    # (0.8, 4) -> (0.2, 1); the class the labelled set lacks counts as rare (worked by hand)
    pool = np.array([[1.0, 0.0], [0.5, 0.5], [0.0, 1.0]])
    w = rarity_weights(pool, labelled_fractions=np.array([[1.0, 0.0]]), smoothing=0.25)
    np.testing.assert_allclose(w, [1.2, 1.6, 2.0], atol=1e-12)
    # an empty labelled set falls back to the pool
    np.testing.assert_allclose(
        rarity_weights(pool, labelled_fractions=np.zeros((0, 2)), smoothing=0.25),
        rarity_weights(pool, smoothing=0.25),
    )
    assert rarity_weights(np.zeros((0, 3))).shape == (0,)


def test_rarity_matches_loop():
    rng = np.random.default_rng(15)
    ref = rng.dirichlet([5.0, 2.0, 1.0, 0.2], size=9)
    pool = rng.dirichlet([1.0, 1.0, 1.0, 1.0], size=7)
    rho = rarity_loop(ref.tolist(), 0.01, 1.5)
    np.testing.assert_allclose(class_rarity(ref, power=1.5), rho, atol=1e-12)
    expected = [1 + sum(f * r for f, r in zip(row, rho, strict=True)) for row in pool]
    np.testing.assert_allclose(
        rarity_weights(pool, labelled_fractions=ref, power=1.5), expected, atol=1e-12
    )


def test_rarity_errors():
    f = np.array([[1.0, 0.0]])
    with pytest.raises(ValueError, match="smoothing: expected a finite number > 0"):
        class_rarity(f, smoothing=0.0)
    with pytest.raises(ValueError, match="power: expected a finite number >= 0"):
        class_rarity(f, power=-1.0)
    with pytest.raises(ValueError, match="reference_fractions: expected at least one tile"):
        class_rarity(np.zeros((0, 2)))
    with pytest.raises(ValueError, match="class_fractions: expected finite fractions >= 0"):
        rarity_weights(np.array([[1.5, -0.5]]))
    with pytest.raises(ValueError, match=r"class_fractions: expected class fractions of shape \(N, K\)"):
        rarity_weights(np.array([1.0, 0.0]))
    with pytest.raises(ValueError, match="labelled_fractions: expected 2 classes"):
        rarity_weights(f, labelled_fractions=np.array([[1.0, 0.0, 0.0]]))


def test_disagreement_scores():
    # 1 - agreement; NaN (not overlapped) -> 0; kappa below chance scores above 1
    a = np.array([np.nan, 1.0, 0.25, -0.5, 0.0])
    np.testing.assert_allclose(disagreement_scores(a), [0.0, 0.0, 0.75, 1.5, 1.0], atol=1e-12)
    with pytest.raises(ValueError, match=r"agreement: expected kappa or IoU values in \[-1, 1\]"):
        disagreement_scores(np.array([0.5, 1.5]))
    with pytest.raises(ValueError, match="agreement: expected kappa or IoU values"):
        disagreement_scores(np.array([np.inf]))
    with pytest.raises(ValueError, match=r"agreement: expected shape \(N,\)"):
        disagreement_scores(np.zeros((2, 2)))
