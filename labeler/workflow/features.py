"""Encoder features of tiles, shared by proposing and retraining.

Both stages run the installed encoder (:mod:`labeler.model.encoder`) over tiles and keep
the multi-scale features in the project's feature cache under ``<project>/cache/features``,
keyed by the image's content hash and the tile's window, so a tile is encoded once per
encoder version. The model room is imported only when a function here is called.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

from labeler.imagery.read import ImageReader
from labeler.project import Project
from labeler.store.records import ImageRecord, TileRecord

if TYPE_CHECKING:  # the model room is imported only when a function here is called
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import Lite0Encoder

__all__ = ["tile_key", "encoder_and_cache", "tile_features"]


def tile_key(image: ImageRecord, tile: TileRecord) -> str:
    """Feature-cache key of a tile.

    Parameters
    ----------
    image : ImageRecord
        The tile's image.
    tile : TileRecord
        The tile.

    Returns
    -------
    str
        ``"<image sha256>:<row>:<col>:<height>:<width>"``.
    """
    return f"{image.sha256}:{tile.row}:{tile.col}:{tile.height}:{tile.width}"


def encoder_and_cache(project: Project) -> tuple[Lite0Encoder, FeatureCache]:
    """The installed encoder and the project's feature cache for it.

    Sets the number of torch threads from the ``model.threads`` setting first.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    encoder : labeler.model.encoder.Lite0Encoder
        The frozen encoder.
    cache : labeler.model.cache.FeatureCache
        The cache under ``<project>/cache/features`` keyed by the encoder's version.
    """
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.model.runtime import configure_threads

    configure_threads(project.settings.model.threads)
    encoder = load_encoder()
    cache = FeatureCache(project.cache_dir / "features", encoder_version=encoder.version)
    return encoder, cache


def tile_features(
    cache,
    encoder,
    reader: ImageReader,
    image: ImageRecord,
    tiles: Sequence[TileRecord],
    *,
    progress: Callable[[int, int], None] | None = None,
) -> list:
    """The encoder features of ``tiles`` of one image, from the cache or computed.

    Parameters
    ----------
    cache : labeler.model.cache.FeatureCache
        The project's feature cache (:func:`encoder_and_cache`).
    encoder : labeler.model.encoder.Lite0Encoder
        The encoder the cache belongs to.
    reader : ImageReader
        The open image; only tiles missing from the cache are read.
    image : ImageRecord
        The image record (its hash keys the cache).
    tiles : sequence of TileRecord
        Tiles of ``image``.
    progress : callable, optional
        ``progress(done, total)`` over the tiles that are encoded (not cached).

    Returns
    -------
    list of tuple of 4 ndarray
        Per tile, in order, its four float16 feature maps at strides 4, 8, 16 and 32,
        each of shape (C, ceil(H / stride), ceil(W / stride)).
    """
    keys = [tile_key(image, t) for t in tiles]
    windows = {k: t.window for k, t in zip(keys, tiles, strict=True)}
    return cache.get_or_compute(
        keys,
        lambda ks: [reader.read(windows[k]) for k in ks],
        encoder,
        tile_shapes=[t.shape for t in tiles],
        progress=progress,
    )
