"""Greedy k-center of labeler/picker/coreset.py (Sener & Savarese 2018).

Hand-made ties, a slow loop reference, Gonzalez's (1985) factor-2 bound against a brute
force optimum, and sklearn.metrics.pairwise_distances as the oracle of the covering radius.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import pairwise_distances

from labeler.picker import covering_radius, k_center_greedy
from tests.picker.references import k_center_loop, radius_loop


def test_k_center_hand_made_line_with_ties():
    # points 0..10 on a line, 5 labelled: 0 and 10 are both 5 away -> the lower index first;
    # then 2, 3, 7, 8 are all 2 away -> 2 (worked by hand; lowest index breaks ties)
    x = np.arange(11, dtype=float)[:, None]
    np.testing.assert_array_equal(k_center_greedy(x, k=3, labelled=[5]), [0, 10, 2])
    assert k_center_loop(x.tolist(), 3, labelled=[5]) == [0, 10, 2]


def test_k_center_no_labelled_starts_farthest_from_mean():
    # symmetric cross around the origin: the mean is (0, 0); four points tie at distance 1
    # -> index 0; then (1, 0) is 2 away from (-1, 0) -> index 1; then 2, 3 tie -> 2
    x = np.array([[-1, 0], [1, 0], [0, -1], [0, 1], [0, 0]], float)
    np.testing.assert_array_equal(k_center_greedy(x, k=5), [0, 1, 2, 3, 4])
    assert k_center_loop(x.tolist(), 5) == [0, 1, 2, 3, 4]


def test_k_center_grid_ties_against_loop():
    # a shuffled 4 x 4 integer grid: many exact ties (float32 distances of small integers
    # are exact), so the tie rule is exercised on every step
    rng = np.random.default_rng(16)
    grid = np.array(list(itertools.product(range(4), range(4))), float)
    x = grid[rng.permutation(16)]
    labelled = [int(np.flatnonzero((x == [1, 1]).all(axis=1))[0])]
    got = k_center_greedy(x, k=8, labelled=labelled)
    assert got.tolist() == k_center_loop(x.tolist(), 8, labelled=labelled)


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
        ref = k_center_loop(x.tolist(), 6, **ref_kwargs)
        assert got.tolist() == ref
        centers = [*ref_kwargs.get("labelled", []), *ref]
        # the covering radius of the chosen set equals the loop version's
        assert covering_radius(x, centers) == pytest.approx(
            radius_loop(x.tolist(), centers, range(40)), abs=1e-5
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
    ref = k_center_loop(x.tolist(), k, labelled=lab)
    assert got.tolist() == ref
    assert len(got) == min(k, len(points) - len(set(lab)))


def test_k_center_within_twice_the_optimum():
    # Gonzalez (1985, Theor. Comput. Sci. 38: 293-306): farthest-first traversal covers
    # within twice the optimal k-center radius, from any start. Brute force the optimum.
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
    centers = [3, 7, 21]
    expected = pairwise_distances(x.astype(np.float64), x[centers].astype(np.float64)).min(axis=1)
    assert covering_radius(x, centers) == pytest.approx(expected.max(), abs=1e-5)
    points = np.zeros(30, bool)
    points[:10] = True
    assert covering_radius(x, centers, points=points) == pytest.approx(
        expected[:10].max(), abs=1e-5
    )
    assert covering_radius(x, centers, points=[]) == 0.0
    with pytest.raises(ValueError, match="centers: expected at least one center index"):
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
