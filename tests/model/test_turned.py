"""Features of the turned tiles: exact (the features of the turned tile itself), cached once."""

import numpy as np
import pytest
import torch

from labeler.model.augment import dihedral
from labeler.model.cache import FeatureCache
from labeler.model.encoder import encode_tiles, feature_shapes
from labeler.model.turned import (
    MAX_VIEWS,
    choose_turns,
    turn_array,
    turn_key,
    turned_features,
    turns_per_tile,
)
from tests.model.conftest import disk_tiles


def test_turn_array_is_the_numpy_twin_of_dihedral():
    a = np.arange(12, dtype=np.uint8).reshape(3, 4)  # asymmetric
    rgb = np.random.default_rng(0).integers(0, 256, (3, 4, 3), dtype=np.uint8)
    for code in range(8):
        # slow reference: numpy's rot90 (first axis towards the second) and fliplr
        want = np.rot90(a, code % 4)
        if code >= 4:
            want = np.fliplr(want)
        np.testing.assert_array_equal(turn_array(a, code), want)
        # the torch twin used on masks and pixels during training
        np.testing.assert_array_equal(dihedral(torch.from_numpy(a), code).numpy(), want)
        # an image turns like its mask, channel by channel
        got = turn_array(rgb, code)
        assert got.flags.c_contiguous
        for c in range(3):
            np.testing.assert_array_equal(got[..., c], turn_array(rgb[..., c], code))


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (
            lambda: turn_array(np.zeros((2, 2)), 8),
            r"code: expected a flip/turn code in 0..7, got 8",
        ),
        (
            lambda: turn_array(np.zeros(3), 1),
            r"a: expected an array \(H, W, ...\), got shape \(3,\)",
        ),
        (lambda: turn_key("k", -1), r"code: expected a flip/turn code in 0..7, got -1"),
        (lambda: turns_per_tile(-1), r"n_tiles, max_views: expected n_tiles >= 0"),
        (lambda: choose_turns(0, np.random.default_rng(0)), r"per_tile: expected 1..8 turns"),
    ],
)
def test_bad_arguments_are_refused(call, match):
    with pytest.raises(ValueError, match=match):
        call()


def test_turn_keys_keep_the_tile_itself_under_its_own_key():
    assert turn_key("abc:0:0:256:256", 0) == "abc:0:0:256:256"
    assert turn_key("abc:0:0:256:256", 5) == "abc:0:0:256:256|turn5"


@pytest.mark.parametrize(
    ("n", "want"),
    # worked by hand: MAX_VIEWS // n clipped to 1..8 (800 // 12 = 66 -> 8,
    # 800 // 100 = 8, 800 // 101 = 7, 800 // 200 = 4, 800 // 1000 = 0 -> 1)
    [(0, 8), (12, 8), (100, 8), (101, 7), (200, 4), (400, 2), (1000, 1), (5000, 1)],
)
def test_turns_per_tile_fall_as_the_label_set_grows(n, want):
    assert MAX_VIEWS == 800
    assert turns_per_tile(n) == want


def test_choose_turns_always_keeps_the_tile_itself_and_repeats_with_the_seed():
    for k in range(1, 9):
        codes = choose_turns(k, np.random.default_rng(3))
        assert len(codes) == k and codes[0] == 0 and list(codes) == sorted(set(codes))
        assert codes == choose_turns(k, np.random.default_rng(3))
    assert choose_turns(8, np.random.default_rng(0)) == tuple(range(8))


def test_cached_turns_equal_the_features_of_the_turned_tiles(tmp_path, encoder):
    # exactness: the entry of turn c is the encoder's output on the turned tile, not the
    # turned feature maps of the tile (the encoder is not equivariant to turns)
    images, _ = disk_tiles(2, size=64, seed=4)
    images.append(np.random.default_rng(5).integers(0, 256, (64, 96, 3), dtype=np.uint8))
    keys = ["a:0:0:64:64", "b:0:0:64:64", "c:0:0:64:96"]
    cache = FeatureCache(tmp_path, encoder_version=encoder.version)
    got = turned_features(cache, encoder, keys, images, range(8))
    assert cache.misses == 24 and cache.hits == 0
    for im, per_tile in zip(images, got, strict=True):
        assert sorted(per_tile) == list(range(8))
        turned = [turn_array(im, code) for code in range(8)]
        # the same batches as the cache made (float sums depend on the batch), so exact
        want = encode_tiles(encoder, turned, batch_size=8)
        for code, feats in per_tile.items():
            shape = turned[code].shape[:2]
            assert [f.shape for f in feats] == [tuple(s) for s in feature_shapes(*shape)]
            for f, w in zip(feats, want[code], strict=True):
                np.testing.assert_array_equal(f, w)
    # the turned feature maps of the tile are not those features
    plain = torch.from_numpy(got[0][0][0].astype(np.float32))
    assert not torch.equal(dihedral(plain, 1), torch.from_numpy(got[0][1][0].astype(np.float32)))


def test_second_call_reads_the_cache_and_encodes_nothing(tmp_path, pooling_encoder):
    images, _ = disk_tiles(3, size=32, seed=1)
    keys = [f"t{i}:0:0:32:32" for i in range(3)]
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    first = turned_features(cache, pooling_encoder, keys, images, (0, 3, 6))
    calls = pooling_encoder.calls
    again = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    second = turned_features(again, pooling_encoder, keys, images, (0, 3, 6))
    assert pooling_encoder.calls == calls and again.hits == 9 and again.misses == 0
    for a, b in zip(first, second, strict=True):
        for code in (0, 3, 6):
            for x, y in zip(a[code], b[code], strict=True):
                np.testing.assert_array_equal(x, y)
    # turn 0 is the tile's own entry, the one propose caches
    own = again.load(keys[0], tile_shape=(32, 32))
    np.testing.assert_array_equal(own[0], second[0][0][0])


def test_images_and_keys_must_pair_up(tmp_path, pooling_encoder):
    cache = FeatureCache(tmp_path, encoder_version=pooling_encoder.version)
    with pytest.raises(ValueError, match=r"images: expected one tile per key \(2\), got 1"):
        turned_features(cache, pooling_encoder, ["a", "b"], [np.zeros((8, 8, 3), np.uint8)], (0,))
