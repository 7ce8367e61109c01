"""Tests of labeler.picker: uncertainty scores, rarity, k-centre and batch selection.

Sources of the checks are named beside each one. The worked per-pixel values are those of
../shared/notes-checks.md, section "Active learning" (recomputed from the published
formulas). Reference libraries used as oracles: scipy.stats.entropy,
sklearn.metrics.pairwise_distances. Every vectorised function is also compared with a
slow pure-Python loop written here.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import pairwise_distances

from labeler.picker import (
    MAP_CHANNELS,
    REASONS,
    STRATEGIES,
    CandidatePool,
    Selection,
    class_rarity,
    covering_radius,
    disagreement_scores,
    k_center_greedy,
    pixel_bald,
    pixel_entropy,
    pixel_least_confidence,
    pixel_margin,
    rarity_weights,
    select_batch,
    tile_uncertainty,
    uncertainty_maps,
)
from labeler.settings import STRATEGIES as SETTINGS_STRATEGIES

LN2 = math.log(2.0)


# -- loop references -----------------------------------------------------------------------


def entropy_loop(p):
    return -sum(x * math.log(x) for x in p if x > 0)


def dist(a, b):
    return math.sqrt(sum((float(x) - float(y)) ** 2 for x, y in zip(a, b, strict=True)))


def kcentre_loop(x, k, labelled=(), candidates=None, weights=None):
    """Greedy k-centre, one point at a time, in float64 (strict > keeps the lowest index)."""
    n = len(x)
    lab = sorted(set(int(i) for i in labelled))
    pool = range(n) if candidates is None else sorted(set(int(i) for i in candidates))
    cand = [i for i in pool if i not in lab]
    w = [1.0] * n if weights is None else [float(v) for v in weights]
    centres = [x[j] for j in lab]
    chosen = []
    for _ in range(min(k, len(cand))):
        if centres:
            refs = centres
        else:  # the candidates' mean plays the labelled point for the first pick
            refs = [[sum(float(x[i][d]) for i in cand) / len(cand) for d in range(len(x[0]))]]
        best, best_i = -1.0, None
        for i in cand:
            if i in chosen:
                continue
            score = w[i] * min(dist(x[i], r) for r in refs)
            if score > best:
                best, best_i = score, i
        chosen.append(best_i)
        centres.append(x[best_i])
    return chosen


def radius_loop(x, centres, points):
    return max(min(dist(x[p], x[c]) for c in centres) for p in points)


def rarity_loop(reference, smoothing, power):
    k = len(reference[0])
    totals = [sum(row[j] for row in reference) for j in range(k)]
    grand = sum(totals)
    share = [t / grand for t in totals]
    raw = [(s + smoothing) ** -power for s in share]
    return [r / max(raw) for r in raw]


def random_probs(rng, shape):
    """Dirichlet class probabilities with the class axis first."""
    k = shape[0]
    flat = rng.dirichlet(np.ones(k), size=int(np.prod(shape[1:])))
    return np.moveaxis(flat.reshape(*shape[1:], k), -1, 0)


# -- per-pixel scores ----------------------------------------------------------------------


def test_pixel_scores_worked_example():
    # notes-checks.md "Active learning" (recomputed): p = (0.5, 0.3, 0.2)
    # gives H = 1.029653 nats, margin 0.2, least confidence 0.5.
    p = np.array([0.5, 0.3, 0.2])
    np.testing.assert_allclose(pixel_entropy(p), 1.029653, atol=1e-6)
    np.testing.assert_allclose(pixel_margin(p), 0.2, atol=1e-12)
    np.testing.assert_allclose(pixel_least_confidence(p), 0.5, atol=1e-12)


def test_pixel_bald_worked_examples():
    # BALD = H[mean_t p_t] - mean_t H[p_t] (Houlsby et al. 2011; Gal, Islam & Ghahramani
    # 2017); values from notes-checks.md (recomputed): ln 2 and 0.368064.
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
    assert MAP_CHANNELS == ("entropy", "margin", "least_confidence", "bald")
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


# -- per tile ------------------------------------------------------------------------------


def test_tile_uncertainty_hand_made():
    # pixel 0 is the worked example (0.5, 0.3, 0.2) of notes-checks.md; pixel 1 is certain
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
    # ln 2 (notes-checks.md, recomputed); their mean. Argmax of (0.5, 0.5) ties -> class 0.
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


# -- greedy k-centre -----------------------------------------------------------------------


def test_k_center_hand_made_line_with_ties():
    # points 0..10 on a line, 5 labelled: 0 and 10 are both 5 away -> the lower index first;
    # then 2, 3, 7, 8 are all 2 away -> 2 (worked by hand; lowest index breaks ties)
    x = np.arange(11, dtype=float)[:, None]
    np.testing.assert_array_equal(k_center_greedy(x, k=3, labelled=[5]), [0, 10, 2])
    assert kcentre_loop(x.tolist(), 3, labelled=[5]) == [0, 10, 2]


def test_k_center_no_labelled_starts_farthest_from_mean():
    # symmetric cross around the origin: the mean is (0, 0); four points tie at distance 1
    # -> index 0; then (1, 0) is 2 away from (-1, 0) -> index 1; then 2, 3 tie -> 2
    x = np.array([[-1, 0], [1, 0], [0, -1], [0, 1], [0, 0]], float)
    np.testing.assert_array_equal(k_center_greedy(x, k=5), [0, 1, 2, 3, 4])
    assert kcentre_loop(x.tolist(), 5) == [0, 1, 2, 3, 4]


def test_k_center_grid_ties_against_loop():
    # a shuffled 4 x 4 integer grid: many exact ties (float32 distances of small integers
    # are exact), so the tie rule is exercised on every step
    rng = np.random.default_rng(16)
    grid = np.array(list(itertools.product(range(4), range(4))), float)
    x = grid[rng.permutation(16)]
    labelled = [int(np.flatnonzero((x == [1, 1]).all(axis=1))[0])]
    got = k_center_greedy(x, k=8, labelled=labelled)
    assert got.tolist() == kcentre_loop(x.tolist(), 8, labelled=labelled)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_k_center_random_against_loop(seed):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(40, 5))
    weights = rng.uniform(0.2, 2.0, 40)
    lab = rng.choice(40, size=3, replace=False)
    cand = np.arange(0, 40, 2)
    for kwargs, ref_kwargs in [
        ({}, {}),
        ({"labelled": lab}, {"labelled": lab}),
        ({"labelled": lab, "weights": weights}, {"labelled": lab, "weights": weights}),
        ({"weights": weights, "candidates": cand}, {"weights": weights, "candidates": cand}),
    ]:
        got = k_center_greedy(x, k=6, **kwargs)
        ref = kcentre_loop(x.tolist(), 6, **ref_kwargs)
        assert got.tolist() == ref
        centres = [*ref_kwargs.get("labelled", []), *ref]
        # the covering radius of the chosen set equals the loop version's
        assert covering_radius(x, centres) == pytest.approx(
            radius_loop(x.tolist(), centres, range(40)), abs=1e-5
        )


@settings(max_examples=30, deadline=None)
@given(
    points=st.lists(
        st.tuples(st.integers(-4, 4), st.integers(-4, 4)), min_size=2, max_size=14
    ),
    k=st.integers(1, 6),
    data=st.data(),
)
def test_k_center_property_integer_points(points, k, data):
    # integer coordinates: exact float32 distances, so the indices must match the loop
    x = np.array(points, float)
    lab = data.draw(st.lists(st.integers(0, len(points) - 1), min_size=1, max_size=3))
    got = k_center_greedy(x, k=k, labelled=lab)
    ref = kcentre_loop(x.tolist(), k, labelled=lab)
    assert got.tolist() == ref
    assert len(got) == min(k, len(points) - len(set(lab)))


def test_k_center_within_twice_the_optimum():
    # Gonzalez (1985, Theor. Comput. Sci. 38: 293-306): farthest-first traversal covers
    # within twice the optimal k-centre radius, from any start. Brute force the optimum.
    for seed in range(4):
        rng = np.random.default_rng(100 + seed)
        x = rng.normal(size=(9, 2))
        for k in (2, 3):
            greedy = covering_radius(x, k_center_greedy(x, k=k))
            best = min(covering_radius(x, list(c)) for c in itertools.combinations(range(9), k))
            assert best <= greedy + 1e-9
            assert greedy <= 2 * best + 1e-6


def test_covering_radius_matches_sklearn():
    # oracle: sklearn.metrics.pairwise_distances (Euclidean)
    rng = np.random.default_rng(17)
    x = rng.normal(size=(30, 6)).astype(np.float32)
    centres = [3, 7, 21]
    expected = pairwise_distances(x.astype(np.float64), x[centres].astype(np.float64)).min(axis=1)
    assert covering_radius(x, centres) == pytest.approx(expected.max(), abs=1e-5)
    points = np.zeros(30, bool)
    points[:10] = True
    assert covering_radius(x, centres, points=points) == pytest.approx(
        expected[:10].max(), abs=1e-5
    )
    assert covering_radius(x, centres, points=[]) == 0.0
    with pytest.raises(ValueError, match="centres: expected at least one centre index"):
        covering_radius(x, [])


def test_k_center_weights_and_bounds():
    rng = np.random.default_rng(18)
    x = rng.normal(size=(25, 3))
    w = rng.uniform(0.5, 1.5, 25)
    # scaling every weight by the same factor changes nothing
    np.testing.assert_array_equal(
        k_center_greedy(x, k=5, weights=w), k_center_greedy(x, k=5, weights=3.0 * w)
    )
    # a weight-0 point comes only after every positive-weight point
    w0 = w.copy()
    w0[4] = 0.0
    assert 4 not in k_center_greedy(x, k=24, weights=w0).tolist()
    assert k_center_greedy(x, k=25, weights=w0)[-1] == 4
    # more k than candidates: all candidates, labelled never chosen even if listed
    got = k_center_greedy(x, k=50, labelled=[0, 1], candidates=[0, 2, 3])
    assert sorted(got.tolist()) == [2, 3]
    mask = np.zeros(25, bool)
    mask[[0, 1]] = True
    np.testing.assert_array_equal(
        k_center_greedy(x, k=4, labelled=mask), k_center_greedy(x, k=4, labelled=[1, 0])
    )
    assert k_center_greedy(x, k=3, candidates=[]).shape == (0,)


def test_k_center_errors():
    x = np.zeros((4, 2))
    with pytest.raises(ValueError, match="k: expected an integer >= 1, got 0"):
        k_center_greedy(x, k=0)
    with pytest.raises(TypeError, match="k: expected an integer"):
        k_center_greedy(x, k=2.5)
    with pytest.raises(TypeError, match="k: expected an integer"):
        k_center_greedy(x, k=True)
    bad = x.copy()
    bad[2, 1] = np.nan
    with pytest.raises(ValueError, match=r"features: expected finite embeddings.*first \[2\]"):
        k_center_greedy(bad, k=1)
    with pytest.raises(ValueError, match=r"features: expected embeddings of shape \(N, D\)"):
        k_center_greedy(np.zeros(4), k=1)
    with pytest.raises(ValueError, match="features: expected real numbers"):
        k_center_greedy(np.array([["a", "b"]]), k=1)
    with pytest.raises(ValueError, match=r"weights: expected shape \(4,\)"):
        k_center_greedy(x, k=1, weights=np.ones(3))
    with pytest.raises(ValueError, match="weights: expected values >= 0"):
        k_center_greedy(x, k=1, weights=-np.ones(4))
    with pytest.raises(ValueError, match="weights: expected finite values"):
        k_center_greedy(x, k=1, weights=np.array([1.0, np.nan, 1.0, 1.0]))
    with pytest.raises(ValueError, match="labelled: expected row indices in 0..3"):
        k_center_greedy(x, k=1, labelled=[4])
    with pytest.raises(ValueError, match=r"labelled: expected a boolean mask of shape \(4,\)"):
        k_center_greedy(x, k=1, labelled=np.zeros(3, bool))
    with pytest.raises(ValueError, match="candidates: expected a 1-D array of row indices"):
        k_center_greedy(x, k=1, candidates=np.array([0.5]))


# -- candidate pools -----------------------------------------------------------------------


def make_pool(rng, n=30, d=4, k_classes=4, **overrides):
    fields = {
        "ids": [f"plot-b{i:03d}" for i in range(n)],
        "embeddings": rng.normal(size=(n, d)),
        "entropy": rng.uniform(0.0, 1.3, n),
        "margin": rng.uniform(0.0, 1.0, n),
        "least_confidence": rng.uniform(0.0, 0.7, n),
        "bald": rng.uniform(0.0, 0.3, n),
        "class_fractions": rng.dirichlet([6.0, 3.0, 1.0, 0.3][:k_classes], n),
    }
    fields.update(overrides)
    return CandidatePool(**fields)


def test_pool_from_tiles():
    rng = np.random.default_rng(19)
    probs = [random_probs(rng, (4, 3, 3)) for _ in range(3)]
    tiles = [tile_uncertainty(p) for p in probs]
    pool = CandidatePool.from_tiles(["a", "b", "c"], rng.normal(size=(3, 2)), tiles)
    assert len(pool) == 3 and pool.embeddings.dtype == np.float32
    assert pool.ids.tolist() == ["a", "b", "c"]
    mixed_ids = CandidatePool.from_tiles([7, "b", (1, 2)], rng.normal(size=(3, 2)), tiles)
    assert mixed_ids.ids.tolist() == [7, "b", (1, 2)]  # kept as given, not turned into text
    np.testing.assert_allclose(pool.entropy, [t.entropy for t in tiles])
    assert np.isnan(pool.bald).all() and not pool.labelled.any()
    with pytest.raises(ValueError, match="tiles: expected 2 TileUncertainty like ids"):
        CandidatePool.from_tiles(["a", "b"], rng.normal(size=(2, 2)), tiles)


def test_pool_errors():
    rng = np.random.default_rng(20)
    n = 5
    with pytest.raises(ValueError, match="pool.embeddings: expected 5 rows like pool.ids"):
        make_pool(rng, n, embeddings=np.zeros((4, 3)))
    with pytest.raises(ValueError, match=r"pool.entropy: expected shape \(5,\)"):
        make_pool(rng, n, entropy=np.zeros(4))
    with pytest.raises(ValueError, match="pool.class_fractions: expected 5 rows"):
        make_pool(rng, n, class_fractions=np.full((3, 4), 0.25))
    with pytest.raises(ValueError, match="pool.ids: expected unique tile ids"):
        make_pool(rng, n, ids=["a", "b", "a", "c", "d"])
    emb = np.zeros((n, 3))
    emb[1, 0] = np.nan
    with pytest.raises(ValueError, match="pool.embeddings: expected finite embeddings"):
        make_pool(rng, n, embeddings=emb)
    with pytest.raises(ValueError, match="pool.entropy: expected finite values"):
        make_pool(rng, n, entropy=np.array([0.1, np.nan, 0.2, 0.3, 0.4]))
    with pytest.raises(ValueError, match=r"pool.margin: expected values in \[0, 1\]"):
        make_pool(rng, n, margin=np.full(n, 1.5))
    with pytest.raises(ValueError, match="pool.bald: expected values >= 0 or NaN"):
        make_pool(rng, n, bald=np.full(n, -0.1))
    with pytest.raises(ValueError, match="pool.annotators: expected 5 integer counts"):
        make_pool(rng, n, annotators=np.full(n, 1.0))
    with pytest.raises(ValueError, match="pool.agreement: expected NaN for tiles with fewer"):
        make_pool(rng, n, annotators=np.ones(n, int), agreement=np.full(n, 0.5))
    with pytest.raises(ValueError, match="pool.agreement: expected kappa or IoU values"):
        make_pool(rng, n, annotators=np.full(n, 2), agreement=np.full(n, 3.0))


# -- batch selection -----------------------------------------------------------------------


def test_strategy_names():
    assert STRATEGIES == SETTINGS_STRATEGIES == (
        "random", "entropy", "margin", "bald", "coreset", "mixed",
    )
    assert REASONS == ("uncertain", "rare class", "unlike labelled tiles", "annotators disagree")


def test_select_batch_errors():
    rng = np.random.default_rng(21)
    pool = make_pool(rng, 6)
    with pytest.raises(ValueError, match="strategy: expected one of random, entropy"):
        select_batch(pool, strategy="greedy", k=2)
    with pytest.raises(ValueError, match="k: expected an integer >= 1, got 0"):
        select_batch(pool, k=0)
    with pytest.raises(ValueError, match="uncertainty: expected one of entropy"):
        select_batch(pool, k=2, uncertainty="variance")
    with pytest.raises(ValueError, match="top_m: expected an integer >= 1"):
        select_batch(pool, k=2, top_m=0)
    with pytest.raises(ValueError, match="agreement_threshold: expected a finite number"):
        select_batch(pool, k=2, agreement_threshold=math.nan)
    with pytest.raises(TypeError, match="pool: expected a CandidatePool"):
        select_batch({"ids": []}, k=2)
    no_bald = make_pool(rng, 6, bald=None)
    with pytest.raises(ValueError, match="pool.bald: NaN for 6 candidate tile"):
        select_batch(no_bald, strategy="bald", k=2)
    with pytest.raises(ValueError, match="BALD needs MC-dropout samples"):
        select_batch(no_bald, strategy="mixed", k=2, uncertainty="bald")


@pytest.mark.parametrize("strategy", ["entropy", "margin", "bald"])
def test_uncertainty_strategies_rank_like_a_sort(strategy):
    rng = np.random.default_rng(22)
    scores = {
        "entropy": rng.uniform(0.0, 1.3, 20),
        "margin": rng.uniform(0.0, 1.0, 20),
        "bald": rng.uniform(0.0, 0.3, 20),
    }
    for values in scores.values():  # ties on purpose: rows 6 and 9, so row 6 comes first
        values[9] = values[6]
    pool = make_pool(rng, 20, annotators=np.r_[np.ones(4, int), np.zeros(16, int)], **scores)
    with pytest.raises(ValueError, match="read-only"):
        pool.entropy[0] = 0.0
    sel = select_batch(pool, strategy=strategy, k=5)
    value = {"entropy": pool.entropy, "margin": 1.0 - pool.margin, "bald": pool.bald}[strategy]
    expected = sorted(range(4, 20), key=lambda i: (-value[i], i))
    assert sel.positions.tolist() == expected
    assert sel.n_chosen == 5 and sel.chosen.tolist() == [pool.ids[i] for i in expected[:5]]
    np.testing.assert_allclose(sel.scores, value[expected])
    assert set(sel.reasons) == {"uncertain"}
    if strategy == "margin":  # smallest margin first
        assert pool.margin[sel.positions[0]] == pool.margin[4:].min()


def test_random_strategy_is_a_seeded_permutation():
    rng = np.random.default_rng(23)
    pool = make_pool(rng, 15, annotators=np.r_[np.zeros(10, int), np.ones(5, int)])
    a = select_batch(pool, strategy="random", k=4, seed=7)
    b = select_batch(pool, strategy="random", k=4, seed=7)
    c = select_batch(pool, strategy="random", k=4, seed=8)
    np.testing.assert_array_equal(a.positions, np.random.default_rng(7).permutation(10))
    np.testing.assert_array_equal(a.positions, b.positions)
    assert a.positions.tolist() != c.positions.tolist()
    assert set(a.reasons) <= {"uncertain", "rare class"}


def test_coreset_strategy_against_loop():
    rng = np.random.default_rng(24)
    n = 24
    ann = np.zeros(n, int)
    ann[[2, 11, 17]] = 1
    pool = make_pool(rng, n, annotators=ann)
    sel = select_batch(pool, strategy="coreset", k=5)
    x = pool.embeddings.astype(np.float64).tolist()
    chosen = kcentre_loop(x, 5, labelled=[2, 11, 17])
    assert sel.positions[:5].tolist() == chosen
    centres = [2, 11, 17, *chosen]
    rest = [i for i in range(n) if i not in centres]
    near = {i: min(dist(x[i], x[c]) for c in centres) for i in rest}
    assert sel.positions[5:].tolist() == sorted(rest, key=lambda i: (-near[i], i))
    np.testing.assert_allclose(sel.scores[5:], [near[i] for i in sel.positions[5:]], atol=1e-5)
    assert set(sel.reasons) == {"unlike labelled tiles"}


def mixed_loop(pool, k, top_m):
    """Mixed strategy written out: rarity from the labelled set, top-M, weighted k-centre."""
    n = len(pool)
    lab = [i for i in range(n) if pool.annotators[i] > 0]
    unl = [i for i in range(n) if pool.annotators[i] == 0]
    ref = [pool.class_fractions[i].tolist() for i in (lab or unl)]
    rho = rarity_loop(ref, 0.01, 1.0)
    weight = [0.0] * n
    for i in unl:
        weight[i] = pool.entropy[i] * (1 + sum(f * r for f, r in zip(pool.class_fractions[i], rho, strict=True)))
    by_weight = sorted(unl, key=lambda i: (-weight[i], i))
    pre = by_weight[:top_m]
    chosen = kcentre_loop(pool.embeddings.tolist(), k, labelled=lab, candidates=pre, weights=weight)
    return chosen + [i for i in by_weight if i not in chosen], weight


@pytest.mark.parametrize("n_labelled", [0, 4])
def test_mixed_strategy_against_loop(n_labelled):
    rng = np.random.default_rng(25 + n_labelled)
    n = 40
    ann = np.zeros(n, int)
    ann[rng.choice(n, n_labelled, replace=False)] = 1
    pool = make_pool(rng, n, annotators=ann)
    sel = select_batch(pool, strategy="mixed", k=4, top_m=12)
    order, weight = mixed_loop(pool, 4, 12)
    assert sel.positions.tolist() == order
    np.testing.assert_allclose(sel.scores, [weight[i] for i in order], atol=1e-12)
    assert set(sel.reasons) <= set(REASONS[:3])
    # default top-M is max(3k, ceil(n/10)) = 12 here
    assert select_batch(pool, k=4).positions.tolist() == order


def test_mixed_with_equal_weights_is_coreset():
    # equal uncertainty and fractions make every weight equal: mixed over the whole pool
    # must reduce to the plain core-set batch
    rng = np.random.default_rng(27)
    n = 20
    pool = make_pool(
        rng, n, entropy=np.full(n, 0.4), class_fractions=np.tile([0.7, 0.2, 0.1, 0.0], (n, 1)),
        annotators=np.r_[np.ones(3, int), np.zeros(n - 3, int)],
    )
    mixed = select_batch(pool, strategy="mixed", k=6, top_m=n)
    core = select_batch(pool, strategy="coreset", k=6)
    np.testing.assert_array_equal(mixed.chosen, core.chosen)


def test_mixed_reasons_hand_made():
    # labelled soil tile at the origin; A: very uncertain soil tile near it; B: all-symptom
    # tile near it (symptom absent from the labelled set -> rarity weight 2); C: a soil
    # tile far away; five less uncertain soil fillers about 0.05 from the origin. Weighted
    # k-centre picks C (weight 0.1 x distance 70.7), then A (1.0 x 0.1), then B
    # (0.2 x 0.07) over the fillers (0.1 x 0.05). Ratios to the medians (worked by hand):
    # A uncertainty 10, distance 2; B rarity 1.98, distance 1.4; C distance ~1400.
    soil, symptom = [1.0, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 1.0]
    emb = [[0, 0], [0.1, 0], [0, 0.07], [50, 50], [0.05, 0], [-0.05, 0], [0, -0.05],
           [0.035, 0.035], [-0.035, -0.035]]
    n = len(emb)
    pool = CandidatePool(
        ids=["lab", "A", "B", "C", "f1", "f2", "f3", "f4", "f5"],
        embeddings=np.array(emb),
        entropy=np.array([0.0, 1.0, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1]),
        margin=np.full(n, 0.5),
        least_confidence=np.full(n, 0.3),
        class_fractions=np.array([soil, soil, symptom, soil] + [soil] * 5),
        annotators=np.r_[1, np.zeros(n - 1, int)],
    )
    sel = select_batch(pool, strategy="mixed", k=3, top_m=8)
    assert sel.chosen.tolist() == ["C", "A", "B"]
    assert sel.reasons[:3] == ("unlike labelled tiles", "uncertain", "rare class")
    assert "lab" not in sel.ids.tolist() and len(sel) == 8


def test_contested_tiles_come_first_and_single_annotator_tiles_are_out():
    rng = np.random.default_rng(28)
    n = 12
    ann = np.array([1, 2, 2, 2, 2, 0, 0, 0, 0, 0, 0, 0])
    agr = np.array([np.nan, 0.9, 0.2, -0.1, np.nan, *[np.nan] * 7])
    pool = make_pool(rng, n, annotators=ann, agreement=agr)
    for strategy in STRATEGIES:
        sel = select_batch(pool, strategy=strategy, k=3, agreement_threshold=0.6)
        # row 3 (kappa -0.1) disagrees most, then row 2; row 1 agrees, row 4 unknown,
        # row 0 has a single annotator: none of those three is a candidate
        assert sel.positions[:2].tolist() == [3, 2]
        np.testing.assert_allclose(sel.scores[:2], [1.1, 0.8], atol=1e-12)
        assert sel.reasons[:2] == ("annotators disagree", "annotators disagree")
        assert sorted(sel.positions[2:].tolist()) == list(range(5, 12))
        assert sel.n_chosen == 3
        assert all(r in REASONS for r in sel.reasons)
    # contested tiles beyond k still rank ahead; the batch is all review
    sel = select_batch(pool, strategy="entropy", k=1)
    assert sel.chosen.tolist() == [pool.ids[3]] and sel.positions[1] == 2
    # left out on request
    sel = select_batch(pool, strategy="entropy", k=3, include_contested=False)
    assert sorted(sel.positions.tolist()) == list(range(5, 12))


def test_select_batch_small_and_empty_pools():
    rng = np.random.default_rng(29)
    done = make_pool(rng, 4, annotators=np.ones(4, int))
    for strategy in STRATEGIES:
        sel = select_batch(done, strategy=strategy, k=3)
        assert isinstance(sel, Selection) and len(sel) == 0 and sel.n_chosen == 0
        assert sel.chosen.shape == (0,)
    few = make_pool(rng, 3)
    for strategy in STRATEGIES:
        sel = select_batch(few, strategy=strategy, k=10)
        assert sel.n_chosen == 3 and sorted(sel.positions.tolist()) == [0, 1, 2]
    rows = select_batch(few, strategy="entropy", k=1).rows()
    assert rows[0][0] == few.ids[int(np.argmax(few.entropy))] and rows[0][2] == "uncertain"


@settings(max_examples=25, deadline=None)
@given(
    n=st.integers(1, 25),
    k=st.integers(1, 8),
    strategy=st.sampled_from(STRATEGIES),
    seed=st.integers(0, 2**16),
)
def test_select_batch_properties(n, k, strategy, seed):
    rng = np.random.default_rng(seed)
    ann = rng.choice([0, 0, 0, 1, 2], size=n)
    agr = np.where(ann >= 2, rng.uniform(-0.2, 1.0, n), np.nan)
    pool = make_pool(rng, n, annotators=ann, agreement=agr)
    sel = select_batch(pool, strategy=strategy, k=k, seed=seed)
    contested = [i for i in range(n) if ann[i] >= 2 and agr[i] < 0.6]
    unl = [i for i in range(n) if ann[i] == 0]
    # a permutation of the candidates, contested first, batch = min(k, n)
    assert sorted(sel.positions.tolist()) == sorted(contested + unl)
    assert sorted(sel.positions[: len(contested)].tolist()) == contested
    assert sel.n_chosen == min(k, len(contested) + len(unl))
    assert len(sel.reasons) == len(sel) == sel.scores.shape[0]
    assert all(r in REASONS for r in sel.reasons)
    assert np.isfinite(sel.scores).all()
    again = select_batch(pool, strategy=strategy, k=k, seed=seed)
    np.testing.assert_array_equal(sel.positions, again.positions)
