"""Augmentation of head training: flips/turns move features, masks and pixels together."""

import numpy as np
import torch

from labeler.model.augment import can_turn, colour_jitter, dihedral, feature_batch
from tests.common import zoo_four_classes


def test_dihedral_matches_numpy():
    a = np.arange(12).reshape(3, 4)  # asymmetric
    t = torch.from_numpy(a)
    for code in range(8):  # slow reference: numpy's rot90 and fliplr
        want = np.rot90(a, code % 4)
        if code >= 4:
            want = np.fliplr(want)
        np.testing.assert_array_equal(dihedral(t, code).numpy(), want)
    sq = torch.arange(9).reshape(3, 3)
    assert len({tuple(dihedral(sq, c).flatten().tolist()) for c in range(8)}) == 8


def test_can_turn_needs_sides_that_are_multiples_of_32():
    assert can_turn((64, 64)) and can_turn((96, 32))
    assert not can_turn((48, 64)) and not can_turn((64, 30))


def _zoo_tile():
    """32 x 32 four-class tile: its mask, an image whose green encodes the class, features
    whose first stride-4 channel holds the class of each 4 x 4 cell."""
    masks = [np.kron(zoo_four_classes(), np.ones((4, 4), np.uint8))]
    image = np.zeros((32, 32, 3), np.uint8)
    image[..., 1] = masks[0] * 40 + 20
    feats = [
        tuple(np.zeros(s, np.float16) for s in ((24, 8, 8), (40, 4, 4), (112, 2, 2), (320, 1, 1)))
    ]
    feats[0][0][0] = zoo_four_classes().astype(np.float16)  # one value per 4 x 4 cell
    return masks, image, feats


def test_feature_batches_move_pixels_with_masks_and_jitter_only_pixels():
    rng = np.random.default_rng(4)
    masks, image, feats = _zoo_tile()
    shape_of = {0: (32, 32)}
    for _ in range(8):
        levels, target, pixels = feature_batch(
            [0], feats, masks, shape_of, rng, images=[image], jitter=None
        )
        m = target[0].numpy()
        np.testing.assert_array_equal((pixels[0, 1].numpy() - 20) // 40, m)  # same turn
        cells = levels[0][0, 0].numpy()  # stride-4 cells of the class map: same turn
        np.testing.assert_array_equal(cells, m[::4, ::4])
    torch.manual_seed(0)
    levels, target, pixels = feature_batch(
        [0], feats, masks, {0: (30, 30)}, rng, images=[image], jitter=colour_jitter()
    )  # 30 px sides: no turn, only jitter
    np.testing.assert_array_equal(target[0].numpy(), masks[0])
    np.testing.assert_array_equal(levels[0][0].numpy(), feats[0][0].astype(np.float32))
    assert pixels.dtype == torch.uint8 and not np.array_equal(
        pixels[0].permute(1, 2, 0).numpy(), image
    )


def test_feature_batches_without_images_have_no_pixels():
    masks, _, feats = _zoo_tile()
    levels, target, pixels = feature_batch(
        [0], feats, masks, {0: (32, 32)}, np.random.default_rng(0)
    )
    assert pixels is None and len(levels) == 4 and tuple(target.shape) == (1, 32, 32)
