"""Colour gradient (Delta E*ab per pixel) and the regions bounded by strong colour edges."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.color import deltaE_cie76, rgb2lab

from labeler.masks.colour_regions import colour_gradient, colour_regions, split_regions
from tests.masks.scenes import LEAF_RGB, SOIL_RGB, disc, plant_scene


def _gradient_loop(image, sigma):
    """Slow reference: central differences written out pixel by pixel."""
    lab = rgb2lab(image)
    if sigma > 0:
        lab = ndi.gaussian_filter(lab, sigma=(sigma, sigma, 0), mode="nearest")
    h, w = image.shape[:2]
    out = np.zeros((h, w))
    for r in range(h):
        for c in range(w):
            total = 0.0
            for ch in range(3):
                if h > 1:
                    up, down = max(r - 1, 0), min(r + 1, h - 1)
                    total += ((lab[down, c, ch] - lab[up, c, ch]) / (down - up)) ** 2
                if w > 1:
                    left, right = max(c - 1, 0), min(c + 1, w - 1)
                    total += ((lab[r, right, ch] - lab[r, left, ch]) / (right - left)) ** 2
            out[r, c] = np.sqrt(total)
    return out


def _halves(shape=(10, 12), split=6):
    image = np.empty((*shape, 3), np.uint8)
    image[:, :split] = SOIL_RGB
    image[:, split:] = LEAF_RGB
    return image


def test_sharp_step_gives_half_the_colour_difference_beside_it():
    image = _halves()
    # oracle: scikit-image's CIE 1976 colour difference between the two flat colours
    delta = float(deltaE_cie76(rgb2lab(np.uint8([[SOIL_RGB]])), rgb2lab(np.uint8([[LEAF_RGB]])))[0, 0])
    assert delta == pytest.approx(64.4, abs=0.1)  # the scene's colours, recomputed by hand
    g = colour_gradient(image, sigma=0)
    expected = np.zeros((10, 12))
    expected[:, 5:7] = delta / 2  # central difference (b - a) / 2 on the two pixels beside
    np.testing.assert_allclose(g, expected, atol=1e-9)


@pytest.mark.parametrize("sigma", [0.0, 1.0, 1.7])
def test_gradient_matches_the_slow_loop(sigma):
    rng = np.random.default_rng(4)
    image = rng.integers(0, 256, size=(7, 9, 3), dtype=np.uint8)
    np.testing.assert_allclose(colour_gradient(image, sigma=sigma), _gradient_loop(image, sigma),
                               rtol=1e-12, atol=1e-9)


def test_gradient_of_a_single_row_and_of_a_flat_tile():
    row = _halves((1, 12))
    np.testing.assert_allclose(colour_gradient(row, sigma=0), _gradient_loop(row, 0), atol=1e-9)
    flat = np.full((5, 6, 3), 90, np.uint8)
    np.testing.assert_array_equal(colour_gradient(flat), np.zeros((5, 6)))


def test_flat_tile_is_one_region():
    regions = colour_regions(np.full((6, 7, 3), 120, np.uint8))
    np.testing.assert_array_equal(regions, np.ones((6, 7), np.int32))


@pytest.mark.parametrize("sigma", [0.0, 1.0, 2.0])
def test_two_flat_halves_split_exactly_at_the_step(sigma):
    regions = colour_regions(_halves(), sigma=sigma)
    assert len(np.unique(regions)) == 2
    assert (regions[:, :6] == regions[0, 0]).all() and (regions[:, 6:] == regions[0, 11]).all()


def test_flat_squares_on_soil_are_regions_of_their_own():
    squares = [np.zeros((30, 30), bool) for _ in range(3)]
    squares[0][3:9, 4:12] = True
    squares[1][15:25, 2:8] = True
    squares[2][12:20, 14:27] = True
    image = plant_scene((30, 30), squares, noise_sd=0)
    regions = colour_regions(image)
    assert len(np.unique(regions)) == 4  # the soil and three squares
    for sq in squares:
        np.testing.assert_array_equal(regions == regions[sq][0], sq)


def test_noisy_disc_is_cut_at_its_edge():
    plant = disc((48, 48), (24, 24), 9)
    regions = colour_regions(plant_scene((48, 48), [plant], noise_sd=6))
    inner = regions == regions[24, 24]
    # the cut follows the edge within one pixel (common practice, no source)
    assert not (inner & ~ndi.binary_dilation(plant)).any()
    assert inner[ndi.binary_erosion(plant)].all()


def test_within_limits_the_regions():
    within = np.zeros((10, 12), bool)
    within[2:8, 3:10] = True
    regions = colour_regions(_halves(), within=within)
    assert (regions[~within] == 0).all() and (regions[within] > 0).all()
    assert len(np.unique(regions[within])) == 2


def test_seed_on_a_blade_without_flat_core_starts_a_region_of_its_own():
    blade = np.zeros((16, 20), bool)
    blade[7:9, 2:18] = True  # two pixels wide: both lie on the edge, none is flat
    image = plant_scene((16, 20), [blade], noise_sd=0)
    plain = colour_regions(image)
    for k in np.unique(plain[blade]):  # the blade went to the soil around it
        assert (~blade & (plain == k)).any()
    seeded = colour_regions(image, seed_points=[(7, 9)])
    np.testing.assert_array_equal(seeded == seeded[7, 9], blade)


def test_seed_on_an_edge_pixel_of_a_plant_joins_the_plant():
    bar = np.zeros((12, 16), bool)
    bar[3:6, 2:11] = True  # three pixels tall: a flat core along the middle row
    image = plant_scene((12, 16), [bar], noise_sd=0)
    plain = colour_regions(image)
    np.testing.assert_array_equal(plain == plain[4, 5], bar)
    # (4, 3) lies on the edge at the bar's end but has the bar's colour: nothing changes
    np.testing.assert_array_equal(colour_regions(image, seed_points=[(4, 3), (0, 0)]), plain)


def test_within_without_any_flat_pixel_is_still_labelled():
    rng = np.random.default_rng(1)
    noise = rng.integers(0, 256, size=(8, 8, 3), dtype=np.uint8)  # edges everywhere
    within = np.zeros((8, 8), bool)
    within[1:4, 1:4] = True
    within[6:8, 5:8] = True
    regions = colour_regions(noise, within=within, edge_threshold=1e-6)
    assert (regions[within] > 0).all() and (regions[~within] == 0).all()
    assert regions[1, 1] != regions[7, 7]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"image": np.zeros((4, 4), np.uint8)}, r"image: expected a \(H, W, 3\) uint8"),
        ({"within": np.ones((3, 4), bool)}, r"within: expected shape \(4, 4\)"),
        ({"edge_threshold": 0}, "edge_threshold: expected a positive"),
        ({"connectivity": 6}, "connectivity: expected 4 or 8"),
        ({"seed_points": [(4, 0)]}, "seed_points: expected pixels inside"),
        ({"sigma": -1}, "sigma: expected a smoothing of at least 0"),
    ],
)
def test_colour_region_errors(kwargs, match):
    args = {"image": np.zeros((4, 4, 3), np.uint8), **kwargs}
    image = args.pop("image")
    with pytest.raises(ValueError, match=match):
        colour_regions(image, **args)


def test_edge_pixels_go_to_the_nearest_colour_side_like_a_slow_loop():
    from labeler.masks.colour_regions import _nearest_colour_side

    rng = np.random.default_rng(3)
    image = rng.integers(0, 256, size=(9, 10, 3), dtype=np.uint8)
    regions = rng.integers(1, 4, size=(9, 10)).astype(np.int32)
    markers = np.where(rng.random((9, 10)) < 0.4, regions, 0).astype(np.int32)
    markers[0, 0], markers[0, 1], markers[0, 2] = 1, 2, 3  # every region has a marker
    inside = np.ones((9, 10), bool)
    lab = rgb2lab(image)
    table = np.zeros((4, 3))
    for k in (1, 2, 3):
        table[k] = lab[markers == k].mean(axis=0)
    got = _nearest_colour_side(lab, regions, markers, table, inside)
    means = {k: lab[markers == k].mean(axis=0) for k in (1, 2, 3)}
    expected = regions.copy()
    for r in range(9):
        for c in range(10):
            if markers[r, c]:
                continue
            best, best_d = None, np.inf
            for dr, dc in ((0, 0), (-1, 0), (1, 0), (0, -1), (0, 1)):  # same order as the code
                q = (r + dr, c + dc)
                if 0 <= q[0] < 9 and 0 <= q[1] < 10:
                    d = np.linalg.norm(means[regions[q]] - lab[r, c])
                    if d < best_d:
                        best, best_d = regions[q], d
            expected[r, c] = best
    np.testing.assert_array_equal(got, expected)


# ------------------------------------------------------------------ the plant/soil split
def test_no_split_region_crosses_the_split_like_a_slow_check():
    rng = np.random.default_rng(11)
    for _ in range(5):
        image = rng.integers(0, 256, size=(14, 15, 3), dtype=np.uint8)
        veg = rng.random((14, 15)) < 0.4
        regions = split_regions(image, vegetation=veg)
        assert (regions > 0).all()
        # slow loop: every region's pixels lie on one side of the split
        for k in np.unique(regions):
            sides = {bool(veg[r, c]) for r, c in zip(*np.nonzero(regions == k), strict=True)}
            assert len(sides) == 1


def test_split_of_a_disc_scene_is_the_disc_and_the_soil():
    plant = disc((40, 40), (20, 20), 8)
    image = plant_scene((40, 40), [plant])
    regions = split_regions(image, vegetation=plant)
    assert len(np.unique(regions[plant])) == 1 and len(np.unique(regions[~plant])) == 1
    assert regions[plant][0] != regions[~plant][0]
    within = np.zeros((40, 40), bool)
    within[:20] = True
    assert (split_regions(image, vegetation=plant, within=within)[~within] == 0).all()


def test_split_regions_errors():
    image = np.zeros((4, 4, 3), np.uint8)
    with pytest.raises(ValueError, match=r"vegetation: expected a bool array of shape \(4, 4\)"):
        split_regions(image, vegetation=np.zeros((4, 4), np.uint8))
    with pytest.raises(ValueError, match=r"within: expected shape \(4, 4\)"):
        split_regions(image, vegetation=np.zeros((4, 4), bool), within=np.ones((3, 4), bool))
