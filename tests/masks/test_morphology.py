"""Speck removal and pinhole filling."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from skimage.morphology import remove_small_holes, remove_small_objects

from labeler.masks.morphology import component_structure, fill_small_holes, remove_small_regions
from tests.common import zoo_diagonal, zoo_ring, zoo_square


def test_square_survives_or_goes_by_its_area():
    m = zoo_square() > 0  # 16 pixels
    np.testing.assert_array_equal(remove_small_regions(m, min_px=16), m)
    assert not remove_small_regions(m, min_px=17).any()


def test_diagonal_is_one_region_by_8_and_six_by_4_connectivity():
    m = zoo_diagonal() > 0  # 6 pixels on the diagonal
    np.testing.assert_array_equal(remove_small_regions(m, min_px=6, connectivity=2), m)
    assert not remove_small_regions(m, min_px=2, connectivity=1).any()


def test_ring_hole_is_filled_only_when_small():
    ring = zoo_ring() > 0  # hole of 4 pixels
    full = ring.copy()
    full[4:6, 4:6] = True
    np.testing.assert_array_equal(fill_small_holes(ring, max_px=5), full)
    np.testing.assert_array_equal(fill_small_holes(ring, max_px=4), ring)


@settings(max_examples=40, deadline=None)
@given(
    arrays(bool, st.tuples(st.integers(1, 12), st.integers(1, 12))),
    st.integers(0, 20),
    st.sampled_from([1, 2]),
)
def test_agrees_with_scikit_image(mask, size, connectivity):
    # oracle: skimage.morphology.remove_small_objects / remove_small_holes, which drop or
    # fill regions of at most max_size pixels (ours: fewer than min_px / max_px)
    ours = remove_small_regions(mask, min_px=size, connectivity=connectivity)
    if size <= 1:
        np.testing.assert_array_equal(ours, mask)
    else:
        theirs = remove_small_objects(mask, max_size=size - 1, connectivity=connectivity)
        np.testing.assert_array_equal(ours, theirs)
        # holes: our foreground connectivity c joins the background with 3 - c
        filled = fill_small_holes(mask, max_px=size, connectivity=connectivity)
        theirs = remove_small_holes(mask, max_size=size - 1, connectivity=3 - connectivity)
        np.testing.assert_array_equal(filled, theirs)


def test_input_is_not_modified_and_empty_masks_pass():
    m = zoo_square() > 0
    before = m.copy()
    remove_small_regions(m, min_px=100)
    fill_small_holes(m, max_px=100)
    np.testing.assert_array_equal(m, before)
    empty = np.zeros((3, 4), bool)
    assert not remove_small_regions(empty, min_px=5).any()
    assert not fill_small_holes(empty, max_px=5).any()  # 12 px of background: not a hole
    assert fill_small_holes(empty, max_px=13).all()  # now it is
    full = np.ones((3, 4), bool)
    np.testing.assert_array_equal(fill_small_holes(full, max_px=5), full)


def test_errors_name_the_parameter():
    with pytest.raises(ValueError, match="connectivity: expected 1 .* or 2"):
        component_structure(3)
    with pytest.raises(ValueError, match=r"mask: expected a 2-D mask of shape \(H, W\)"):
        remove_small_regions(np.zeros((2, 2, 2), bool), min_px=2)
    with pytest.raises(ValueError, match="mask: expected a boolean mask, got dtype uint8"):
        fill_small_holes(np.zeros((2, 2), np.uint8), max_px=2)
    with pytest.raises(ValueError, match="min_px: expected a pixel count >= 0"):
        remove_small_regions(np.zeros((2, 2), bool), min_px=-1)
    with pytest.raises(ValueError, match="max_px: expected a pixel count >= 0"):
        fill_small_holes(np.zeros((2, 2), bool), max_px=-3)
