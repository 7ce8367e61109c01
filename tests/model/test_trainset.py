"""Preparing the labelled tiles for training: channel mapping, split, mode, class counts."""

import numpy as np
import pytest

from labeler.errors import InputError
from labeler.model.encoder import feature_shapes
from labeler.model.trainset import prepare_training_set, to_channels
from labeler.settings import ModelSettings
from tests.common import zoo_four_classes, zoo_square, zoo_unlabelled


def _features(shape):
    return tuple(np.zeros(s, np.float16) for s in feature_shapes(*shape))


def _prepare(masks, *, settings, mode="features", features=True, images=None, encoder=None, **kw):
    feats = [_features(np.shape(m)) for m in masks] if features else None
    return prepare_training_set(
        masks,
        class_indices=kw.pop("class_indices", (0, 1, 2, 3)),
        n_classes=4,
        features=feats,
        images=images,
        encoder=encoder,
        settings=settings,
        mode=mode,
        image_mode_max_tiles=kw.pop("image_mode_max_tiles", 24),
        rng=np.random.default_rng(settings.seed),
    )


def test_to_channels_maps_schema_indices_to_head_channels():
    mask = zoo_four_classes()  # classes 0..3 in the four quadrants
    mask[0, 0] = 255
    got = to_channels([mask], (0, 1, 3, 2))[0]  # channel order differs from the index order
    want = np.array([0, 1, 3, 2, 255], np.uint8)[np.where(mask == 255, 4, mask)]
    np.testing.assert_array_equal(got, want)


def test_to_channels_refuses_other_values_and_shapes():
    with pytest.raises(ValueError, match=r"masks: tile 0 holds values \[3\] that are not head"):
        to_channels([zoo_four_classes()], (0, 1, 2))
    with pytest.raises(ValueError, match=r"masks: tile 0 expected a 2-D uint8 class-index mask"):
        to_channels([np.zeros((2, 2), np.int32)], (0, 1))


@pytest.mark.parametrize(
    ("n", "val_share", "n_val"),
    [
        (5, 0.34, 2),  # round(1.7) = 2
        (3, 0.34, 1),  # round(1.02) = 1
        (3, 0.1, 1),  # round(0.3) = 0, raised to the minimum of one tile
        (2, 0.9, 1),  # round(1.8) = 2, capped at n - 1: one tile must train
        (4, 0.0, 0),  # val_share 0: no validation
    ],
)
def test_split_sizes(n, val_share, n_val):
    masks = [zoo_square() for _ in range(n)]
    s = ModelSettings(val_share=val_share, min_labelled_tiles=1, seed=3)
    data = _prepare(masks, settings=s)
    assert len(data.val_ids) == n_val and len(data.train_ids) == n - n_val
    assert sorted(data.train_ids + data.val_ids) == list(range(n))
    assert data.train_ids == sorted(data.train_ids) and data.val_ids == sorted(data.val_ids)


def test_unlabelled_tiles_take_no_part_and_one_tile_does_not_validate():
    masks = [zoo_unlabelled(), zoo_square(), zoo_unlabelled()]
    s = ModelSettings(val_share=0.5, min_labelled_tiles=1)
    data = _prepare(masks, settings=s)
    assert data.train_ids == [1] and data.val_ids == [] and list(data.shape_of) == [1]
    with pytest.raises(InputError, match=r"at least 2 labelled tiles .* got 1; label 1 more"):
        _prepare(masks, settings=ModelSettings(min_labelled_tiles=2))


def test_class_counts_are_the_training_tiles_labelled_pixels():
    # zoo_square: 16 pixels of class 1, 48 of class 0; the unlabelled pixels do not count
    square = zoo_square()
    half = zoo_square()
    half[:4] = 255  # rows 0..3: 32 unlabelled pixels, of which rows 2..3 held 8 of class 1
    s = ModelSettings(val_share=0.0, min_labelled_tiles=1)
    data = _prepare([square, half], settings=s)
    np.testing.assert_array_equal(data.class_counts, [48 + 24, 16 + 8, 0, 0])


def test_groups_never_mix_tile_shapes():
    masks = [zoo_square(), np.zeros((4, 8), np.uint8), zoo_square()]
    data = _prepare(masks, settings=ModelSettings(val_share=0.0, min_labelled_tiles=1))
    assert data.groups == {(8, 8): [0, 2], (4, 8): [1]} and data.val_groups == {}


def test_mode_auto_picks_images_for_small_label_sets_only():
    masks = [zoo_square() for _ in range(4)]
    images = [np.zeros((8, 8, 3), np.uint8) for _ in masks]
    s = ModelSettings(val_share=0.0, min_labelled_tiles=1)

    def enc(x):  # never called: no validation tiles, features given
        raise AssertionError("the encoder runs only for validation tiles without a cache")

    auto = {"mode": "auto", "images": images, "encoder": enc}
    assert _prepare(masks, settings=s, **auto).mode == "images"  # 4 tiles <= 24
    assert _prepare(masks, settings=s, image_mode_max_tiles=3, **auto).mode == "features"
    assert _prepare(masks, settings=s, mode="auto", images=images).mode == "features"  # no encoder
    with pytest.raises(ValueError, match="mode: 'images' needs both images and encoder"):
        _prepare(masks, settings=s, mode="images", images=images)
    with pytest.raises(ValueError, match="features: 'features' mode needs the cached features"):
        _prepare(masks, settings=s, features=False)


def test_inputs_of_the_wrong_length_are_refused():
    masks = [zoo_square() for _ in range(3)]
    s = ModelSettings(min_labelled_tiles=1)
    with pytest.raises(ValueError, match=r"images: expected one entry per mask \(3\), got 1"):
        _prepare(masks, settings=s, images=[np.zeros((8, 8, 3), np.uint8)])
