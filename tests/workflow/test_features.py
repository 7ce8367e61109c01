"""Encoder features of tiles for proposing: tiles cut from a block read once equal tiles
read one by one; the encoder is built once per process for the same version."""

import numpy as np
import pytest

from labeler.imagery.read import open_image
from labeler.imagery.tiling import Window
from labeler.model.cache import FeatureCache
from labeler.workflow.features import encoder_and_cache, tile_features


def _union(tiles):
    r0 = min(t.row for t in tiles)
    c0 = min(t.col for t in tiles)
    return Window(
        r0, c0, max(t.row + t.height for t in tiles) - r0, max(t.col + t.width for t in tiles) - c0
    )


def test_tiles_cut_from_a_block_equal_tiles_read_alone(project, tmp_path):
    encoder, _ = encoder_and_cache(project)
    im = project.store.images()[0]
    tiles = project.store.tiles(image_id=im.id)  # 2 x 3 overlapping tiles of 300 x 500
    block = _union(tiles)
    with open_image(project.image_path(im)) as reader:
        alone = tile_features(
            FeatureCache(tmp_path / "a", encoder_version=encoder.version),
            encoder,
            reader,
            im,
            tiles,
        )
        cut = tile_features(
            FeatureCache(tmp_path / "b", encoder_version=encoder.version),
            encoder,
            reader,
            im,
            tiles,
            block=(reader.read(block), block),
        )
    for a, b in zip(alone, cut, strict=True):
        for la, lb in zip(a, b, strict=True):
            np.testing.assert_array_equal(la, lb)  # same pixels, same batches: exact


def test_a_block_that_misses_a_tile_is_refused(project, tmp_path):
    encoder, cache = encoder_and_cache(project)
    im = project.store.images()[0]
    tiles = project.store.tiles(image_id=im.id)
    small = Window(0, 0, 256, 256)
    with open_image(project.image_path(im)) as reader:
        rgb = reader.read(small)
        with pytest.raises(
            ValueError, match=r"block: window \(0, 0, 256, 256\) does not hold tile"
        ):
            tile_features(cache, encoder, reader, im, tiles, block=(rgb, small))
        with pytest.raises(ValueError, match="do not match the window"):
            tile_features(cache, encoder, reader, im, tiles[:1], block=(rgb[:10], small))


def test_the_encoder_is_built_once_per_version(project):
    first, cache_a = encoder_and_cache(project)
    again, cache_b = encoder_and_cache(project, encoder="imagenet")
    same, _ = encoder_and_cache(project)
    by_version, _ = encoder_and_cache(project, encoder=first.version)  # as a head names it
    assert same is first and by_version is first  # a retrain and the renewal share one
    assert again.version == first.version and cache_a.folder == cache_b.folder
