"""Per-pixel uncertainty of labeler/picker/uncertainty.py: entropy, margin, least
confidence, BALD and their maps.

Worked values recomputed by hand from the published formulas (entropy, margin, least
confidence: the classic uncertainty-sampling scores; BALD: Houlsby et al. 2011 with
MC-dropout samples, Gal, Islam & Ghahramani 2017). Oracle: scipy.stats.entropy. Slow
loops as references for the vectorised code.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from labeler.picker import (
    UNCERTAINTY_MEASURES,
    pixel_bald,
    pixel_entropy,
    pixel_least_confidence,
    pixel_margin,
    uncertainty_maps,
)
from labeler.settings import UNCERTAINTY_MEASURES as SETTINGS_MEASURES
from tests.picker.references import LN2, entropy_loop, random_probs

# -- per-pixel scores ----------------------------------------------------------------------


def test_pixel_scores_worked_example():
    # recomputed by hand from the definitions: p = (0.5, 0.3, 0.2)
    # gives H = 1.029653 nats, margin 0.2, least confidence 0.5.
    p = np.array([0.5, 0.3, 0.2])
    np.testing.assert_allclose(pixel_entropy(p), 1.029653, atol=1e-6)
    np.testing.assert_allclose(pixel_margin(p), 0.2, atol=1e-12)
    np.testing.assert_allclose(pixel_least_confidence(p), 0.5, atol=1e-12)


def test_pixel_bald_worked_examples():
    # BALD = H[mean_t p_t] - mean_t H[p_t] (Houlsby et al. 2011; Gal, Islam & Ghahramani
    # 2017); values recomputed by hand from the formula: ln 2 and 0.368064.
    np.testing.assert_allclose(pixel_bald(np.array([[1.0, 0.0], [0.0, 1.0]])), LN2, atol=1e-9)
    np.testing.assert_allclose(
        pixel_bald(np.array([[0.9, 0.1], [0.1, 0.9]])), 0.368064, atol=1e-6
    )
    # all passes agree: no mutual information (follows from the formula)
    np.testing.assert_allclose(pixel_bald(np.array([[0.7, 0.3]] * 4)), 0.0, atol=1e-12)


def test_pixel_entropy_matches_scipy():
    # oracle: scipy.stats.entropy (natural log) on random Dirichlet probabilities
    rng = np.random.default_rng(11)
    p = random_probs(rng, (4, 6, 5))
    np.testing.assert_allclose(pixel_entropy(p), scipy.stats.entropy(p, axis=0), atol=1e-12)
    np.testing.assert_allclose(
        pixel_entropy(np.moveaxis(p, 0, -1), axis=-1),
        scipy.stats.entropy(p, axis=0),
        atol=1e-12,
    )


def test_pixel_scores_match_loops():
    rng = np.random.default_rng(12)
    p = random_probs(rng, (3, 4, 5))
    s = np.stack([random_probs(rng, (3, 4, 5)) for _ in range(6)])
    margin, lc, bald = pixel_margin(p), pixel_least_confidence(p), pixel_bald(s)
    for r in range(4):
        for c in range(5):
            q = sorted(p[:, r, c], reverse=True)
            assert margin[r, c] == pytest.approx(q[0] - q[1], abs=1e-12)
            assert lc[r, c] == pytest.approx(1 - q[0], abs=1e-12)
            mean = [sum(s[t, j, r, c] for t in range(6)) / 6 for j in range(3)]
            expected = entropy_loop(mean) - sum(entropy_loop(s[t, :, r, c]) for t in range(6)) / 6
            assert bald[r, c] == pytest.approx(expected, abs=1e-12)


def test_pixel_edge_cases_and_errors():
    # a certain pixel has entropy 0 (0 log 0 = 0); uniform over K has log K
    np.testing.assert_allclose(pixel_entropy(np.array([1.0, 0.0, 0.0])), 0.0, atol=1e-12)
    np.testing.assert_allclose(pixel_entropy(np.full(4, 0.25)), math.log(4), atol=1e-12)
    np.testing.assert_allclose(pixel_margin(np.array([[0.3]])), [0.3])
    with pytest.raises(ValueError, match="samples: expected shape"):
        pixel_bald(np.array([0.5, 0.5]))
    with pytest.raises(ValueError, match="probs: expected an array with a class axis"):
        pixel_entropy(np.float64(0.5))


# -- per-pixel maps ------------------------------------------------------------------------


def test_uncertainty_maps_channels_and_block_mean():
    rng = np.random.default_rng(13)
    p = random_probs(rng, (3, 7, 8))
    s = np.stack([random_probs(rng, (3, 7, 8)) for _ in range(3)])
    full = uncertainty_maps(p, samples=s)
    # one list of the measure names, shared with the settings (and the model, workflow)
    assert UNCERTAINTY_MEASURES == ("entropy", "margin", "least_confidence", "bald")
    assert UNCERTAINTY_MEASURES is SETTINGS_MEASURES
    assert full.shape == (4, 7, 8) and full.dtype == np.float32
    np.testing.assert_allclose(full[0], pixel_entropy(p), atol=1e-6)
    np.testing.assert_allclose(full[1], pixel_margin(p), atol=1e-6)
    np.testing.assert_allclose(full[2], pixel_least_confidence(p), atol=1e-6)
    np.testing.assert_allclose(full[3], pixel_bald(s), atol=1e-6)
    small = uncertainty_maps(p, samples=s, factor=3)
    assert small.shape == (4, 3, 3)
    for ch in range(4):  # loop reference: mean over each block, edge blocks smaller
        for i in range(3):
            for j in range(3):
                block = full[ch, 3 * i : 3 * i + 3, 3 * j : 3 * j + 3].astype(np.float64)
                assert small[ch, i, j] == pytest.approx(block.mean(), abs=1e-6)


def test_uncertainty_maps_without_samples_and_errors():
    p = np.full((2, 2, 2), 0.5)
    maps = uncertainty_maps(p)
    assert np.isnan(maps[3]).all()
    np.testing.assert_allclose(maps[0], LN2, atol=1e-6)
    with pytest.raises(ValueError, match="factor: expected an integer >= 1"):
        uncertainty_maps(p, factor=0)
    with pytest.raises(ValueError, match=r"probs: expected class probabilities of shape \(K, H, W\)"):
        uncertainty_maps(np.full((2, 2), 0.5))
    with pytest.raises(ValueError, match=r"samples: expected dropout samples of shape \(T, 2, 2, 2\)"):
        uncertainty_maps(p, samples=np.full((3, 2, 2, 3), 0.5))
