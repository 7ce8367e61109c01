"""Weak labels to masks: the band, random walker, superpixel snapping, GrabCut in a box."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage import data, filters, measure
from skimage.morphology import disk

from labeler.masks.refine import (
    grabcut_box,
    refine_random_walker,
    snap_to_superpixels,
    weak_label_band,
)
from tests.masks.scenes import disc, plant_scene, two_hue_scene


def _iou(a: np.ndarray, b: np.ndarray) -> float:
    return float((a & b).sum() / (a | b).sum())


def _coins_case():
    """scikit-image `coins`, a scribble across one coin and one on the background next to it.

    Reference: Otsu's threshold (Otsu 1979, skimage.filters.threshold_otsu) and the connected
    component holding the coin scribble (4-connected, skimage.measure.label).
    """
    grey = data.coins()
    image = np.ascontiguousarray(np.dstack([grey] * 3))
    weak_label = np.full(grey.shape, 255, np.uint8)
    weak_label[49:53, 145:166] = 1  # a cross on the coin centred near (51, 155)
    weak_label[40:62, 153:157] = 1
    weak_label[88:91, 130:181] = 0  # background strip below it
    otsu = grey > filters.threshold_otsu(grey)
    labels = measure.label(otsu, connectivity=1)
    coin = labels == labels[51, 155]
    return image, weak_label, coin


def _reference_loop_band(weak_label, band_px):
    pts = np.argwhere(weak_label != 255)
    out = np.zeros(weak_label.shape, bool)
    for r in range(weak_label.shape[0]):
        for c in range(weak_label.shape[1]):
            out[r, c] = any((r - pr) ** 2 + (c - pc) ** 2 <= band_px**2 for pr, pc in pts)
    return out


def test_band_of_one_pixel_is_skimage_disk():
    s = np.full((11, 11), 255, np.uint8)
    s[5, 5] = 2
    band = weak_label_band(s, band_px=2)
    expected = np.zeros((11, 11), bool)
    expected[3:8, 3:8] = disk(2).astype(bool)  # oracle: skimage.morphology.disk(2), 13 pixels
    np.testing.assert_array_equal(band, expected)
    assert band.sum() == 13


def test_band_matches_slow_loop_and_is_empty_without_marks():
    rng = np.random.default_rng(2)
    s = np.full((14, 15), 255, np.uint8)
    s[rng.integers(0, 14, 4), rng.integers(0, 15, 4)] = 1
    np.testing.assert_array_equal(weak_label_band(s, band_px=3.2), _reference_loop_band(s, 3.2))
    assert not weak_label_band(np.full((4, 4), 255, np.uint8), band_px=5).any()


@pytest.mark.parametrize("mode", ["cg_j", "auto"])
def test_two_scribbles_on_coins_find_the_otsu_coin(mode):
    image, weak_label, coin = _coins_case()
    start = np.zeros(coin.shape, np.uint8)
    refined = refine_random_walker(image, start, weak_label, band_px=32, mode=mode)
    # scikit-image data, Otsu as the reference; threshold from the task: IoU >= 0.9
    assert _iou(refined == 1, coin) >= 0.9


def test_refine_changes_nothing_outside_the_band_and_keeps_marks():
    image, weak_label, _ = _coins_case()
    rng = np.random.default_rng(0)
    start = rng.integers(0, 3, size=weak_label.shape).astype(np.uint8)
    refined = refine_random_walker(image, start, weak_label, band_px=12)
    band = weak_label_band(weak_label, band_px=12)
    np.testing.assert_array_equal(refined[~band], start[~band])
    on = weak_label != 255
    np.testing.assert_array_equal(refined[on], weak_label[on])


def test_refine_of_an_empty_weak_label_is_a_copy():
    image = np.zeros((6, 6, 3), np.uint8)
    mask = np.eye(6, dtype=np.uint8)
    out = refine_random_walker(image, mask, np.full((6, 6), 255, np.uint8))
    np.testing.assert_array_equal(out, mask)
    assert out is not mask


def test_one_class_among_all_seeds_fills_the_band():
    image = np.zeros((9, 9, 3), np.uint8)
    mask = np.full((9, 9), 2, np.uint8)
    s = np.full((9, 9), 255, np.uint8)
    s[4, 4] = 2
    out = refine_random_walker(image, mask, s, band_px=2)
    np.testing.assert_array_equal(out, mask)


def test_two_flat_halves_split_at_the_colour_edge():
    # hand-made: left half dark, right half bright; one scribble each side
    image = np.zeros((20, 20, 3), np.uint8)
    image[:, 10:] = 200
    s = np.full((20, 20), 255, np.uint8)
    s[10, 3] = 1
    s[10, 16] = 2
    out = refine_random_walker(image, np.zeros((20, 20), np.uint8), s, band_px=40)
    expected = np.ones((20, 20), np.uint8)
    expected[:, 10:] = 2
    np.testing.assert_array_equal(out, expected)


def test_snap_moves_a_boundary_onto_the_colour_edge():
    image = np.zeros((24, 24, 3), np.uint8)
    image[:, 12:] = (40, 180, 40)
    mask = np.zeros((24, 24), np.uint8)
    mask[:, 14:] = 1  # two columns short of the edge at 12
    out = snap_to_superpixels(image, mask, region=np.ones((24, 24), bool), n_segments=8,
                              compactness=0.1)
    expected = np.zeros((24, 24), np.uint8)
    expected[:, 12:] = 1
    np.testing.assert_array_equal(out, expected)
    fixed = np.zeros((24, 24), bool)
    np.testing.assert_array_equal(
        snap_to_superpixels(image, mask, region=fixed, n_segments=8), mask
    )


def test_refine_with_snapping_still_finds_the_coin_and_stays_in_the_band():
    image, weak_label, coin = _coins_case()
    start = np.zeros(coin.shape, np.uint8)
    refined = refine_random_walker(image, start, weak_label, band_px=32, snap=True,
                                   n_segments=200)
    band = weak_label_band(weak_label, band_px=32)
    assert not refined[~band].any()
    assert _iou(refined == 1, coin) >= 0.85  # snapping to SLIC cells; common practice, no source


def _disc_image(seed=0):
    rng = np.random.default_rng(seed)
    image = np.empty((96, 96, 3), np.uint8)
    image[:] = (150, 110, 70)  # brown
    r, c = np.indices((96, 96))
    disc = (r - 50) ** 2 + (c - 44) ** 2 <= 20**2
    image[disc] = (50, 160, 60)  # green
    noise = rng.normal(0, 8, image.shape)
    return np.clip(image + noise, 0, 255).astype(np.uint8), disc


def test_grabcut_in_a_box_finds_the_disc():
    image, disc = _disc_image()
    fg = grabcut_box(image, (24, 18, 77, 71))
    # OpenCV's GrabCut as the implementation; IoU >= 0.9 is common practice, no source
    assert _iou(fg, disc) >= 0.9
    inside = np.zeros_like(fg)
    inside[24:77, 18:71] = True
    assert not fg[~inside].any()


def test_grabcut_errors():
    image, _ = _disc_image()
    with pytest.raises(ValueError, match="box: expected at least 2 x 2"):
        grabcut_box(image, (10, 10, 11, 30))
    with pytest.raises(ValueError, match="box: covers the whole tile"):
        grabcut_box(image, (0, 0, 96, 96))
    with pytest.raises(ValueError, match=r"box: expected \(row0, col0, row1, col1\)"):
        grabcut_box(image, (0, 0, 5))
    with pytest.raises(ValueError, match="iterations: expected at least 1"):
        grabcut_box(image, (5, 5, 40, 40), iterations=0)
    with pytest.raises(ValueError, match=r"image: expected a \(H, W, 3\) uint8"):
        grabcut_box(image[:, :, 0], (5, 5, 40, 40))


def test_refine_errors():
    image = np.zeros((6, 6, 3), np.uint8)
    m = np.zeros((6, 6), np.uint8)
    s = np.full((6, 6), 255, np.uint8)
    with pytest.raises(ValueError, match=r"mask: expected a uint8 array of shape \(6, 6\)"):
        refine_random_walker(image, np.zeros((5, 6), np.uint8), s)
    with pytest.raises(ValueError, match="weak_label: expected a uint8 array"):
        refine_random_walker(image, m, s.astype(np.int32))
    with pytest.raises(ValueError, match="mode: expected"):
        refine_random_walker(image, m, s, mode="fast")
    with pytest.raises(ValueError, match="band_px: expected a width"):
        weak_label_band(s, band_px=-1)
    with pytest.raises(ValueError, match="region: expected shape"):
        snap_to_superpixels(image, m, region=np.ones((5, 5), bool))


def test_rim_pixels_without_label_give_no_seed():
    # a 255 rim (no label) must not become a class: the band is decided by the marks
    image = np.zeros((12, 12, 3), np.uint8)
    image[:, 6:] = 255
    mask = np.full((12, 12), 255, np.uint8)
    s = np.full((12, 12), 255, np.uint8)
    s[6, 2], s[6, 9] = 1, 2
    out = refine_random_walker(image, mask, s, band_px=3)
    band = weak_label_band(s, band_px=3)
    assert set(np.unique(out[band]).tolist()) <= {1, 2}
    assert (out[~band] == 255).all()
    assert ndi.label(out == 1)[0].max() >= 1


# ------------------------------------------------------------------ strong colour edges
# Hand-made scenes (tests/masks/scenes.py): a leaf-green plant on brown soil, about 64
# Delta E*ab apart. One weed scribble on the plant must never turn soil beyond the plant's
# edge into weed (common practice, no source: a class stops at a strong colour edge).
def _one_weed_scribble(shape, centre):
    s = np.full(shape, 255, np.uint8)
    s[centre[0], centre[1] - 3 : centre[1] + 4] = 2
    return s


def _soil_turned_weed(out, plant):
    beyond = ~ndi.binary_dilation(plant)  # one pixel of slack on the blended edge
    return int(((out == 2) & beyond).sum())


@pytest.mark.parametrize("snap", [False, True])
def test_weed_scribble_on_a_weak_label_tile_keeps_to_the_plant(snap):
    # the tile holds weak labels only (255 everywhere): no soil seed lies on the band's rim
    plant = disc((64, 64), (32, 32), 9)
    image = plant_scene((64, 64), [plant])
    mask = np.full((64, 64), 255, np.uint8)
    out = refine_random_walker(image, mask, _one_weed_scribble((64, 64), (32, 32)), snap=snap)
    assert _soil_turned_weed(out, plant) == 0
    assert _iou(out == 2, plant) >= 0.9


@pytest.mark.parametrize("snap", [False, True])
def test_weed_scribble_with_a_band_wider_than_the_tile_keeps_to_the_plant(snap):
    # the band covers the whole tile, so there is no rim and no soil seed at all
    plant = disc((40, 40), (20, 20), 8)
    image = plant_scene((40, 40), [plant])
    mask = np.zeros((40, 40), np.uint8)
    out = refine_random_walker(
        image, mask, _one_weed_scribble((40, 40), (20, 20)), band_px=40, snap=snap
    )
    assert _soil_turned_weed(out, plant) == 0
    assert _iou(out == 2, plant) >= 0.9


def test_snapped_weed_scribble_on_soil_mask_keeps_to_the_plant():
    plant = disc((64, 64), (32, 32), 9)
    image = plant_scene((64, 64), [plant])
    mask = np.zeros((64, 64), np.uint8)
    out = refine_random_walker(image, mask, _one_weed_scribble((64, 64), (32, 32)), snap=True)
    assert _soil_turned_weed(out, plant) == 0
    assert _iou(out == 2, plant) >= 0.9


def test_weed_scribble_on_soil_mask_keeps_to_the_plant_without_snapping():
    plant = disc((64, 64), (32, 32), 9)
    image = plant_scene((64, 64), [plant])
    mask = np.zeros((64, 64), np.uint8)
    out = refine_random_walker(image, mask, _one_weed_scribble((64, 64), (32, 32)))
    assert _soil_turned_weed(out, plant) == 0
    assert _iou(out == 2, plant) >= 0.9


def test_weed_scribble_on_a_blurred_plant_takes_the_whole_plant():
    # lens softness blends the edge over a few pixels; the colour region still ends there,
    # so one scribble labels the plant and not only the part near the scribble
    plant = disc((64, 64), (32, 32), 10)
    image = plant_scene((64, 64), [plant], blur_sigma=1.0)
    mask = np.zeros((64, 64), np.uint8)
    out = refine_random_walker(image, mask, _one_weed_scribble((64, 64), (32, 32)), band_px=12)
    assert _soil_turned_weed(out, plant) == 0
    assert _iou(out == 2, plant) >= 0.95


def test_a_second_plant_without_scribble_keeps_its_class():
    first, second = disc((64, 64), (20, 20), 7), disc((64, 64), (40, 40), 7)
    image = plant_scene((64, 64), [first, second])
    mask = np.zeros((64, 64), np.uint8)
    mask[second] = 1  # proposed as crop; the band around the scribble covers it
    weak_label = _one_weed_scribble((64, 64), (20, 20))
    assert weak_label_band(weak_label, band_px=40)[second].all()
    out = refine_random_walker(image, mask, weak_label, band_px=40)
    np.testing.assert_array_equal(out[second], 1)
    assert _iou(out == 2, first) >= 0.9


def test_without_edge_threshold_refine_is_the_plain_random_walker():
    # the weak-label tile of the test above: one class among all seeds fills the band
    plant = disc((64, 64), (32, 32), 9)
    image = plant_scene((64, 64), [plant])
    weak_label = _one_weed_scribble((64, 64), (32, 32))
    mask = np.full((64, 64), 255, np.uint8)
    out = refine_random_walker(image, mask, weak_label, edge_threshold=None)
    band = weak_label_band(weak_label, band_px=24)
    np.testing.assert_array_equal(out, np.where(band, 2, 255).astype(np.uint8))


# ------------------------------------------------------------------ the plant/soil split
# Exact answers on hand-made scenes (common practice, no source): a scribble in a plant's
# core labels that plant, however narrow the band, and never the soil or a touching
# plant of another hue.
def _core_scribble(shape, centre, cls=1):
    s = np.full(shape, 255, np.uint8)
    s[centre[0], centre[1] - 2 : centre[1] + 3] = cls
    return s


@pytest.mark.parametrize("snap", [False, True])
def test_scribble_in_a_disc_core_takes_exactly_the_disc(snap):
    plant = disc((48, 48), (24, 16), 9)
    image = plant_scene((48, 48), [plant])
    empty = np.zeros((48, 48), np.uint8)
    out = refine_random_walker(image, empty, _core_scribble((48, 48), (24, 16)), band_px=3,
                               snap=snap, n_segments=100)
    np.testing.assert_array_equal(out == 1, plant)
    assert (out[~plant] == 0).all()


def test_scribble_in_one_of_two_touching_discs_stays_within_it():
    image, left, right = two_hue_scene()
    empty = np.zeros((48, 48), np.uint8)
    out = refine_random_walker(image, empty, _core_scribble((48, 48), (24, 14), cls=2),
                               band_px=24)
    np.testing.assert_array_equal(out == 2, left)


def test_without_growth_only_the_band_is_decided():
    plant = disc((48, 48), (24, 16), 9)
    image = plant_scene((48, 48), [plant])
    weak_label = _core_scribble((48, 48), (24, 16))
    out = refine_random_walker(image, np.zeros((48, 48), np.uint8), weak_label, band_px=3,
                               grow_max_share=0.0)
    band = weak_label_band(weak_label, band_px=3)
    # the rim inside the disc seeds soil, so the walker splits the band: never beyond it
    assert not ((out == 1) & ~band).any() and (out[weak_label == 1] == 1).all()
    assert (out == 1).sum() < plant.sum()
    with pytest.raises(ValueError, match=r"grow_max_share: expected a share in 0\.\.1"):
        refine_random_walker(image, np.zeros((48, 48), np.uint8), weak_label, grow_max_share=2)
    with pytest.raises(ValueError, match=r"vegetation: expected a bool array of shape \(48, 48\)"):
        refine_random_walker(image, np.zeros((48, 48), np.uint8), weak_label,
                             vegetation=np.zeros((4, 4), bool))
