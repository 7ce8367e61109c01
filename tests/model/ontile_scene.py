"""The hand-made on-tile learning scene, trained once per test session.

Invented and hand-made (common practice, no source): brown soil, green crop disks, yellow
weed disks for training; the tile under test adds purple weeds the head never saw. Shared
by the model's and the editor's on-tile learning tests; :func:`trained_scene` is cached,
so the tiny head is trained once however many modules use it.
"""

import functools

import numpy as np

from labeler.model.encoder import encode_tiles
from labeler.model.train import train_head
from labeler.settings import ModelSettings
from tests.model.conftest import PoolingEncoder

__all__ = ["SIZE", "disk", "scene", "trained_scene"]

SIZE = 64
SOIL, GREEN, YELLOW, PURPLE = (120, 90, 60), (50, 160, 40), (200, 190, 40), (150, 60, 150)


def disk(cy, cx, r):
    yy, xx = np.mgrid[:SIZE, :SIZE]
    return (yy - cy) ** 2 + (xx - cx) ** 2 < r**2


def scene(disks, *, seed):
    """A tile and its truth: ``disks`` is a list of ((cy, cx, r), colour, class)."""
    rng = np.random.default_rng(seed)
    im = np.empty((SIZE, SIZE, 3), np.float64)
    im[:] = SOIL
    truth = np.zeros((SIZE, SIZE), np.uint8)
    for (cy, cx, r), colour, cls in disks:
        d = disk(cy, cx, r)
        im[d] = colour
        truth[d] = cls
    im += rng.normal(0, 4, im.shape)
    return np.clip(im, 0, 255).astype(np.uint8), truth


@functools.cache
def trained_scene():
    """(head, tile features, tile pixels, tile truth) of the scene; trained once."""
    encoder = PoolingEncoder()
    rng = np.random.default_rng(0)
    images, masks = [], []
    for i in range(8):
        cy, cx = rng.integers(12, SIZE - 12, 2)
        wy, wx = (SIZE - 1 - cy, SIZE - 1 - cx)
        im, m = scene([((cy, cx, 9), GREEN, 1), ((wy, wx, 6), YELLOW, 2)], seed=i)
        images.append(im)
        masks.append(m)
    feats = encode_tiles(encoder, images)
    s = ModelSettings(epochs=8, batch_size=4, val_share=0.0, seed=0, min_labelled_tiles=3)
    res = train_head(masks, class_indices=(0, 1, 2), features=feats, images=images,
                     settings=s, mode="features")
    tile, truth = scene(
        [((16, 16, 9), GREEN, 1), ((44, 18, 7), PURPLE, 2), ((40, 46, 7), PURPLE, 2)], seed=99
    )
    return res.head, encode_tiles(encoder, [tile])[0], tile, truth


