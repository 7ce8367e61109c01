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
``"images"`` mode (:func:`image_batch`)
    Runs ``torchvision.transforms.v2`` on the images and masks jointly
    (:func:`image_augmentation`: flips, quarter turns, colour jitter; masks are
    ``tv_tensors.Mask`` so they are never interpolated and never colour-jittered) and
    passes the augmented batch through the frozen encoder. Truer augmentation, but one
    encoder pass per tile per epoch.

Random draws: ``turned_batch`` and ``feature_batch`` draw their flip/turn from the numpy generator it is given;
the torchvision transforms (and the jitter) draw from torch's global generator, which
:func:`labeler.model.train.train_head` seeds inside a forked RNG state.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import numpy as np
import torch
from torchvision import tv_tensors
from torchvision.transforms import v2

from labeler.model.head import features_to_tensors

__all__ = [
    "RandomQuarterTurn",
    "colour_jitter",
    "image_augmentation",
    "dihedral",
    "can_turn",
    "feature_batch",
    "image_batch",
    "turned_batch",
]


class RandomQuarterTurn(v2.Transform):
    """Turn image and mask together by 0, 90, 180 or 270 degrees (exact, no resampling).

    Non-square inputs are turned by 0 or 180 degrees only, so shapes never change.
    """

    def make_params(self, flat_inputs: list) -> dict[str, int]:
        return {"k": int(torch.randint(0, 4, ()).item())}

    def transform(self, inpt, params: dict[str, int]):
        k = params["k"]
        if inpt.shape[-2] != inpt.shape[-1]:
            k = 2 * (k // 2)
        if k == 0:
            return inpt
        out = torch.rot90(inpt, k, dims=(-2, -1))
        if isinstance(inpt, tv_tensors.TVTensor):
            return tv_tensors.wrap(out, like=inpt)
        return out


def colour_jitter() -> v2.ColorJitter:
    """Colour jitter of the training images: brightness, contrast and saturation +-20 %,
    hue +-0.03 (common practice, no source)."""
    return v2.ColorJitter(brightness=0.2, contrast=0.2, saturation=0.2, hue=0.03)


def image_augmentation() -> v2.Compose:
    """The joint image/mask augmentation of ``"images"`` mode.

    Flips (p 0.5 each), quarter turns, and :func:`colour_jitter`, which only touches images.
    """
    return v2.Compose(
        [
            v2.RandomHorizontalFlip(p=0.5),
            v2.RandomVerticalFlip(p=0.5),
            RandomQuarterTurn(),
            colour_jitter(),
        ]
    )


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
    jitter: v2.Transform | None = None,
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
    jitter : torchvision transform, optional
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
        pixels = torch.stack([jitter(p) for p in pixels])
    return levels, target, pixels


def image_batch(
    batch: list[int],
    images: Sequence[np.ndarray],
    channel_masks: Sequence[np.ndarray],
    augment: v2.Transform,
    encoder: Callable,
) -> tuple[list[torch.Tensor], torch.Tensor, torch.Tensor]:
    """Jointly augmented images and masks of a batch, through the frozen encoder.

    Parameters
    ----------
    batch : list of int
        Tile numbers of the batch; all of one shape.
    images : sequence of ndarray, each (H, W, 3) uint8
        The tiles' pixels per tile number.
    channel_masks : sequence of ndarray, each (H, W) uint8
        Truth per tile number as head channels, 255 unlabelled.
    augment : torchvision transform
        Joint image/mask transform (:func:`image_augmentation`).
    encoder : callable
        Frozen encoder: float batch ``(B, 3, H, W)`` in 0..255 to four feature maps.

    Returns
    -------
    levels : list of 4 Tensor, each (B, C_i, h_i, w_i) float32, channels-last
    target : Tensor, shape (B, H, W), uint8
    pixels : Tensor, shape (B, 3, H, W), uint8
        The augmented images (what the encoder saw).
    """
    ims, tgs = [], []
    for i in batch:
        im = tv_tensors.Image(torch.from_numpy(np.asarray(images[i])).permute(2, 0, 1))
        mk = tv_tensors.Mask(torch.from_numpy(channel_masks[i]))
        im, mk = augment(im, mk)
        ims.append(im.as_subclass(torch.Tensor))
        tgs.append(mk.as_subclass(torch.Tensor))
    x = torch.stack(ims).to(torch.float32).contiguous(memory_format=torch.channels_last)
    with torch.no_grad():
        levels = [
            t.to(torch.float32).contiguous(memory_format=torch.channels_last) for t in encoder(x)
        ]
    return levels, torch.stack(tgs), torch.stack(ims)


def turned_batch(
    batch: list[int],
    turned: Sequence[Mapping[int, Sequence[np.ndarray]]],
    channel_masks: Sequence[np.ndarray],
    rng: np.random.Generator,
    *,
    images: Sequence[np.ndarray] | None = None,
    jitter: v2.Transform | None = None,
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
    jitter : torchvision transform, optional
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
            pixels = torch.stack([jitter(p) for p in pixels])
    return levels, target.contiguous(), pixels
