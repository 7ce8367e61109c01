"""Tile grid and stitching."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labeler.imagery.tiling import (
    Window,
    axis_starts,
    cut,
    nearest_tile_index,
    owner_map,
    stitch,
    tile_grid,
)


def _nearest_loop(length, starts, extent):
    """Slow reference: for each pixel, the containing tile with the nearest centre."""
    out = []
    for p in range(length):
        best, best_d = None, None
        for k, s in enumerate(starts):
            if s <= p < s + extent:
                d = abs(p + 0.5 - (s + extent / 2))
                if best_d is None or d < best_d:
                    best, best_d = k, d
        out.append(best)
    return np.array(out)


def test_axis_starts_exact():
    # 600 px, tiles of 256 with 32 overlap: stride 224 -> 0, 224, then the last is moved to 344
    np.testing.assert_array_equal(axis_starts(600, size=256, overlap=32), [0, 224, 344])
    np.testing.assert_array_equal(axis_starts(256, size=256, overlap=32), [0])
    np.testing.assert_array_equal(axis_starts(100, size=256, overlap=32), [0])
    np.testing.assert_array_equal(axis_starts(480, size=256, overlap=32), [0, 224])


def test_grid_default_sizes():
    windows = tile_grid(300, 500)
    assert all((w.height, w.width) == (256, 256) for w in windows)
    assert len(windows) == 2 * 3
    small = tile_grid(40, 70)
    assert small == [Window(0, 0, 40, 70)]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (dict(length=0, size=4, overlap=0), "length"),
        (dict(length=5, size=0, overlap=0), "size"),
        (dict(length=5, size=4, overlap=4), "overlap"),
        (dict(length=5, size=4, overlap=-1), "overlap"),
    ],
)
def test_axis_starts_errors(kwargs, match):
    with pytest.raises(ValueError, match=match):
        axis_starts(kwargs.pop("length"), **kwargs)


def test_nearest_tile_matches_loop():
    rng = np.random.default_rng(3)
    for _ in range(20):
        length = int(rng.integers(1, 200))
        size = int(rng.integers(2, 64))
        overlap = int(rng.integers(0, size))
        starts = axis_starts(length, size=size, overlap=overlap)
        extent = min(size, length)
        np.testing.assert_array_equal(
            nearest_tile_index(length, starts, extent), _nearest_loop(length, starts, extent)
        )


@settings(max_examples=60, deadline=None)
@given(
    h=st.integers(1, 90),
    w=st.integers(1, 90),
    size=st.integers(4, 40),
    overlap_frac=st.floats(0, 0.9),
    seed=st.integers(0, 2**16),
)
def test_tiles_cover_and_stitch_back(h, w, size, overlap_frac, seed):
    overlap = min(int(size * overlap_frac), size - 1)
    x = np.random.default_rng(seed).integers(0, 5, (h, w)).astype(np.uint8)
    windows = tile_grid(h, w, size=size, overlap=overlap)
    covered = np.zeros((h, w), int)
    for win in windows:
        covered[win.slices] += 1
    assert covered.min() >= 1  # every pixel is covered
    np.testing.assert_array_equal(stitch(cut(x, windows), windows, shape=(h, w)), x)


def test_stitch_takes_nearest_centre():
    # two tiles of width 6 over 10 columns: starts 0 and 4; columns 0..4 nearer tile 0's
    # centre (3), columns 5..9 nearer tile 1's centre (7); column 4.5 vs 3 and 7 -> tile 0
    windows = tile_grid(1, 10, size=6, overlap=2)
    assert [w.col for w in windows] == [0, 4]
    masks = [np.full((1, 6), 1, np.uint8), np.full((1, 6), 2, np.uint8)]
    np.testing.assert_array_equal(
        stitch(masks, windows, shape=(1, 10)), [[1, 1, 1, 1, 1, 2, 2, 2, 2, 2]]
    )
    np.testing.assert_array_equal(
        owner_map(windows, shape=(1, 10)), [[0, 0, 0, 0, 0, 1, 1, 1, 1, 1]]
    )


def test_stitch_errors():
    windows = tile_grid(10, 10, size=6, overlap=2)
    with pytest.raises(ValueError, match="one mask per window"):
        stitch([np.zeros((6, 6), np.uint8)], windows, shape=(10, 10))
    bad = [np.zeros((6, 6), np.uint8)] * (len(windows) - 1) + [np.zeros((5, 6), np.uint8)]
    with pytest.raises(ValueError, match="expected shape"):
        stitch(bad, windows, shape=(10, 10))


def test_stitch_missing_tile_leaves_fill():
    windows = tile_grid(10, 10, size=6, overlap=2)
    masks = [np.ones((6, 6), np.uint8) for _ in windows[:-1]]
    out = stitch(masks, windows[:-1], shape=(10, 10))
    # the last tile (rows 4..9, cols 4..9) is missing: its own pixels not covered by others stay 255
    assert (out[6:, 6:] == 255).all()
    assert (out[:6, :6] == 1).all()
