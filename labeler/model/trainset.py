"""The labelled tiles prepared for head training: checked, mapped, split, grouped.

:func:`prepare_training_set` is the first step of :func:`labeler.model.train.train_head`:

1. the inputs are checked against each other (one feature tuple and one RGB tile per mask,
   of the mask's shape);
2. the masks are mapped from schema class indices to head channels (255 stays
   unlabelled; any other value that is not a head class is refused);
3. the labelled tiles (those with at least one labelled pixel) are split into training
   and validation: a seeded permutation, the first ``round(val_share * n)`` tiles (at
   least one, at most ``n - 1``; none when ``val_share`` is 0 or only one tile is
   labelled) validate;
4. the augmentation mode is resolved (``"auto"``: ``"turns"`` when the turned tiles'
   features are given, else ``"images"`` when images and an encoder are given and at
   most ``image_mode_max_tiles`` tiles train, else ``"features"``);
5. without cached features (``"images"`` mode) the validation tiles are encoded once;
6. in ``"features"`` and ``"turns"`` modes every labelled tile's stride-4 features must
   match its mask (``"turns"``: every tile holds the same turns, each of the turned size);
7. the labelled pixels per class of the training tiles are counted (for the class weights).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import torch

from labeler.classes import UNLABELLED
from labeler.errors import InputError
from labeler.model.encoder import to_input
from labeler.model.head import class_lut
from labeler.settings import ModelSettings

__all__ = ["TrainingSet", "prepare_training_set", "to_channels"]


@dataclass
class TrainingSet:
    """Labelled tiles as the training epochs read them (lists indexed by tile number).

    Attributes
    ----------
    masks : list of ndarray, each (H, W) uint8
        Truth of every input tile as head channel numbers, 255 unlabelled.
    features : sequence of tuples of 4 ndarray
        Encoder features per tile number (in ``"images"`` mode without a cache, only the
        validation tiles' entries are set, the others are None).
    turned : sequence of mappings, or None
        Per tile number ``{code: features of the turned tile}`` (``"turns"`` mode).
    images : sequence of ndarray, each (H, W, 3) uint8, or None
        The tiles' pixels, when given.
    train_ids, val_ids : list of int
        Tile numbers that train and that validate, ascending.
    mode : str
        ``"turns"``, ``"features"`` or ``"images"``.
    shape_of : dict
        ``(H, W)`` of each labelled tile number.
    class_counts : ndarray, shape (K,), int64
        Labelled pixels per head class over the training tiles.
    """

    masks: list[np.ndarray]
    features: Sequence
    images: Sequence[np.ndarray] | None
    train_ids: list[int]
    val_ids: list[int]
    mode: str
    shape_of: dict[int, tuple[int, int]]
    class_counts: np.ndarray
    turned: Sequence[Mapping[int, Sequence[np.ndarray]]] | None = None

    @property
    def groups(self) -> dict[tuple[int, int], list[int]]:
        """Training tile numbers by tile shape (a batch never mixes shapes)."""
        return _by_shape(self.train_ids, self.shape_of)

    @property
    def val_groups(self) -> dict[tuple[int, int], list[int]]:
        """Validation tile numbers by tile shape."""
        return _by_shape(self.val_ids, self.shape_of)

    def groups_of(self, ids: Sequence[int]) -> dict[tuple[int, int], list[int]]:
        """The tile numbers ``ids`` by tile shape."""
        return _by_shape(ids, self.shape_of)


def to_channels(masks: Sequence[np.ndarray], class_indices: Sequence[int]) -> list[np.ndarray]:
    """Schema masks as head channel numbers.

    Parameters
    ----------
    masks : sequence of ndarray, each (H, W) uint8
        Schema class index per pixel, 255 unlabelled.
    class_indices : sequence of int
        Schema index of each head channel.

    Returns
    -------
    channels : list of ndarray, each (H, W) uint8
        Channel number per pixel, 255 unlabelled.

    Raises
    ------
    ValueError
        A mask that is not 2-D uint8, or holds a value that is neither a head class nor 255.
    """
    lut = class_lut(class_indices)
    out = []
    for n, m in enumerate(masks):
        a = np.asarray(m)
        if a.ndim != 2 or a.dtype != np.uint8:
            raise ValueError(
                f"masks: tile {n} expected a 2-D uint8 class-index mask, got {a.dtype} {a.shape}"
            )
        mapped = lut[a]
        if (mapped < 0).any():
            bad = sorted(int(v) for v in np.unique(a[mapped < 0]))
            raise ValueError(
                f"masks: tile {n} holds values {bad} that are not head classes "
                f"{tuple(class_indices)} or 255 (unlabelled); map them to the schema first"
            )
        out.append(mapped.astype(np.uint8))
    return out


def prepare_training_set(
    masks: Sequence[np.ndarray],
    *,
    class_indices: Sequence[int],
    n_classes: int,
    features: Sequence[Sequence[np.ndarray]] | None,
    images: Sequence[np.ndarray] | None,
    encoder: Callable | None,
    settings: ModelSettings,
    mode: str,
    image_mode_max_tiles: int,
    rng: np.random.Generator,
    turned: Sequence[Mapping[int, Sequence[np.ndarray]]] | None = None,
) -> TrainingSet:
    """Check, map, split and group the labelled tiles (the steps in the module docstring).

    Parameters
    ----------
    masks : sequence of N ndarray, each (H, W) uint8
        Truth per tile, schema class indices, 255 unlabelled.
    class_indices : sequence of int
        Schema index of each head channel.
    n_classes : int
        Head channels K (for the class counts).
    features : sequence of N tuples of 4 ndarray, optional
        Cached encoder features.
    images : sequence of N ndarray, each (H, W, 3) uint8, optional
        The tiles' pixels.
    encoder : callable, optional
        Frozen encoder (``"images"`` mode).
    turned : sequence of N mappings, optional
        Per tile ``{code: features of the turned tile}``, code 0 included, the same codes
        for every tile (``"turns"`` mode); ``features`` defaults to their code-0 entries.
    settings : ModelSettings
        ``min_labelled_tiles`` and ``val_share``.
    mode : {"auto", "turns", "features", "images"}
        Requested augmentation mode.
    image_mode_max_tiles : int
        ``"auto"`` picks ``"images"`` up to this many training tiles.
    rng : numpy.random.Generator
        Draws the split (and goes on to shuffle the epochs).

    Returns
    -------
    TrainingSet

    Raises
    ------
    InputError
        Fewer labelled tiles than ``settings.min_labelled_tiles``.
    ValueError
        Inputs that do not match each other, or a mode the inputs cannot serve.
    """
    n = len(masks)
    for name, seq in (("features", features), ("images", images), ("turned", turned)):
        if seq is not None and len(seq) != n:
            raise ValueError(f"{name}: expected one entry per mask ({n}), got {len(seq)}")
    channel_masks = to_channels(masks, class_indices)
    if images is not None:
        _check_images(images, channel_masks)
    if turned is not None and features is None:
        features = [_turn_zero(t, i) for i, t in enumerate(turned)]
    train_ids, val_ids = _split(channel_masks, settings, rng)
    mode = _resolve_mode(
        mode,
        n_train=len(train_ids),
        can_images=images is not None and encoder is not None,
        has_features=features is not None,
        has_turned=turned is not None,
        image_mode_max_tiles=image_mode_max_tiles,
    )
    if features is None:  # images mode without a cache
        features = _validation_features(images, val_ids, encoder, n)
    shape_of = {i: channel_masks[i].shape for i in sorted(train_ids + val_ids)}
    if mode in ("features", "turns"):
        _check_feature_shapes(features, shape_of)
    if mode == "turns":
        _check_turned(turned, shape_of)
    counts = np.zeros(n_classes, np.int64)
    for i in train_ids:
        counts += np.bincount(channel_masks[i].ravel(), minlength=256)[:n_classes]
    return TrainingSet(
        masks=channel_masks,
        features=features,
        images=images,
        train_ids=train_ids,
        val_ids=val_ids,
        mode=mode,
        shape_of=shape_of,
        class_counts=counts,
        turned=turned if mode == "turns" else None,
    )


def _check_images(images: Sequence[np.ndarray], channel_masks: Sequence[np.ndarray]) -> None:
    for i, (im, m) in enumerate(zip(images, channel_masks, strict=True)):
        shape = np.shape(im)
        if len(shape) != 3 or shape[2] != 3 or tuple(shape[:2]) != m.shape:
            raise ValueError(
                f"images: tile {i} expected an RGB tile of shape {(*m.shape, 3)} like its "
                f"mask, got {shape}; pass the pixels of the labelled tiles"
            )


def _split(
    channel_masks: Sequence[np.ndarray], settings: ModelSettings, rng: np.random.Generator
) -> tuple[list[int], list[int]]:
    """Training and validation tile numbers (each ascending), drawn from the labelled tiles."""
    labelled = [i for i, m in enumerate(channel_masks) if (m != UNLABELLED).any()]
    if len(labelled) < settings.min_labelled_tiles:
        raise InputError(
            f"labels: retraining needs at least {settings.min_labelled_tiles} labelled tiles "
            f"(model.min_labelled_tiles), got {len(labelled)}; label "
            f"{settings.min_labelled_tiles - len(labelled)} more tile(s) first"
        )
    order = rng.permutation(labelled).tolist()
    n_val = 0
    if settings.val_share > 0 and len(order) >= 2:
        n_val = min(len(order) - 1, max(1, round(settings.val_share * len(order))))
    return sorted(order[n_val:]), sorted(order[:n_val])


def _resolve_mode(
    mode: str,
    *,
    n_train: int,
    can_images: bool,
    has_features: bool,
    has_turned: bool,
    image_mode_max_tiles: int,
) -> str:
    if mode == "auto" and has_turned:
        mode = "turns"
    elif mode == "auto":
        mode = "images" if can_images and n_train <= image_mode_max_tiles else "features"
    if mode == "turns" and not has_turned:
        raise ValueError(
            "turned: 'turns' mode needs the features of the turned tiles "
            "(labeler.model.turned.turned_features); pass turned= or use 'features'"
        )
    if mode == "images" and not can_images:
        raise ValueError(
            "mode: 'images' needs both images and encoder; pass them or use 'features'"
        )
    if mode == "features" and not has_features:
        raise ValueError("features: 'features' mode needs the cached features of the tiles")
    return mode


def _validation_features(
    images: Sequence[np.ndarray], val_ids: Sequence[int], encoder: Callable, n: int
) -> list:
    """Features of the validation tiles, from the encoder once; None for the other tiles."""
    features: list = [None] * n
    with torch.no_grad():
        for i in val_ids:
            feats = encoder(to_input(images[i], memory_format=torch.channels_last))
            features[i] = tuple(f[0].to(torch.float16).numpy() for f in feats)
    return features


def _turn_zero(entry: Mapping[int, Sequence[np.ndarray]], i: int) -> Sequence[np.ndarray]:
    if 0 not in entry:
        raise ValueError(
            f"turned: tile {i} has no entry for code 0 (the tile itself), got codes "
            f"{sorted(entry)}; include 0 in the codes"
        )
    return entry[0]


def _check_turned(turned: Sequence[Mapping[int, Sequence]], shape_of: dict) -> None:
    codes = None
    for i, shape in shape_of.items():
        got = sorted(turned[i])
        if codes is None:
            codes = got
        if got != codes or not all(0 <= c < 8 for c in got):
            raise ValueError(
                f"turned: tile {i} holds the turns {got}, tile {min(shape_of)} holds {codes}; "
                "every tile must hold the same codes in 0..7"
            )
        for c in got:
            h, w = shape if c % 2 == 0 else shape[::-1]
            h4, w4 = np.shape(turned[i][c][0])[-2:]
            if (math.ceil(h / 4), math.ceil(w / 4)) != (h4, w4):
                raise ValueError(
                    f"turned: tile {i} turn {c} has stride-4 features {h4} x {w4}, expected "
                    f"those of a {h} x {w} tile; pass the features of the turned tiles"
                )


def _check_feature_shapes(features: Sequence, shape_of: dict[int, tuple[int, int]]) -> None:
    for i, shape in shape_of.items():
        h4, w4 = np.shape(features[i][0])[-2:]
        if (math.ceil(shape[0] / 4), math.ceil(shape[1] / 4)) != (h4, w4):
            raise ValueError(
                f"features: tile {i} has stride-4 features {h4} x {w4} but its mask is "
                f"{shape}; pass the features of the same tiles"
            )


def _by_shape(ids: Sequence[int], shape_of: dict[int, tuple[int, int]]) -> dict[tuple, list[int]]:
    groups: dict[tuple, list[int]] = {}
    for i in ids:
        groups.setdefault(shape_of[i], []).append(i)
    return groups
