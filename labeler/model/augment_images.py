"""The ``"images"`` mode of head training: tiles augmented jointly with their masks, then encoded.

Runs ``torchvision.transforms.v2`` on the images and masks jointly
(:func:`image_augmentation`: flips, quarter turns; masks are ``tv_tensors.Mask`` so they
are never interpolated) and the colour jitter of :mod:`labeler.model.jitter` on the
images alone, then passes the augmented batch through the frozen encoder
(:func:`image_batch`): truer augmentation than the cached turns of
:mod:`labeler.model.augment`, but one encoder pass per tile per epoch. Kept apart so
that training on cached features never pays torchvision's import time. The transforms
and the jitter draw from torch's global generator, which
:func:`labeler.model.train.train_head` seeds inside a forked RNG state.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import torch
from torchvision import tv_tensors
from torchvision.transforms import v2

from labeler.model.augment import colour_jitter

__all__ = ["RandomQuarterTurn", "image_augmentation", "image_batch"]


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


def image_augmentation() -> Callable:
    """The joint image/mask augmentation of ``"images"`` mode.

    Flips (p 0.5 each) and quarter turns of image and mask together
    (``torchvision.transforms.v2``), then :func:`labeler.model.augment.colour_jitter` on
    the image alone.

    Returns
    -------
    callable
        ``augment(image, mask) -> (image, mask)`` on a ``tv_tensors.Image`` (3, H, W)
        uint8 and a ``tv_tensors.Mask`` (H, W).
    """
    geometry = v2.Compose(
        [v2.RandomHorizontalFlip(p=0.5), v2.RandomVerticalFlip(p=0.5), RandomQuarterTurn()]
    )
    jitter = colour_jitter()

    def augment(image: torch.Tensor, mask: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        image, mask = geometry(image, mask)
        return tv_tensors.wrap(jitter(image.as_subclass(torch.Tensor)), like=image), mask

    return augment


def image_batch(
    batch: list[int],
    images: Sequence[np.ndarray],
    channel_masks: Sequence[np.ndarray],
    augment: Callable,
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
    augment : callable
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
