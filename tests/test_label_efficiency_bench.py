"""The label-efficiency benchmark (benchmarks/label_efficiency/): curve arithmetic against
hand-made curves with exact answers, the loop's bookkeeping with a scripted model whose
learning curve is known, and a smoke run of the real loop on a tiny synthetic pool."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchmarks.label_efficiency import (
    TileSet,
    load_demo,
    load_peanut,
    markdown_table,
    plot_curves,
    round_sizes,
    run_curves,
    savings_pct,
    share_to_target,
    simulate,
    summarise_curves,
    targets_met,
)
from labeler.model.encoder import feature_shapes
from labeler.model.runtime import configure_threads
from labeler.settings import ModelSettings

# -- share to target: hand-made curves ------------------------------------------------------------
# Linear interpolation between rounds: common practice, no source; the answers are worked
# by hand.
SHARES = [0.05, 0.10, 0.20]
MIOUS = [0.5, 0.7, 0.9]


def test_share_between_rounds_is_interpolated():
    # target 0.8 lies halfway from 0.7 (share 0.10) to 0.9 (share 0.20): share 0.15
    assert share_to_target(SHARES, MIOUS, 0.8) == pytest.approx(0.15, abs=1e-12)
    # a quarter of the way from 0.5 to 0.7: 0.05 + 0.25 * 0.05 = 0.0625
    assert share_to_target(SHARES, MIOUS, 0.55) == pytest.approx(0.0625, abs=1e-12)


def test_share_exactly_on_a_round():
    assert share_to_target(SHARES, MIOUS, 0.7) == pytest.approx(0.10, abs=1e-12)
    assert share_to_target(SHARES, MIOUS, 0.9) == pytest.approx(0.20, abs=1e-12)


def test_share_when_round_zero_already_reaches():
    assert share_to_target(SHARES, MIOUS, 0.4) == 0.05


def test_share_never_reached_is_none():
    assert share_to_target(SHARES, MIOUS, 0.95) is None
    assert share_to_target(SHARES, MIOUS, math.nan) is None
    assert share_to_target([], [], 0.5) is None


def test_first_crossing_counts_after_a_dip():
    # up to 0.9 at share 0.10, then down: the first crossing of 0.8 is
    # 0.05 + (0.8 - 0.5) / (0.9 - 0.5) * 0.05 = 0.0875
    assert share_to_target(SHARES, [0.5, 0.9, 0.6], 0.8) == pytest.approx(0.0875, abs=1e-12)


def test_nan_rounds_do_not_count():
    # round 1 is NaN: the curve reaches 0.8 only at round 2, with no finite point before
    assert share_to_target(SHARES, [0.5, math.nan, 0.9], 0.8) == 0.20


def test_share_errors():
    with pytest.raises(ValueError, match="mious: expected one value per share"):
        share_to_target(SHARES, [0.5, 0.7], 0.6)
    with pytest.raises(ValueError, match="shares: expected strictly increasing"):
        share_to_target([0.1, 0.1, 0.2], MIOUS, 0.6)


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
    got = share_to_target(shares, values, target)
    want = _loop_reference(shares, values, target)
    if want is None:
        assert got is None
    else:
        # the walk steps 1e-4 of a segment of width 0.1
        assert got is not None
        np.testing.assert_allclose(got, want, atol=2e-5)


def test_savings_and_round_sizes():
    assert savings_pct(0.15, 0.20) == pytest.approx(25.0, abs=1e-12)
    assert savings_pct(None, 0.20) is None
    assert savings_pct(0.15, None) is None
    assert round_sizes(10, n_initial=3, k=4, rounds=3) == [3, 7, 10]
    assert round_sizes(10, n_initial=3, k=4, rounds=0) == [3]
    with pytest.raises(ValueError, match="n_initial: expected 1..10"):
        round_sizes(10, n_initial=11, k=4, rounds=1)
    with pytest.raises(ValueError, match="k: expected at least 1"):
        round_sizes(10, n_initial=3, k=0, rounds=1)
    with pytest.raises(ValueError, match="rounds: expected 0 or more, got -1"):
        round_sizes(10, n_initial=3, k=1, rounds=-1)


# -- per-seed summaries: hand-made curves, answers worked by hand --------------------------------
def test_summary_of_two_seeds():
    # full-label mIoU 0.8 and 0.6: mean 0.7, target 0.95 * 0.7 = 0.665
    curves = {
        "random": [[0.5, 0.7, 0.8], [0.4, 0.5, 0.6]],  # mean 0.45, 0.6, 0.7
        "mixed": [[0.5, 0.8, 0.8], [0.4, 0.6, 0.6]],  # mean 0.45, 0.7, 0.7
        "bald": [[0.3, 0.3, 0.3], [0.3, 0.3, 0.3]],  # never reaches
    }
    got = summarise_curves(curves, [0.8, 0.6], [0.1, 0.2, 0.3])
    assert got["full_miou"] == 0.7 and got["full_miou_per_seed"] == [0.8, 0.6]
    assert got["target_95pct"] == pytest.approx(0.665, abs=1e-12)
    rnd, mix, bald = (got["strategies"][s] for s in ("random", "mixed", "bald"))
    assert rnd["miou_by_round"] == pytest.approx([0.45, 0.6, 0.7], abs=1e-12)
    assert rnd["miou_by_round_min"] == [0.4, 0.5, 0.6]
    assert rnd["miou_by_round_max"] == [0.5, 0.7, 0.8]
    assert rnd["miou_by_round_per_seed"] == curves["random"]
    assert rnd["labelled_share_by_round"] == [0.1, 0.2, 0.3]
    # random: 0.665 lies 0.65 of the way from 0.6 (share 0.2) to 0.7 (share 0.3): 0.265;
    # seed 0 against 0.76: 0.6 of the way from 0.7 to 0.8 -> 0.26;
    # seed 1 against 0.57: 0.7 of the way from 0.5 to 0.6 -> 0.27
    assert rnd["share_to_95pct"] == pytest.approx(0.265, abs=1e-12)
    assert rnd["share_to_95pct_per_seed"] == pytest.approx([0.26, 0.27], abs=1e-12)
    # mixed: 0.665 lies 0.215 / 0.25 = 0.86 of the way from 0.45 (0.1) to 0.7 (0.2): 0.186;
    # seed 0: 0.26 / 0.3 of the way from 0.5 to 0.8 -> 0.18667 (4 digits: 0.1867);
    # seed 1: 0.17 / 0.2 of the way from 0.4 to 0.6 -> 0.185
    assert mix["share_to_95pct"] == pytest.approx(0.186, abs=1e-12)
    assert mix["share_to_95pct_per_seed"] == pytest.approx([0.1867, 0.185], abs=1e-12)
    # savings in % of random's share: (0.265 - 0.186) / 0.265 = 29.81 -> 29.8;
    # per seed (0.26 - 0.1867) / 0.26 = 28.19 -> 28.2, (0.27 - 0.185) / 0.27 = 31.48 -> 31.5
    assert mix["savings_vs_random_pct"] == 29.8
    assert mix["savings_vs_random_pct_per_seed"] == [28.2, 31.5]
    assert rnd["savings_vs_random_pct"] == 0.0
    assert bald["share_to_95pct"] is None and bald["savings_vs_random_pct"] is None
    assert bald["share_to_95pct_per_seed"] == [None, None]
    assert "savings_vs_random_pct_at_least" not in mix  # random reached the target


def test_savings_are_a_lower_bound_when_random_never_reaches():
    # one seed, full 1.0, target 0.95; random ends at 0.7; mixed reaches 0.95 at
    # 0.1 + 0.45 / 0.5 * 0.1 = 0.19. Random needs more than the last share 0.3, so mixed
    # saves at least (0.3 - 0.19) / 0.3 = 36.67 % -> 36.7
    curves = {"random": [[0.5, 0.6, 0.7]], "mixed": [[0.5, 1.0, 1.0]]}
    got = summarise_curves(curves, [1.0], [0.1, 0.2, 0.3])["strategies"]
    assert got["random"]["share_to_95pct"] is None
    assert got["mixed"]["share_to_95pct"] == pytest.approx(0.19, abs=1e-12)
    assert got["mixed"]["savings_vs_random_pct"] is None
    assert got["mixed"]["savings_vs_random_pct_at_least"] == 36.7
    assert "savings_vs_random_pct_at_least" not in got["random"]


def test_summary_without_random_has_no_savings():
    got = summarise_curves({"mixed": [[0.5, 1.0]]}, [1.0], [0.5, 1.0])["strategies"]["mixed"]
    assert "savings_vs_random_pct" not in got


def test_summary_refuses_curves_of_the_wrong_shape():
    with pytest.raises(ValueError, match=r"curves\['mixed'\]: expected shape \(2, 3\)"):
        summarise_curves({"mixed": [[0.5, 0.6, 0.7]]}, [0.8, 0.6], [0.1, 0.2, 0.3])


def test_targets_met():
    # targets: share at most 0.30 and savings at least 25 % (exact or lower bound)
    results = {
        "a": {"strategies": {"mixed": {"share_to_95pct": 0.186, "savings_vs_random_pct": 29.8}}},
        "b": {
            "strategies": {
                "mixed": {
                    "share_to_95pct": 0.19,
                    "savings_vs_random_pct": None,
                    "savings_vs_random_pct_at_least": 36.7,
                }
            }
        },
        "c": {"strategies": {"mixed": {"share_to_95pct": 0.31, "savings_vs_random_pct": 10.0}}},
        "d": {"strategies": {"random": {"share_to_95pct": 0.2}}},  # no mixed: not judged
    }
    got = targets_met(results)
    assert set(got) == {"a", "b", "c"}
    assert got["a"]["share_met"] and got["a"]["savings_met"]
    assert got["b"]["share_met"] and got["b"]["savings_met"]
    assert got["b"]["mixed_savings_pct_at_least"] == 36.7
    assert not got["c"]["share_met"] and not got["c"]["savings_met"]


# -- the loop's bookkeeping with a scripted model -------------------------------------------------
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
    return TileSet(keys, feats, masks, images)


@pytest.fixture
def scripted(monkeypatch):
    """A stand-in model: 'training' remembers its rows, the held-out mIoU is
    min(1, labelled tiles / 6), and the pool's entropy of row r is r / N (higher rows are
    more uncertain). Records the rows of every training."""
    trained = []

    def train(tiles, rows, *, class_indices, settings, encoder):
        rows = sorted(int(r) for r in rows)
        trained.append(rows)
        return SimpleNamespace(head=rows, history=[{}, {}, {}], best_epoch=2)

    def evaluate(head, heldout, *, n_classes, mc_samples, seed):
        return min(1.0, len(head) / 6)

    def pool_scores(head, pool, labelled, *, k_classes, mc_samples, seed):
        n = len(pool)
        scores = simulate.PoolScores.neutral(n, k_classes)
        scores.entropy[~labelled] = np.flatnonzero(~labelled) / n
        return scores

    monkeypatch.setattr(simulate, "_train", train)
    monkeypatch.setattr(simulate, "_evaluate", evaluate)
    monkeypatch.setattr(simulate, "_pool_scores", pool_scores)
    return trained


def test_loop_bookkeeping_with_a_scripted_model(scripted):
    pool = _synthetic_tiles(8, 1, "pool")
    heldout = _synthetic_tiles(1, 2, "held")
    res = run_curves(
        pool,
        heldout,
        class_indices=(0, 1, 2),
        strategies=("random", "entropy"),
        seeds=(0,),
        rounds=2,
        k=2,
        n_initial=3,
        reference_settings=ModelSettings(epochs=40),
    )
    # trainings in order: reference and full (all 8 rows), round 0, random x 2, entropy x 2
    assert len(scripted) == 7 and scripted[0] == scripted[1] == list(range(8))
    initial = scripted[2]
    assert len(initial) == 3
    random1, random2, entropy1, entropy2 = scripted[3:]
    assert len(random1) == 5 and len(random2) == 7
    assert set(initial) < set(random1) < set(random2)  # labels are only ever added
    # entropy picks the two most uncertain unlabelled rows each round: the highest rows
    rest = [r for r in range(8) if r not in initial]
    assert entropy1 == sorted(initial + rest[-2:])
    assert entropy2 == sorted(initial + rest[-4:])
    # mIoU min(1, n / 6) after 3, 5, 7 tiles: 0.5, 0.8333, 1; full labels 1, target 0.95,
    # reached 0.7 of the way from share 5/8 to 7/8: 0.625 + 0.7 * 0.25 = 0.8
    assert res["labelled_tiles_by_round"] == [3, 5, 7]
    assert res["labelled_share_by_round"] == [0.375, 0.625, 0.875]
    assert res["full_miou"] == 1.0 and res["target_95pct"] == 0.95
    assert res["retrains"] == 7
    assert res["full_miou_reference"] == {
        "miou": 1.0,
        "seed": 0,
        "epochs_max": 40,
        "epochs_run": 3,
        "best_epoch": 2,
    }
    for entry in res["strategies"].values():
        assert entry["miou_by_round"] == [0.5, 0.8333, 1.0]
        assert entry["share_to_95pct"] == pytest.approx(0.8, abs=1e-12)
        assert entry["savings_vs_random_pct"] == 0.0


# -- the real loop on a tiny synthetic pool -------------------------------------------------------
@pytest.fixture
def one_thread():
    """One torch thread (as the benchmark runs): two threads on a loaded two-core machine
    were about ten times slower for these tiny batches."""
    import torch

    before = torch.get_num_threads()
    configure_threads(1)
    yield
    configure_threads(before)


def test_core_loop_runs_on_a_real_head(one_thread):
    pool = _synthetic_tiles(8, 1, "pool")
    heldout = _synthetic_tiles(3, 2, "held")
    calls = []
    res = run_curves(
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
    assert set(res["strategies"]) == {"random", "mixed"}
    # 1 seed: full labels, round 0, then 2 rounds per strategy
    assert res["retrains"] == 6 and calls == [(i, 6) for i in range(1, 7)]
    assert 0.0 <= res["full_miou"] <= 1.0
    round0 = set()
    for entry in res["strategies"].values():
        curve = entry["miou_by_round"]
        assert len(curve) == 3 and all(0.0 <= v <= 1.0 for v in curve)
        assert entry["miou_by_round_per_seed"] == [curve]  # one seed: the mean is that seed
        round0.add(curve[0])
    assert len(round0) == 1  # round 0 is one shared training per seed


def test_report_of_hand_made_curves():
    res = summarise_curves(
        {"random": [[0.5, 0.7, 0.8], [0.4, 0.5, 0.6]], "mixed": [[0.5, 0.8, 0.8], [0.4, 0.6, 0.6]]},
        [0.8, 0.6],
        [0.1, 0.2, 0.3],
    )
    res |= {
        "labelled_tiles_by_round": [1, 2, 3],
        "full_miou_reference": None,
        "dataset": {"source": "hand-made curves", "pool_tiles": 10, "heldout_tiles": 3},
    }
    report = {"datasets": {"handmade": res}, "targets": targets_met({"handmade": res})}
    text = markdown_table(report)
    # the rows carry the shares and savings worked by hand in test_summary_of_two_seeds
    assert "| random | 26.5 % | 26.0 %, 27.0 % | 0.0 % | 0.700 | n/a |" in text
    assert "| mixed | 18.6 % | 18.7 %, 18.5 % | 29.8 % | 0.700 | n/a |" in text
    assert "- handmade: `mixed` share 18.6 % (target at most 30 %: met)" in text
    assert "licensed agronomic advice" in text
    png = plot_curves(res, title="hand-made")
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_core_loop_errors():
    pool = _synthetic_tiles(4, 3, "pool")
    heldout = _synthetic_tiles(1, 4, "held")
    common = dict(class_indices=(0, 1, 2), seeds=(0,), rounds=1, k=1)
    with pytest.raises(ValueError, match="n_initial: expected at least model.min_labelled_tiles"):
        run_curves(pool, heldout, n_initial=2, **common)
    with pytest.raises(ValueError, match="strategies: expected one or more of "):
        run_curves(pool, heldout, n_initial=3, strategies=("greedy",), **common)
    with pytest.raises(ValueError, match="seeds: expected at least one seed, got none"):
        run_curves(pool, heldout, n_initial=3, **(common | {"seeds": ()}))
    with pytest.raises(ValueError, match="heldout: expected at least one evaluation tile"):
        run_curves(pool, pool.subset([]), n_initial=3, **common)
    with pytest.raises(ValueError, match="features: expected one entry per key"):
        TileSet(["a"], [], [np.zeros((4, 4), np.uint8)], [np.zeros((4, 4, 3), np.uint8)])
    with pytest.raises(ValueError, match="keys: expected unique tile keys"):
        TileSet(["a", "a"], [(), ()], [np.zeros((4, 4), np.uint8)] * 2, [np.zeros((4, 4, 3))] * 2)


def test_absent_datasets_are_clear_errors(tmp_path):
    # no machine path in the reason: it may be written into the committed report
    with pytest.raises(FileNotFoundError, match=r"^peanut-weed dataset absent \(no images/\*\.jpg"):
        load_peanut(encoder=None, cache=None, folder=tmp_path / "peanut-weed")
    with pytest.raises(
        FileNotFoundError, match=r"demo_fields/: expected more than 2 demo plots, got 0"
    ):
        load_demo(encoder=None, cache=None, folder=tmp_path / "demo_fields")
