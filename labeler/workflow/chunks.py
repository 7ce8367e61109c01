"""One chunk of proposals, made wherever the chunk is sent (a cluster worker, or here).

A chunk is one block of tiles of one image (:func:`labeler.workflow.proposing._blocks`,
the same blocks the local ``propose`` makes, so the crop rows of the cold start are found
on the same pixels). :class:`ProposeChunk` holds everything a worker needs and nothing
it cannot reach: the image's path (the image must be reachable at that path on the
worker, e.g. the same network mount), the tiles' windows, the settings, the path of the
head checkpoint and the encoder version the client expects. :func:`propose_chunk` reads
the block, encodes the tiles through a feature cache on the worker, runs the cold start
or the head with the same functions as the local ``propose`` and returns
:class:`ChunkResult`: per tile the mask as PNG bytes, the uncertainty maps, the
embedding and the tile scalars. The client turns them back into store items with
:func:`new_proposals` and is the only one that writes to the store.

Nothing here imports Dask: the dispatch is :mod:`labeler.workflow.cluster`.
"""

from __future__ import annotations

import functools
import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from labeler.errors import InputError, LabelerError
from labeler.imagery.read import open_image
from labeler.imagery.tiling import Window
from labeler.imagery.write import png_bytes, png_decode
from labeler.settings import Settings
from labeler.store import NewProposal
from labeler.store.records import ImageRecord, TileRecord
from labeler.workflow.features import tile_features
from labeler.workflow.proposing import _block_proposals

__all__ = [
    "ProposeChunk",
    "ProposedTile",
    "ChunkResult",
    "propose_chunk",
    "new_proposals",
    "worker_cache_folder",
]

#: Folder of a worker's feature cache when ``cluster.worker_cache`` is not set.
DEFAULT_CACHE_NAME = "labeler-features"


@dataclass(frozen=True)
class ProposeChunk:
    """What a worker needs to propose one block of tiles.

    Attributes
    ----------
    image : ImageRecord
        The tiles' image (its SHA-256 keys the feature cache).
    image_path : str
        Absolute path of the image file, as the client sees it; workers must see it too.
    block : Window
        The block of the image that holds every tile.
    tiles : tuple of TileRecord
        The tiles to propose, all inside ``block``.
    settings : Settings
        The project's settings (cold start, model, classes).
    head_path : str or None
        Absolute path of the head checkpoint; None for the cold start.
    encoder_version : str
        The client's encoder version; a worker with another one refuses the chunk.
    cache_folder : str
        The feature-cache folder on the worker ("" = :func:`worker_cache_folder`).
    threads : int
        Torch threads on the worker (0 = one per core).
    """

    image: ImageRecord
    image_path: str
    block: Window
    tiles: tuple[TileRecord, ...]
    settings: Settings
    head_path: str | None
    encoder_version: str
    cache_folder: str = ""
    threads: int = 0


@dataclass(frozen=True)
class ProposedTile:
    """One tile's proposal as sent back over the network.

    Attributes
    ----------
    tile_id : int
    mask_png : bytes
        The (H, W) uint8 class-index mask as PNG.
    uncertainty : ndarray of shape (3, h, w), float16, or None
        Entropy, margin and BALD maps (None for the cold start).
    embedding : ndarray of shape (D,), float32, or None
        The pooled encoder embedding.
    mean_entropy, mean_margin, mean_bald, mean_least_confidence : float or None
        Tile means (None for the cold start).
    class_fractions : tuple of float or None
        Share of the mask's pixels per schema class.
    """

    tile_id: int
    mask_png: bytes
    uncertainty: np.ndarray | None
    embedding: np.ndarray | None
    mean_entropy: float | None
    mean_margin: float | None
    mean_bald: float | None
    mean_least_confidence: float | None
    class_fractions: tuple[float, ...] | None


@dataclass(frozen=True)
class ChunkResult:
    """The proposals of one chunk and the worker's feature-cache figures.

    Attributes
    ----------
    tiles : tuple of ProposedTile
        In the chunk's tile order.
    cache_hits, cache_misses : int
        Tiles whose features came from the worker's cache, and tiles encoded.
    """

    tiles: tuple[ProposedTile, ...]
    cache_hits: int
    cache_misses: int


def worker_cache_folder(setting: str = "") -> Path:
    """The feature-cache folder of this machine.

    Parameters
    ----------
    setting : str
        The ``cluster.worker_cache`` setting; "" means ``<temporary folder>/labeler-features``.

    Returns
    -------
    Path
    """
    return Path(setting) if setting else Path(tempfile.gettempdir()) / DEFAULT_CACHE_NAME


@functools.cache
def _encoder():
    """The installed encoder, loaded once per worker process."""
    from labeler.model.encoder import load_encoder

    return load_encoder()


#: Adapted encoders sent by the client, by version (the last one, per worker process).
_ADAPTED: dict[str, object] = {}


def _adapted_encoder(version: str, weights: bytes):
    """The adapted encoder of ``version`` from the weights the client sent, loaded once."""
    encoder = _ADAPTED.get(version)
    if encoder is None:
        from labeler.model.adapted import inference_encoder_from_bytes

        try:
            encoder = inference_encoder_from_bytes(weights, source=f"encoder {version}")
        except ValueError as exc:
            raise LabelerError(str(exc)) from None
        _ADAPTED.clear()
        _ADAPTED[version] = encoder
    return encoder


@functools.lru_cache(maxsize=2)
def _head(path: str, size: int, mtime_ns: int):
    """The head checkpoint at ``path`` (reloaded when its size or time changes)."""
    from labeler.model.checkpoint import load_checkpoint

    return load_checkpoint(path)


def _load_head(path: str, *, encoder_version: str):
    try:
        st = os.stat(path)
        head, meta = _head(path, st.st_size, st.st_mtime_ns)
    except (OSError, ValueError, RuntimeError) as exc:
        raise LabelerError(
            f"{path}: this worker cannot load the head checkpoint ({exc}); the project folder "
            "must be reachable at the same path on every worker"
        ) from None
    if meta.encoder_version != encoder_version:
        raise LabelerError(
            f"{path}: the head was trained on encoder {meta.encoder_version}, this worker's "
            f"encoder is {encoder_version}; run 'labeler retrain'"
        )
    return head


def propose_chunk(chunk: ProposeChunk, *, encoder_weights: bytes | None = None) -> ChunkResult:
    """Propose the tiles of one chunk (runs on a worker; reads, never writes the store).

    Parameters
    ----------
    chunk : ProposeChunk
        The block, its tiles and what to propose them with.
    encoder_weights : bytes, optional
        The weights file of the adapted encoder version ``chunk.encoder_version``
        (``labeler adapt``), sent by the client; None: the installed ImageNet encoder.

    Returns
    -------
    ChunkResult
        One :class:`ProposedTile` per tile, in order; the same masks and figures the
        local ``propose`` makes for these tiles with the same number of torch threads
        (with another number the sums run in another order: equal to float rounding).

    Raises
    ------
    LabelerError
        If the worker's encoder differs from the client's, the image file is not
        reachable or changed size, or the head checkpoint cannot be loaded.
    """
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import precision_of, resolve_precision, with_precision
    from labeler.model.runtime import configure_threads

    configure_threads(chunk.threads)
    encoder = (
        _encoder()
        if encoder_weights is None
        else _adapted_encoder(chunk.encoder_version, encoder_weights)
    )
    # the model.precision setting, judged by this worker's CPU (the version is the same)
    with_precision(encoder, resolve_precision(chunk.settings.model.precision))
    if encoder.version != chunk.encoder_version:
        raise LabelerError(
            f"this worker's encoder is {encoder.version}, the client's {chunk.encoder_version}; "
            "install the same labeler version on every worker"
        )
    head = (
        None
        if chunk.head_path is None
        else _load_head(chunk.head_path, encoder_version=encoder.version)
    )
    cache = FeatureCache(
        worker_cache_folder(chunk.cache_folder),
        encoder_version=encoder.version,
        precision=precision_of(encoder),
    )
    path = chunk.image_path
    if not os.path.isfile(path):
        raise InputError(
            f"{path}: the image {chunk.image.name!r} is not reachable on this worker; mount "
            "the project's images at the same path on every worker"
        )
    with open_image(path) as reader:
        if reader.info.shape != chunk.image.shape:
            raise InputError(
                f"{path}: size {reader.info.shape} on this worker differs from the stored "
                f"{chunk.image.shape}; the image file was changed after it was added"
            )
        feats = tile_features(cache, encoder, reader, chunk.image, chunk.tiles)
        items = _block_proposals(
            reader.read(chunk.block),
            chunk.block,
            chunk.tiles,
            feats,
            head=head,
            settings=chunk.settings,
        )
    return ChunkResult(
        tiles=tuple(_wire(p) for p in items),
        cache_hits=cache.hits,
        cache_misses=cache.misses,
    )


def _wire(p: NewProposal) -> ProposedTile:
    """A store item as it travels back: the mask as PNG, arrays in their stored types."""
    return ProposedTile(
        tile_id=p.tile_id,
        mask_png=png_bytes(np.asarray(p.mask, np.uint8)),
        uncertainty=None if p.uncertainty is None else np.asarray(p.uncertainty, np.float16),
        embedding=None if p.embedding is None else np.asarray(p.embedding, np.float32),
        mean_entropy=p.mean_entropy,
        mean_margin=p.mean_margin,
        mean_bald=p.mean_bald,
        mean_least_confidence=p.mean_least_confidence,
        class_fractions=None
        if p.class_fractions is None
        else tuple(float(v) for v in p.class_fractions),
    )


def new_proposals(tiles: Sequence[ProposedTile]) -> list[NewProposal]:
    """Store items of tiles sent back by workers (the masks decoded from PNG).

    Parameters
    ----------
    tiles : sequence of ProposedTile

    Returns
    -------
    list of NewProposal
        In order.
    """
    return [
        NewProposal(
            tile_id=t.tile_id,
            mask=png_decode(t.mask_png),
            uncertainty=t.uncertainty,
            embedding=t.embedding,
            mean_entropy=t.mean_entropy,
            mean_margin=t.mean_margin,
            mean_bald=t.mean_bald,
            mean_least_confidence=t.mean_least_confidence,
            class_fractions=None if t.class_fractions is None else list(t.class_fractions),
        )
        for t in tiles
    ]
