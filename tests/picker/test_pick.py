"""Picking a batch with labeler/picker/pick.py: strategies, reasons, contested tiles.

Each strategy is written out as a slow loop (sort, greedy k-center of Sener & Savarese
2018, the mixed weighting) and compared with pick_batch; hand-made pools check the
reasons; hypothesis checks the invariants of every strategy.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labeler.picker import (
    REASONS,
    STRATEGIES,
    CandidatePool,
    Pick,
    pick_batch,
)
from labeler.settings import STRATEGIES as SETTINGS_STRATEGIES
from tests.picker.references import dist, k_center_loop, make_pool, rarity_loop


def test_strategy_names():
    assert STRATEGIES == SETTINGS_STRATEGIES == (
        "random", "entropy", "margin", "bald", "coreset", "mixed",
    )
    assert REASONS == (
        "uncertain", "rare class", "unlike labelled tiles", "annotators disagree",
        "unlike the other picks",
    )


def test_pick_batch_errors():
    rng = np.random.default_rng(21)
    pool = make_pool(rng, 6)
    with pytest.raises(ValueError, match="strategy: expected one of random, entropy"):
        pick_batch(pool, strategy="greedy", k=2)
    with pytest.raises(ValueError, match="k: expected an integer >= 1, got 0"):
        pick_batch(pool, k=0)
    with pytest.raises(ValueError, match="uncertainty: expected one of entropy"):
        pick_batch(pool, k=2, uncertainty="variance")
    with pytest.raises(ValueError, match="top_m: expected an integer >= 1"):
        pick_batch(pool, k=2, top_m=0)
    with pytest.raises(ValueError, match="agreement_threshold: expected a finite number"):
        pick_batch(pool, k=2, agreement_threshold=math.nan)
    with pytest.raises(TypeError, match="pool: expected a CandidatePool"):
        pick_batch({"ids": []}, k=2)
    no_bald = make_pool(rng, 6, bald=None)
    with pytest.raises(ValueError, match="pool.bald: NaN for 6 candidate tile"):
        pick_batch(no_bald, strategy="bald", k=2)
    with pytest.raises(ValueError, match="BALD needs MC-dropout samples"):
        pick_batch(no_bald, strategy="mixed", k=2, uncertainty="bald")


@pytest.mark.parametrize("strategy", ["entropy", "margin", "bald"])
def test_uncertainty_strategies_order_like_a_sort(strategy):
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
    pick = pick_batch(pool, strategy=strategy, k=5)
    value = {"entropy": pool.entropy, "margin": 1.0 - pool.margin, "bald": pool.bald}[strategy]
    expected = sorted(range(4, 20), key=lambda i: (-value[i], i))
    assert pick.positions.tolist() == expected
    assert pick.n_chosen == 5 and pick.chosen.tolist() == [pool.ids[i] for i in expected[:5]]
    np.testing.assert_allclose(pick.scores, value[expected])
    assert set(pick.reasons) == {"uncertain"}
    if strategy == "margin":  # smallest margin first
        assert pool.margin[pick.positions[0]] == pool.margin[4:].min()


def test_random_strategy_is_a_seeded_permutation():
    rng = np.random.default_rng(23)
    pool = make_pool(rng, 15, annotators=np.r_[np.zeros(10, int), np.ones(5, int)])
    a = pick_batch(pool, strategy="random", k=4, seed=7)
    b = pick_batch(pool, strategy="random", k=4, seed=7)
    c = pick_batch(pool, strategy="random", k=4, seed=8)
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
    pick = pick_batch(pool, strategy="coreset", k=5)
    x = pool.embeddings.astype(np.float64).tolist()
    chosen = k_center_loop(x, 5, labelled=[2, 11, 17])
    assert pick.positions[:5].tolist() == chosen
    centers = [2, 11, 17, *chosen]
    rest = [i for i in range(n) if i not in centers]
    near = {i: min(dist(x[i], x[c]) for c in centers) for i in rest}
    assert pick.positions[5:].tolist() == sorted(rest, key=lambda i: (-near[i], i))
    np.testing.assert_allclose(pick.scores[5:], [near[i] for i in pick.positions[5:]], atol=1e-5)
    assert set(pick.reasons) == {"unlike labelled tiles"}
    # with nothing labelled there is no labelled tile to be unlike
    cold = make_pool(np.random.default_rng(3), n, annotators=np.zeros(n, int))
    for strategy in ("coreset", "mixed"):
        reasons = set(pick_batch(cold, strategy=strategy, k=5).reasons)
        assert "unlike labelled tiles" not in reasons, strategy
    assert set(pick_batch(cold, strategy="coreset", k=5).reasons) == {"unlike the other picks"}


def mixed_loop(pool, k, top_m):
    """Mixed strategy written out: rarity from the labelled set, top-M, weighted k-center."""
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
    chosen = k_center_loop(pool.embeddings.tolist(), k, labelled=lab, candidates=pre, weights=weight)
    return chosen + [i for i in by_weight if i not in chosen], weight


@pytest.mark.parametrize("n_labelled", [0, 4])
def test_mixed_strategy_against_loop(n_labelled):
    rng = np.random.default_rng(25 + n_labelled)
    n = 40
    ann = np.zeros(n, int)
    ann[rng.choice(n, n_labelled, replace=False)] = 1
    pool = make_pool(rng, n, annotators=ann)
    pick = pick_batch(pool, strategy="mixed", k=4, top_m=12)
    order, weight = mixed_loop(pool, 4, 12)
    assert pick.positions.tolist() == order
    np.testing.assert_allclose(pick.scores, [weight[i] for i in order], atol=1e-12)
    allowed = {"uncertain", "rare class"}
    allowed.add("unlike labelled tiles" if n_labelled else "unlike the other picks")
    assert set(pick.reasons) <= allowed
    # default top-M is max(3k, ceil(n/10)) = 12 here
    assert pick_batch(pool, k=4).positions.tolist() == order


def test_mixed_with_equal_weights_is_coreset():
    # equal uncertainty and fractions make every weight equal: mixed over the whole pool
    # must reduce to the plain core-set batch
    rng = np.random.default_rng(27)
    n = 20
    pool = make_pool(
        rng, n, entropy=np.full(n, 0.4), class_fractions=np.tile([0.7, 0.2, 0.1, 0.0], (n, 1)),
        annotators=np.r_[np.ones(3, int), np.zeros(n - 3, int)],
    )
    mixed = pick_batch(pool, strategy="mixed", k=6, top_m=n)
    core = pick_batch(pool, strategy="coreset", k=6)
    np.testing.assert_array_equal(mixed.chosen, core.chosen)


def test_mixed_reasons_hand_made():
    # labelled soil tile at the origin; A: very uncertain soil tile near it; B: all-symptom
    # tile near it (symptom absent from the labelled set -> rarity weight 2); C: a soil
    # tile far away; five less uncertain soil fillers about 0.05 from the origin. Weighted
    # k-center picks C (weight 0.1 x distance 70.7), then A (1.0 x 0.1), then B
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
    pick = pick_batch(pool, strategy="mixed", k=3, top_m=8)
    assert pick.chosen.tolist() == ["C", "A", "B"]
    assert pick.reasons[:3] == ("unlike labelled tiles", "uncertain", "rare class")
    assert "lab" not in pick.ids.tolist() and len(pick) == 8


def test_contested_tiles_come_first_and_single_annotator_tiles_are_out():
    rng = np.random.default_rng(28)
    n = 12
    ann = np.array([1, 2, 2, 2, 2, 0, 0, 0, 0, 0, 0, 0])
    agr = np.array([np.nan, 0.9, 0.2, -0.1, np.nan, *[np.nan] * 7])
    pool = make_pool(rng, n, annotators=ann, agreement=agr)
    for strategy in STRATEGIES:
        pick = pick_batch(pool, strategy=strategy, k=3, agreement_threshold=0.6)
        # row 3 (kappa -0.1) disagrees most, then row 2; row 1 agrees, row 4 unknown,
        # row 0 has a single annotator: none of those three is a candidate
        assert pick.positions[:2].tolist() == [3, 2]
        np.testing.assert_allclose(pick.scores[:2], [1.1, 0.8], atol=1e-12)
        assert pick.reasons[:2] == ("annotators disagree", "annotators disagree")
        assert sorted(pick.positions[2:].tolist()) == list(range(5, 12))
        assert pick.n_chosen == 3
        assert all(r in REASONS for r in pick.reasons)
    # contested tiles beyond k still come first; the batch is all review
    pick = pick_batch(pool, strategy="entropy", k=1)
    assert pick.chosen.tolist() == [pool.ids[3]] and pick.positions[1] == 2
    # left out on request
    pick = pick_batch(pool, strategy="entropy", k=3, include_contested=False)
    assert sorted(pick.positions.tolist()) == list(range(5, 12))


def test_pick_batch_small_and_empty_pools():
    rng = np.random.default_rng(29)
    done = make_pool(rng, 4, annotators=np.ones(4, int))
    for strategy in STRATEGIES:
        pick = pick_batch(done, strategy=strategy, k=3)
        assert isinstance(pick, Pick) and len(pick) == 0 and pick.n_chosen == 0
        assert pick.chosen.shape == (0,)
    few = make_pool(rng, 3)
    for strategy in STRATEGIES:
        pick = pick_batch(few, strategy=strategy, k=10)
        assert pick.n_chosen == 3 and sorted(pick.positions.tolist()) == [0, 1, 2]
    rows = pick_batch(few, strategy="entropy", k=1).rows()
    assert rows[0][0] == few.ids[int(np.argmax(few.entropy))] and rows[0][2] == "uncertain"


@settings(max_examples=25, deadline=None)
@given(
    n=st.integers(1, 25),
    k=st.integers(1, 8),
    strategy=st.sampled_from(STRATEGIES),
    seed=st.integers(0, 2**16),
)
def test_pick_batch_properties(n, k, strategy, seed):
    rng = np.random.default_rng(seed)
    ann = rng.choice([0, 0, 0, 1, 2], size=n)
    agr = np.where(ann >= 2, rng.uniform(-0.2, 1.0, n), np.nan)
    pool = make_pool(rng, n, annotators=ann, agreement=agr)
    pick = pick_batch(pool, strategy=strategy, k=k, seed=seed)
    contested = [i for i in range(n) if ann[i] >= 2 and agr[i] < 0.6]
    unl = [i for i in range(n) if ann[i] == 0]
    # a permutation of the candidates, contested first, batch = min(k, n)
    assert sorted(pick.positions.tolist()) == sorted(contested + unl)
    assert sorted(pick.positions[: len(contested)].tolist()) == contested
    assert pick.n_chosen == min(k, len(contested) + len(unl))
    assert len(pick.reasons) == len(pick) == pick.scores.shape[0]
    assert all(r in REASONS for r in pick.reasons)
    assert np.isfinite(pick.scores).all()
    again = pick_batch(pool, strategy=strategy, k=k, seed=seed)
    np.testing.assert_array_equal(pick.positions, again.positions)
