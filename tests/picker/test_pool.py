"""The picker's input, labeler/picker/pool.py: building and checking a CandidatePool."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.picker import CandidatePool, tile_uncertainty
from tests.picker.references import make_pool, random_probs


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
