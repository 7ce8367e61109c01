"""Smoke test of benchmarks/label_efficiency.py: the core loop on a tiny synthetic pool,
and the share-to-95 % interpolation against hand-made curves with exact answers."""

from __future__ import annotations

import importlib.util
import math
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labeler.model.encoder import feature_shapes
from labeler.model.runtime import configure_threads
from labeler.settings import ModelSettings
from tests.common import REPO


def _load_bench():
    name = "label_efficiency_bench"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, REPO / "benchmarks" / "label_efficiency.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


bench = _load_bench()


# -- share to target: hand-made curves ------------------------------------------------------------
# Linear interpolation between rounds: common practice, no source; the answers are worked
# by hand.
SHARES = [0.05, 0.10, 0.20]
MIOUS = [0.5, 0.7, 0.9]


def test_share_between_rounds_is_interpolated():
    # target 0.8 lies halfway from 0.7 (share 0.10) to 0.9 (share 0.20): share 0.15
    assert bench.share_to_target(SHARES, MIOUS, 0.8) == pytest.approx(0.15, abs=1e-12)
    # a quarter of the way from 0.5 to 0.7: 0.05 + 0.25 * 0.05 = 0.0625
    assert bench.share_to_target(SHARES, MIOUS, 0.55) == pytest.approx(0.0625, abs=1e-12)


def test_share_exactly_on_a_round():
    assert bench.share_to_target(SHARES, MIOUS, 0.7) == pytest.approx(0.10, abs=1e-12)
    assert bench.share_to_target(SHARES, MIOUS, 0.9) == pytest.approx(0.20, abs=1e-12)


def test_share_when_round_zero_already_reaches():
    assert bench.share_to_target(SHARES, MIOUS, 0.4) == 0.05


def test_share_never_reached_is_none():
    assert bench.share_to_target(SHARES, MIOUS, 0.95) is None
    assert bench.share_to_target(SHARES, MIOUS, math.nan) is None
    assert bench.share_to_target([], [], 0.5) is None


def test_first_crossing_counts_after_a_dip():
    # up to 0.9 at share 0.10, then down: the first crossing of 0.8 is
    # 0.05 + (0.8 - 0.5) / (0.9 - 0.5) * 0.05 = 0.0875
    got = bench.share_to_target(SHARES, [0.5, 0.9, 0.6], 0.8)
    assert got == pytest.approx(0.0875, abs=1e-12)


def test_nan_rounds_do_not_count():
    # round 1 is NaN: the curve reaches 0.8 only at round 2, with no finite point before
    assert bench.share_to_target(SHARES, [0.5, math.nan, 0.9], 0.8) == 0.20


def test_share_errors():
    with pytest.raises(ValueError, match="mious: expected one value per share"):
        bench.share_to_target(SHARES, [0.5, 0.7], 0.6)
    with pytest.raises(ValueError, match="shares: expected strictly increasing"):
        bench.share_to_target([0.1, 0.1, 0.2], MIOUS, 0.6)


def _loop_reference(shares, mious, target):
    """Slow reference: walk the polyline in 10 001 steps per segment."""
    if mious[0] >= target:
        return shares[0]
    for r in range(1, len(shares)):
        for j in range(10_001):
            t = j / 10_000
            if mious[r - 1] + t * (mious[r] - mious[r - 1]) >= target:
                return shares[r - 1] + t * (shares[r] - shares[r - 1])
    return None


@settings(max_examples=40, deadline=None)
@given(
    st.lists(st.floats(0.0, 1.0), min_size=1, max_size=6),
    st.floats(0.0, 1.0),
)
def test_share_matches_a_slow_walk(values, target):
    shares = [0.03 + 0.1 * i for i in range(len(values))]
    got = bench.share_to_target(shares, values, target)
    want = _loop_reference(shares, values, target)
    if want is None:
        assert got is None
    else:
        # the walk steps 1e-4 of a segment of width 0.1
        assert got is not None
        np.testing.assert_allclose(got, want, atol=2e-5)


def test_savings_and_round_sizes():
    assert bench.savings_pct(0.15, 0.20) == pytest.approx(25.0, abs=1e-12)
    assert bench.savings_pct(None, 0.20) is None
    assert bench.savings_pct(0.15, None) is None
    assert bench.round_sizes(10, n_initial=3, k=4, rounds=3) == [3, 7, 10]
    assert bench.round_sizes(10, n_initial=3, k=4, rounds=0) == [3]
    with pytest.raises(ValueError, match="n_initial: expected 1..10"):
        bench.round_sizes(10, n_initial=11, k=4, rounds=1)
    with pytest.raises(ValueError, match="k: expected at least 1"):
        bench.round_sizes(10, n_initial=3, k=0, rounds=1)


# -- the core loop on a tiny synthetic pool -------------------------------------------------------
def _synthetic_tiles(n: int, seed: int, prefix: str):
    """Random 64 x 64 tiles whose class is written into the features (learnable)."""
    rng = np.random.default_rng(seed)
    keys, feats, masks, images = [], [], [], []
    for i in range(n):
        mask = np.zeros((64, 64), np.uint8)
        r, c = rng.integers(0, 32, size=2)
        mask[r : r + 32, c : c + 32] = 1 + i % 2
        levels = []
        for ch, h, w in feature_shapes(64, 64):
            f = rng.normal(0, 0.1, (ch, h, w)).astype(np.float32)
            small = mask[:: 64 // h, :: 64 // w][:h, :w]
            f[0] += small == 1
            f[1] += small == 2
            levels.append(f.astype(np.float16))
        keys.append(f"{prefix}/{i}")
        feats.append(tuple(levels))
        masks.append(mask)
        images.append(rng.integers(0, 256, (64, 64, 3), dtype=np.uint8))
    return bench.TileSet(keys, feats, masks, images)


@pytest.fixture
def one_thread():
    """One torch thread (as the benchmark runs): two threads on a loaded two-core machine
    were about ten times slower for these tiny batches."""
    import torch

    before = torch.get_num_threads()
    configure_threads(1)
    yield
    configure_threads(before)


def test_core_loop_structure(one_thread):
    pool = _synthetic_tiles(8, 1, "pool")
    heldout = _synthetic_tiles(3, 2, "held")
    calls = []
    res = bench.run_curves(
        pool,
        heldout,
        class_indices=(0, 1, 2),
        strategies=("random", "mixed"),
        seeds=(0,),
        rounds=2,
        k=2,
        n_initial=3,
        settings=ModelSettings(epochs=1),
        mc_samples=2,
        progress=lambda done, total, what: calls.append((done, total)),
    )
    assert res["labelled_tiles_by_round"] == [3, 5, 7]
    np.testing.assert_allclose(res["labelled_share_by_round"], [3 / 8, 5 / 8, 7 / 8], atol=1e-4)
    assert set(res["strategies"]) == {"random", "mixed"}
    # 1 seed: full labels, round 0, then 2 rounds per strategy
    assert res["retrains"] == 6 and calls[-1] == (6, 6) and len(calls) == 6
    assert 0.0 <= res["full_miou"] <= 1.0
    np.testing.assert_allclose(res["target_95pct"], 0.95 * res["full_miou"], atol=1e-4)
    round0 = set()
    for entry in res["strategies"].values():
        curve = entry["miou_by_round"]
        assert len(curve) == 3 and all(0.0 <= v <= 1.0 for v in curve)
        assert entry["miou_by_round_per_seed"] == [curve]  # one seed: the mean is that seed
        assert entry["miou_by_round_min"] == curve == entry["miou_by_round_max"]
        round0.add(curve[0])
        want = bench.share_to_target(
            entry["labelled_share_by_round"], curve, 0.95 * res["full_miou"]
        )
        if want is None:
            assert entry["share_to_95pct"] is None
        else:
            np.testing.assert_allclose(entry["share_to_95pct"], want, atol=1e-3)
        assert len(entry["share_to_95pct_per_seed"]) == 1
        assert "savings_vs_random_pct" in entry
    assert len(round0) == 1  # round 0 is one shared training per seed
    assert res["strategies"]["random"]["savings_vs_random_pct"] in (0.0, None)

    report = {"datasets": {"synthetic": {**res, "dataset": {
        "source": "synthetic test tiles", "pool_tiles": 8, "heldout_tiles": 3}}}}
    text = bench.markdown_table(report)
    assert "| random |" in text and "| mixed |" in text and "licensed agronomic advice" in text
    png = bench.plot_curves(res, title="synthetic")
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_core_loop_errors():
    pool = _synthetic_tiles(4, 3, "pool")
    heldout = _synthetic_tiles(1, 4, "held")
    common = dict(class_indices=(0, 1, 2), seeds=(0,), rounds=1, k=1)
    with pytest.raises(ValueError, match="n_initial: expected at least model.min_labelled_tiles"):
        bench.run_curves(pool, heldout, n_initial=2, **common)
    with pytest.raises(ValueError, match="strategies: expected a non-empty selection"):
        bench.run_curves(pool, heldout, n_initial=3, strategies=("greedy",), **common)
    with pytest.raises(ValueError, match="heldout: expected at least one evaluation tile"):
        bench.run_curves(pool, pool.subset([]), n_initial=3, **common)
    with pytest.raises(ValueError, match="features: expected one entry per key"):
        bench.TileSet(["a"], [], [np.zeros((4, 4), np.uint8)], [np.zeros((4, 4, 3), np.uint8)])
