"""Encoder features of tiles, shared by proposing and retraining.

Both stages run an encoder version (the installed ImageNet-1k encoder of
:mod:`labeler.model.encoder`, or one adapted to the project's tiles by ``labeler adapt``,
:mod:`labeler.workflow.encoders`; the newest by default, the head's own when proposing with
a head: :func:`head_encoder`) over tiles and keep the multi-scale features in the project's feature cache under ``<project>/cache/features``,
keyed by the image's content hash and the tile's window, so a tile is encoded once per
encoder version. A head trained with fine-tuned encoder stages reads the features of its
own encoder version: :func:`load_head` rebuilds those stages on the installed encoder
and :func:`head_features` derives the head's features from the cached ones through them
(the cache holds the installed encoder's features only). The model room is imported only
when a function here is called.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

import numpy as np

from labeler.errors import LabelerError
from labeler.imagery.read import ImageReader
from labeler.imagery.tiling import Window
from labeler.project import Project
from labeler.store.records import ImageRecord, ModelVersionRecord, TileRecord

if TYPE_CHECKING:  # the model room is imported only when a function here is called
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import Lite0Encoder

__all__ = [
    "tile_key",
    "read_checkpoint",
    "encoder_and_cache",
    "head_encoder",
    "tile_features",
    "load_head",
    "head_features",
]


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


def encoder_and_cache(
    project: Project,
    *,
    encoder: str | None = None,
    unknown_is_default: bool = False,
    precision: str = "float32",
) -> tuple[Lite0Encoder, FeatureCache]:
    """The encoder of a version and the project's feature cache for it.

    Sets the number of torch threads from the ``model.threads`` setting first.

    Parameters
    ----------
    project : Project
        An open project.
    encoder : str, optional
        Which encoder version (:func:`labeler.workflow.encoders.find_encoder_version`:
        a name such as ``"encoder-2"``, a version string, or ``"imagenet"``); default the
        newest adapted version (``labeler adapt``), else the installed ImageNet encoder.
    unknown_is_default : bool
        Use the default when ``encoder`` names no version of the project (a head of
        an unknown encoder: :func:`load_head` then names the mismatch) instead of
        raising.
    precision : {"float32", "bfloat16", "auto"}
        Arithmetic of the encoder (:func:`labeler.model.encoder.resolve_precision`;
        ``labeler propose`` passes the ``model.precision`` setting; training keeps the
        float32 default). The encoder version is the same in either; a float32 cache
        reads float32 entries only, a bfloat16 one both (:mod:`labeler.model.cache`).

    Returns
    -------
    encoder : labeler.model.encoder.Lite0Encoder
        The frozen encoder.
    cache : labeler.model.cache.FeatureCache
        The cache under ``<project>/cache/features`` keyed by the encoder's version.

    Raises
    ------
    LabelerError
        If ``encoder`` names no version of the project or its weights cannot be read.
    """
    from labeler.model.cache import FeatureCache
    from labeler.model.runtime import configure_threads
    from labeler.workflow.encoders import find_encoder_version, load_encoder_version

    configure_threads(project.settings.model.threads)
    if encoder is not None and unknown_is_default:
        try:
            find_encoder_version(project, encoder)
        except LabelerError:
            encoder = None
    from labeler.model.encoder import resolve_precision, with_precision

    arithmetic = resolve_precision(precision)
    key = _encoder_key(project, encoder, find_encoder_version(project, encoder))
    model = _LAST_ENCODER.get((key, arithmetic))
    if model is None:
        other = next((m for (k, _), m in _LAST_ENCODER.items() if k == key), None)
        if other is None:
            model = load_encoder_version(project, encoder)
            _LAST_ENCODER.clear()  # one encoder kept (in up to two precisions)
        else:  # the same weights in the other precision: a converted copy, not a reload
            model = copy.deepcopy(other)
        model = with_precision(model, arithmetic)
        _LAST_ENCODER[(key, arithmetic)] = model
    cache = FeatureCache(
        project.cache_dir / "features", encoder_version=model.version, precision=arithmetic
    )
    return model, cache


#: The last encoder :func:`encoder_and_cache` built, by :func:`_encoder_key` and precision:
#: a retrain and the renewal of the proposals that follows it in one process build it once.
_LAST_ENCODER: dict[tuple, Lite0Encoder] = {}


def _encoder_key(project: Project, which: str | None, record) -> tuple:
    """What identifies a loaded encoder: the project, the version asked for, and the
    weights file of an adapted version (path, size, modification time: a file replaced
    since is loaded and checked again)."""
    if record is None:  # the installed ImageNet encoder, by name, by version or by default
        from labeler.workflow.encoders import IMAGENET

        installed = (str(project.root), IMAGENET, None)
        held = next((m for (k, _), m in _LAST_ENCODER.items() if k == installed), None)
        if which in (None, IMAGENET) or (held is not None and held.version == which):
            return installed
        return (str(project.root), which, None)
    try:
        path = project.resolve(record.checkpoint or "", what=f"weights of encoder {record.name}")
        st = path.stat()
        stamp = (str(path), st.st_size, st.st_mtime_ns)
    except (OSError, LabelerError):
        stamp = None  # load_encoder_version names the problem
    return (str(project.root), which, record.id, record.encoder_version, stamp)


def head_encoder(model: ModelVersionRecord) -> str | None:
    """The encoder version whose features a head's tuned stages (if any) start from.

    Parameters
    ----------
    model : ModelVersionRecord
        A model version of kind ``"head"``.

    Returns
    -------
    str or None
        The base encoder version the retrain recorded (``details["base_encoder_version"]``,
        else the row's ``encoder_version``); None when the row records none.
    """
    details = model.details or {}
    return details.get("base_encoder_version") or model.encoder_version


def tile_features(
    cache,
    encoder,
    reader: ImageReader,
    image: ImageRecord,
    tiles: Sequence[TileRecord],
    *,
    progress: Callable[[int, int], None] | None = None,
    block: tuple[np.ndarray, Window] | None = None,
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
    block : (ndarray, Window), optional
        Pixels ``(h, w, 3)`` uint8 already read of a window that holds every tile: the
        tiles are cut from them instead of read again (overlapping tiles share pixels).

    Returns
    -------
    list of tuple of 4 ndarray
        Per tile, in order, its four float16 feature maps at strides 4, 8, 16 and 32,
        each of shape (C, ceil(H / stride), ceil(W / stride)).

    Raises
    ------
    ValueError
        If ``block`` does not hold a tile.
    """
    keys = [tile_key(image, t) for t in tiles]
    windows = {k: t.window for k, t in zip(keys, tiles, strict=True)}
    if block is None:
        pixels = reader.read
    else:
        rgb, win = block
        if tuple(rgb.shape[:2]) != (win.height, win.width):
            raise ValueError(
                f"block: pixels of shape {rgb.shape} do not match the window {win.as_tuple()}"
            )
        for t in tiles:
            w = t.window
            if not (
                win.row <= w.row
                and win.col <= w.col
                and w.row + w.height <= win.row + win.height
                and w.col + w.width <= win.col + win.width
            ):
                raise ValueError(
                    f"block: window {win.as_tuple()} does not hold tile {t.id} {w.as_tuple()}"
                )

        def pixels(w: Window) -> np.ndarray:
            return np.ascontiguousarray(
                rgb[
                    w.row - win.row : w.row - win.row + w.height,
                    w.col - win.col : w.col - win.col + w.width,
                ]
            )

    return cache.get_or_compute(
        keys,
        lambda ks: [pixels(windows[k]) for k in ks],
        encoder,
        tile_shapes=[t.shape for t in tiles],
        progress=progress,
    )


def read_checkpoint(project: Project, model: ModelVersionRecord):
    """Load the checkpoint of a head model version, with the one message when it fails.

    Parameters
    ----------
    project : Project
        An open project.
    model : ModelVersionRecord
        A model version of kind ``"head"``.

    Returns
    -------
    head : labeler.model.head.ProposalHead
    meta : labeler.model.checkpoint.CheckpointMeta
        What was saved with it (encoder version, tuned stages, ...).
    path : Path
        This machine's copy of the checkpoint (written from the database when new).

    Raises
    ------
    LabelerError
        If the checkpoint is missing or unreadable (the message says to retrain).
    """
    from labeler.model.checkpoint import load_checkpoint

    try:  # the weights the database keeps (read in from this machine's file if older)
        data = project.model_weights(model)
    except LabelerError as exc:
        raise LabelerError(f"cannot load the model {model.name} ({exc})") from None
    try:
        head, meta = load_checkpoint(f"model {model.name} in the database", data=data)
    except (OSError, ValueError, RuntimeError) as exc:
        raise LabelerError(
            f"cannot load the model {model.name} ({exc}); run 'labeler retrain'"
        ) from None
    path = project.model_file(model, data=data)
    return head, meta, path


def load_head(project: Project, model: ModelVersionRecord, encoder):
    """The head of a model version and the encoder stages it was fine-tuned with.

    Parameters
    ----------
    project : Project
        An open project.
    model : ModelVersionRecord
        A model version of kind ``"head"``.
    encoder : labeler.model.encoder.Lite0Encoder
        The installed encoder (:func:`encoder_and_cache`).

    Returns
    -------
    head : labeler.model.head.ProposalHead
    tail : labeler.model.tail.EncoderTail or None
        The fine-tuned encoder stages, or None when the head reads the installed
        encoder's features as they are.

    Raises
    ------
    LabelerError
        If the checkpoint is missing or unreadable, or the head was trained on another
        encoder version than the installed encoder (or a tuned version of it); the
        message says to retrain.
    """
    from labeler.model.tail import tail_from_state

    head, meta, path = read_checkpoint(project, model)
    try:
        tail = tail_from_state(encoder, meta.encoder_tail) if meta.encoder_tail else None
    except (OSError, ValueError, RuntimeError) as exc:
        raise LabelerError(
            f"{path}: cannot load the model {model.name} ({exc}); run 'labeler retrain'"
        ) from None
    reads = tail.version if tail is not None else encoder.version
    if meta.encoder_version != reads:
        raise LabelerError(
            f"model {model.name} was trained on encoder {meta.encoder_version}, the installed "
            f"encoder gives {reads}; run 'labeler retrain'"
        )
    return head, tail


def head_features(tail, features: Sequence) -> list:
    """The features a head reads: the cached ones, or those of its tuned encoder version.

    Parameters
    ----------
    tail : labeler.model.tail.EncoderTail or None
        From :func:`load_head`.
    features : sequence of tuples of 4 ndarray
        The installed encoder's features of the tiles (:func:`tile_features`).

    Returns
    -------
    list of tuple of 4 ndarray
        ``features`` unchanged without a tail, else with the tuned stages' levels.
    """
    if tail is None:
        return list(features)
    from labeler.model.tail import tail_features

    return tail_features(tail, features)
