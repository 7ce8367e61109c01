"""The full-resolution training loss on a random crop of each batch.

The head's trunk works at stride 4 and is cheap; the full-resolution outputs (the
coarse logits upsampled to every pixel, the pixel refinement, the cross-entropy over
every pixel) cost most of a training step. Each step therefore computes the trunk on the
whole tiles (so the features keep their whole context) and the full-resolution outputs
and the loss only on one random window of ``size`` x ``size`` pixels, the same for every
tile of the batch (:func:`draw_crop`).

The window's outputs are those of the whole tile, cut out: the trunk features are taken
with a margin of :data:`MARGIN_CELLS` stride-4 cells on every side (where the tile has
them), the outputs are computed on that larger window and the margin is cut off again.
Bilinear upsampling by exactly 4 reads one cell around each pixel, and the refinement's
two 3 x 3 convolutions at stride 2 read at most 4 pixels around, so 2 cells (8 pixels)
leave the window's logits equal to the whole tile's (the tests check it to float
rounding). Windows start and end on multiples of 4 pixels; a tile whose sides are not
multiples of 4, or not larger than ``size``, is used whole.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F

from labeler.model.head import ProposalHead
from labeler.model.refine import pixel_input

__all__ = ["CROP_SIZE", "MARGIN_CELLS", "CropWindow", "draw_crop", "crop_logits"]

#: Side of the training window in pixels (a multiple of 4).
CROP_SIZE = 128
#: Stride-4 cells of trunk features kept around the window.
MARGIN_CELLS = 2


@dataclass(frozen=True)
class CropWindow:
    """A window of a tile in pixels; every value a multiple of 4."""

    row: int
    col: int
    height: int
    width: int


def draw_crop(shape: tuple[int, int], size: int, rng: np.random.Generator) -> CropWindow | None:
    """A random training window of a ``shape`` (H, W) tile, or None to use the whole tile.

    Parameters
    ----------
    shape : (int, int)
        Tile height and width in pixels.
    size : int
        Window side in pixels (a positive multiple of 4); 0 turns cropping off.
    rng : numpy.random.Generator
        Draws the window's top-left corner (on multiples of 4).

    Returns
    -------
    CropWindow or None
        None when ``size`` is 0 or the tile is not larger than the window along some
        side, or its sides are not multiples of 4.

    Raises
    ------
    ValueError
        For a ``size`` that is negative or not a multiple of 4.
    """
    if size < 0 or size % 4:
        raise ValueError(f"size: expected 0 (no crop) or a positive multiple of 4, got {size}")
    height, width = (int(v) for v in shape)
    if size == 0 or height % 4 or width % 4 or height <= size or width <= size:
        return None
    row = 4 * int(rng.integers(0, (height - size) // 4 + 1))
    col = 4 * int(rng.integers(0, (width - size) // 4 + 1))
    return CropWindow(row, col, size, size)


def crop_logits(
    head: ProposalHead,
    z: torch.Tensor,
    pixels: torch.Tensor | None,
    window: CropWindow,
    *,
    margin: int = MARGIN_CELLS,
    coarse: bool = True,
    jitter: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> tuple[torch.Tensor | None, torch.Tensor | None]:
    """The whole tile's full-resolution logits inside ``window``, computed on it alone.

    Parameters
    ----------
    head : ProposalHead
        The head (its dropout acts on the coarse logits as in its mode).
    z : Tensor, shape (B, width, H / 4, W / 4)
        Trunk features of the whole tiles.
    pixels : Tensor, shape (B, 3, H, W), or None
        The tiles' RGB pixels, for a refining head.
    window : CropWindow
        From :func:`draw_crop`.
    margin : int
        Stride-4 cells of context kept around the window.
    coarse : bool
        Compute the coarse logits too.
    jitter : callable, optional
        Colour jitter applied to each tile's pixels inside the window and its margin
        only (the pixels outside are never used, so jittering them would be wasted work).

    Returns
    -------
    coarse : Tensor, shape (B, K, h, w), or None
        The stride-4 logits (``head.classify``) bilinearly upsampled, inside the window;
        None when not asked for.
    refined : Tensor, shape (B, K, h, w), or None
        ``head.refine`` inside the window; None without pixels or refinement.
    """
    h4, w4 = z.shape[-2:]
    r0, c0 = window.row // 4, window.col // 4
    r1, c1 = r0 + window.height // 4, c0 + window.width // 4
    a, b = max(0, r0 - margin), min(h4, r1 + margin)
    c, d = max(0, c0 - margin), min(w4, c1 + margin)
    zc = z[:, :, a:b, c:d]
    top, left = 4 * (r0 - a), 4 * (c0 - c)
    rows = slice(top, top + window.height)
    cols = slice(left, left + window.width)
    size = (4 * (b - a), 4 * (d - c))
    up = None
    if coarse:
        up = F.interpolate(head.classify(zc), size=size, mode="bilinear", align_corners=False)
        up = up[:, :, rows, cols]
    if pixels is None or not head.config.refines:
        return up, None
    part = pixels[:, :, 4 * a : 4 * b, 4 * c : 4 * d]
    if jitter is not None:
        part = jitter(part)
    refined = head.refine(zc, pixel_input(part))[:, :, rows, cols]
    return up, refined
