"""Where the protocol acts next: the interior point of the largest error region."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from labeler.demo.clicks import next_click


def _oracle_click(target, mask):
    """The protocol's point from scipy alone: the largest 4-connected error region of one
    target class, then the maximum of scipy.ndimage.distance_transform_edt on it padded
    with outside pixels (the tile border counts as outside), first in row-major order."""
    error = (mask != target) & (target != 255)
    best = None
    for cls in np.unique(target[error]):
        labels, n = ndi.label(error & (target == cls))  # scipy's default: 4-connected
        for k in range(1, n + 1):
            region = labels == k
            key = (-int(region.sum()), int(np.flatnonzero(region.ravel())[0]))
            if best is None or key < best[0]:
                best = (key, region)
    region = best[1]
    depth = ndi.distance_transform_edt(np.pad(region, 1))[1:-1, 1:-1]
    return np.unravel_index(int(depth.argmax()), depth.shape), float(depth.max())


def test_click_lands_on_the_interior_point_of_the_largest_error_region():
    target = np.zeros((24, 30), np.uint8)
    mask = np.zeros((24, 30), np.uint8)
    target[2:5, 2:9] = 1  # 21 px of crop the mask misses
    target[14:19, 3:8] = 2  # 25 px of weed the mask misses
    mask[8:12, 16:24] = 2  # 32 px of weed on soil: the largest error region
    target[20:22, 20:22] = 255  # unlabelled: never an error
    mask[20:22, 20:22] = 1
    click = next_click(target, mask)
    # by hand: in the 4 x 8 block at rows 8-11, cols 16-23 the pixels of rows 9-10 and
    # cols 17-22 lie 2 px from the outside; the first of them is (9, 17)
    assert click.point == (9, 17) and click.cls == 0 and click.depth_px == 2.0
    point, depth = _oracle_click(target, mask)
    assert click.point == tuple(int(v) for v in point) and click.depth_px == depth
    assert click.region.sum() == 32


def test_click_counts_the_tile_border_as_outside():
    target = np.zeros((10, 10), np.uint8)
    target[:3, :5] = 1  # in the corner of the tile
    click = next_click(target, np.zeros((10, 10), np.uint8))
    # unpadded, the corner pixel (0, 0) would be deepest; with the border as outside the
    # middle row of the 3 x 5 block is, first at (1, 1)
    assert click.point == (1, 1) and click.depth_px == 2.0
    point, _ = _oracle_click(target, np.zeros((10, 10), np.uint8))
    assert click.point == tuple(int(v) for v in point)


def test_click_on_random_error_maps_matches_the_scipy_oracle():
    rng = np.random.default_rng(12)
    for _ in range(25):
        target = rng.integers(0, 3, size=(14, 17)).astype(np.uint8)
        target = ndi.median_filter(target, size=3)  # blobs rather than salt and pepper
        mask = ndi.median_filter(rng.integers(0, 3, size=(14, 17)).astype(np.uint8), size=3)
        click = next_click(target, mask)
        point, depth = _oracle_click(target, mask)
        assert click.point == tuple(int(v) for v in point)
        assert click.depth_px == depth and click.cls == target[click.point]


def test_equal_regions_go_in_row_major_order_and_a_perfect_mask_has_no_click():
    target = np.zeros((8, 8), np.uint8)
    target[5:7, 1:3] = 1
    target[1:3, 5:7] = 2
    assert next_click(target, np.zeros((8, 8), np.uint8)).point == (1, 5)
    assert next_click(target, target.copy()) is None


def test_next_click_error():
    target = np.zeros((8, 8), np.uint8)
    with pytest.raises(ValueError, match="mask: expected a 2-D mask of the target's shape"):
        next_click(target, target[:5])
