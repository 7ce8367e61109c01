"""Tests of labeler.export.split: seeded spatial blocks, val windows cut back from train."""

from __future__ import annotations

import hashlib
import itertools

import numpy as np
import pytest
from scipy.stats import binomtest

from labeler.export.split import block_of, split_for, split_tiles, trim_window
from labeler.imagery.tiling import Window, tile_grid


def fake_sha(k: int) -> str:
    return hashlib.sha256(f"image {k}".encode()).hexdigest()


def test_block_share_is_binomial_and_stable_when_blocks_are_added():
    blocks = [(r, c) for r in range(40) for c in range(50)]
    first = [split_for(fake_sha(1), block=b, seed=3, val_share=0.2) for b in blocks]
    # oracle: scipy.stats.binomtest; a hash-uniform rule gives Binomial(n, 0.2) val blocks
    assert binomtest(first.count("val"), len(blocks), 0.2).pvalue > 1e-3
    again = [split_for(fake_sha(1), block=b, seed=3, val_share=0.2) for b in blocks]
    assert again == first  # a block's side depends on nothing else
    assert [split_for(fake_sha(1), block=b, seed=4) for b in blocks] != first
    assert [split_for(fake_sha(2), block=b, seed=3) for b in blocks] != first
    assert {split_for(fake_sha(1), block=b, val_share=0.0) for b in blocks} == {"train"}
    assert {split_for(fake_sha(1), block=b, val_share=1.0) for b in blocks} == {"val"}
    assert split_for(fake_sha(1).upper()) == split_for(fake_sha(1))


def test_block_of_takes_the_top_left_pixel():
    assert block_of(Window(0, 0, 256, 256), block_px=1024) == (0, 0)
    assert block_of(Window(1023, 1024, 256, 256), block_px=1024) == (0, 1)
    assert block_of(Window(2048, 5, 10, 10), block_px=1024) == (2, 0)
    with pytest.raises(ValueError, match="block_px: expected a whole number"):
        block_of(Window(0, 0, 1, 1), block_px=0)


def test_trim_window_by_hand():
    w = Window(0, 0, 10, 10)
    assert trim_window(w, []) == w
    assert trim_window(w, [Window(20, 20, 5, 5)]) == w  # not touching
    assert trim_window(w, [Window(8, 0, 10, 10)]) == Window(0, 0, 8, 10)  # bottom strip
    assert trim_window(w, [Window(0, 7, 10, 10)]) == Window(0, 0, 10, 7)  # right strip
    assert trim_window(w, [Window(-5, 0, 7, 10)]) == Window(2, 0, 8, 10)  # top strip
    # a corner square: the cut keeping most pixels (a tie: the top moves first)
    assert trim_window(w, [Window(8, 8, 4, 4)]) == Window(0, 0, 8, 10)
    assert trim_window(w, [Window(7, 9, 4, 4)]) == Window(0, 0, 10, 9)  # thinner on the right
    assert trim_window(w, [Window(0, 0, 10, 10)]) is None  # nothing left


def _pixels(w: Window) -> set[tuple[int, int]]:
    return set(itertools.product(range(w.row, w.row + w.height), range(w.col, w.col + w.width)))


def test_no_pixel_on_both_sides_slow_reference():
    # slow loop reference: the pixel sets of every window, compared one by one
    windows = tile_grid(300, 420, size=64, overlap=16)
    rng = np.random.default_rng(5)
    for seed in range(6):
        sides = split_tiles(
            windows, image_sha256=fake_sha(int(rng.integers(1000))), block_px=128,
            seed=seed, val_share=0.4,
        )
        train = set().union(*[_pixels(s.window) for s in sides if s.split == "train"] or [set()])
        for w, s in zip(windows, sides, strict=True):
            if s.split == "val" and s.window is not None:
                assert not (_pixels(s.window) & train)
                assert _pixels(s.window) <= _pixels(w)  # only ever cut back
            if s.split == "train":
                assert s.window == w
            assert s.block == block_of(w, block_px=128)
        # neighbours of one block are on one side
        for a, b in itertools.combinations(sides, 2):
            if a.block == b.block:
                assert a.split == b.split


def test_a_val_block_between_train_blocks_is_cut_only_at_its_borders():
    # one row of 64-pixel tiles overlapping by 16 (starts 0, 48, ..., 336), blocks of 128
    windows = [Window(0, c, 64, 64) for c in range(0, 337, 48)]
    sha = next(
        fake_sha(k) for k in range(1000)
        if [split_for(fake_sha(k), block=(0, c), val_share=0.5) for c in range(3)]
        == ["train", "val", "train"]
    )
    sides = split_tiles(windows, image_sha256=sha, block_px=128, val_share=0.5)
    assert [s.split for s in sides] == ["train"] * 3 + ["val"] * 3 + ["train"] * 2
    # worked by hand: val tile 144..208 meets train tile 96..160, so it starts at 160;
    # 192..256 meets no train tile; 240..304 meets train tile 288..352, so it ends at 288
    assert [s.window for s in sides[3:6]] == [
        Window(0, 160, 64, 48), Window(0, 192, 64, 64), Window(0, 240, 64, 48)
    ]
