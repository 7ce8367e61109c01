"""Augmentation of head training: the ways a training batch is built and moved.

``"turns"`` mode (:func:`turned_batch`)
    Each batch takes one of the eight flips/quarter turns of the square, chosen among the
    turns cached for every tile: the encoder features of the turned tiles themselves
    (:mod:`labeler.model.turned`, exact), with the masks and pixels turned alike by
    :func:`dihedral`, and :func:`colour_jitter` on the pixels (each tile its own draw).
``"features"`` mode (:func:`feature_batch`)
    Works on cached encoder features: each batch gets one of the eight flips/quarter
    turns of the square (:func:`dihedral`), applied to the four feature maps, the masks
    and (for a refining head) the pixels together. Exact for the masks; approximate for
    the features, because the encoder is not equivariant to flips and turns (learned
    filters, asymmetric SAME padding): the turned features of a tile are not the features
    of the turned tile. Quarter turns need square tiles; tiles whose sides are not
    multiples of 32 are not transformed (:func:`can_turn`: feature cells would not line
    up with the pixels). The pixels also get :func:`colour_jitter`, each tile its own
    draw; features and masks never do. Fast: no encoder pass at all.
``"images"`` mode
    In :mod:`labeler.model.augment_images` (it needs torchvision, whose import a
    retrain on cached features does not pay).

Random draws: ``turned_batch`` and ``feature_batch`` draw their flip/turn from the numpy
generator they are given; the jitter (:mod:`labeler.model.jitter`, one draw per tile)
draws from torch's global generator, which :func:`labeler.model.train.train_head` seeds
inside a forked RNG state.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import numpy as np
import torch

from labeler.model.head import features_to_tensors
from labeler.model.jitter import ColourJitter

__all__ = ["colour_jitter", "dihedral", "can_turn", "feature_batch", "turned_batch"]


def colour_jitter() -> ColourJitter:
    """Colour jitter of the training pixels: brightness, contrast and saturation +-20 %,
    hue +-0.03 of a turn (common practice, no source; :mod:`labeler.model.jitter`)."""
    return ColourJitter(brightness=0.2, contrast=0.2, saturation=0.2, hue=0.03)


def dihedral(x: torch.Tensor, code: int) -> torch.Tensor:
    """One of the 8 flips/turns of the square on the last two axes.

    Parameters
    ----------
    x : Tensor, shape (..., H, W)
        Any tensor; only the last two axes move.
    code : int
        0..7: ``code % 4`` quarter turns, then a left-right flip when ``code >= 4``.

    Returns
    -------
    Tensor, shape (..., H, W), or (..., W, H) after an odd number of quarter turns
    """
    k = code % 4
    y = torch.rot90(x, k, dims=(-2, -1)) if k else x
    return torch.flip(y, dims=(-1,)) if code >= 4 else y


def can_turn(shape: tuple[int, int]) -> bool:
    """True when a tile of ``shape`` (H, W) may be flipped/turned in ``"features"`` mode.

    Both sides must be multiples of 32 (the coarsest feature stride), so that every
    feature level's cells stay on the pixels they describe.
    """
    return shape[0] % 32 == 0 and shape[1] % 32 == 0


def feature_batch(
    batch: list[int],
    features: Sequence,
    channel_masks: Sequence[np.ndarray],
    shape_of: dict[int, tuple[int, int]],
    rng: np.random.Generator,
    *,
    images: Sequence[np.ndarray] | None = None,
    jitter: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> tuple[list[torch.Tensor], torch.Tensor, torch.Tensor | None]:
    """Cached features, masks and pixels of a batch, one random flip/turn for all of them.

    Parameters
    ----------
    batch : list of int
        Tile numbers of the batch; all of one shape.
    features : sequence of tuples of 4 ndarray
        Cached encoder features per tile number, shapes ``(C_i, h_i, w_i)``.
    channel_masks : sequence of ndarray, each (H, W) uint8
        Truth per tile number as head channels, 255 unlabelled.
    shape_of : dict
        ``(H, W)`` per tile number.
    rng : numpy.random.Generator
        Draws the flip/turn: any of the 8 for square tiles, else one of the 4 that keep
        the shape (none when :func:`can_turn` refuses the shape).
    images : sequence of ndarray, each (H, W, 3) uint8, optional
        The tiles' pixels (for a refining head).
    jitter : callable, optional
        Applied to each tile's pixels on its own (never to features or masks).

    Returns
    -------
    levels : list of 4 Tensor, each (B, C_i, h_i, w_i) float32, channels-last
    target : Tensor, shape (B, H, W), uint8
    pixels : Tensor, shape (B, 3, H, W), uint8, or None without ``images``
    """
    levels = features_to_tensors([features[i] for i in batch])
    target = torch.from_numpy(np.stack([channel_masks[i] for i in batch]))
    pixels = None
    if images is not None:
        pixels = torch.from_numpy(np.stack([np.asarray(images[i]) for i in batch]))
        pixels = pixels.permute(0, 3, 1, 2)
    shape = shape_of[batch[0]]
    if can_turn(shape):
        # square tiles: any of the 8; otherwise only those that keep the shape
        code = int(rng.integers(8)) if shape[0] == shape[1] else int(rng.choice([0, 2, 4, 6]))
        levels = [dihedral(t, code).contiguous(memory_format=torch.channels_last) for t in levels]
        target = dihedral(target, code)
        if pixels is not None:
            pixels = dihedral(pixels, code)
    if pixels is not None and jitter is not None:
        pixels = jitter(pixels)
    return levels, target, pixels


def turned_batch(
    batch: list[int],
    turned: Sequence[Mapping[int, Sequence[np.ndarray]]],
    channel_masks: Sequence[np.ndarray],
    rng: np.random.Generator,
    *,
    images: Sequence[np.ndarray] | None = None,
    jitter: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> tuple[list[torch.Tensor], torch.Tensor, torch.Tensor | None]:
    """Features of one cached turn of the batch's tiles, with masks and pixels turned alike.

    Parameters
    ----------
    batch : list of int
        Tile numbers of the batch; all of one shape and holding the same turn codes.
    turned : sequence of mappings
        Per tile number ``{code: four feature maps of the turned tile}``.
    channel_masks : sequence of ndarray, each (H, W) uint8
        Truth per tile number as head channels, 255 unlabelled (unturned).
    rng : numpy.random.Generator
        Draws the turn among the codes of the batch's first tile.
    images : sequence of ndarray, each (H, W, 3) uint8, optional
        The tiles' pixels (unturned), for a refining head.
    jitter : callable, optional
        Applied to each tile's turned pixels on its own.

    Returns
    -------
    levels : list of 4 Tensor, each (B, C_i, h_i, w_i) float32, channels-last
    target : Tensor, shape (B, H', W'), uint8
        The turned masks (``H' = W`` and ``W' = H`` after an odd number of quarter turns).
    pixels : Tensor, shape (B, 3, H', W'), uint8, or None without ``images``
    """
    codes = sorted(turned[batch[0]])
    code = codes[int(rng.integers(len(codes)))]
    levels = features_to_tensors([turned[i][code] for i in batch])
    target = dihedral(torch.from_numpy(np.stack([channel_masks[i] for i in batch])), code)
    pixels = None
    if images is not None:
        pixels = torch.from_numpy(np.stack([np.asarray(images[i]) for i in batch]))
        pixels = dihedral(pixels.permute(0, 3, 1, 2), code)
        if jitter is not None:
            pixels = jitter(pixels)
    return levels, target.contiguous(), pixels
