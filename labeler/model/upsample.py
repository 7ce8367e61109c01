"""Colour-guided upsampling of coarse class probabilities (joint bilateral upsampling).

The head's probabilities live on a grid of ``stride`` x ``stride`` pixel cells (stride 4).
Plain bilinear upsampling blurs every class boundary over a cell or two; where the tile's
own pixels are at hand, joint bilateral upsampling (Kopf, Cohen, Lischinski &
Uyttendaele 2007, "Joint bilateral upsampling", ACM Trans. Graph. 26(3)) lets each pixel
take the probabilities of nearby cells whose colour resembles its own:

    p(x) = sum_c w(x, c) p_c / sum_c w(x, c),
    w(x, c) = exp(-|x - centre_c|^2 / (2 sigma_spatial^2))
              * exp(-|I(x) - I_c|^2 / (2 sigma_colour^2))

over the ``(2 radius + 1)^2`` cells around the pixel's own cell (the colour factor gets
a floor of 1e-6, so a pixel unlike all of them falls back to spatial weights), where ``I_c`` is the
mean colour of cell c and cell centres sit at ``stride * (i + 1/2)`` in continuous pixel
coordinates (as bilinear upsampling with ``align_corners=False`` places them). Cells
outside the tile get no weight. A soil pixel beside a leaf thus follows the soil cells,
and the mask edge follows the colour edge; classes of one colour (crop and weed leaves)
are not separated by it.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F

__all__ = ["guided_upsample"]

_FLOOR = 1e-6


def guided_upsample(
    probs: torch.Tensor,
    image: torch.Tensor,
    *,
    stride: int = 4,
    radius: int = 1,
    sigma_spatial: float = 4.0,
    sigma_colour: float = 20.0,
) -> torch.Tensor:
    """Upsample ``probs`` to the size of ``image``, guided by its colours.

    Parameters
    ----------
    probs : Tensor, shape (B, K, h, w), float
        Class probabilities per cell (each cell ``stride`` x ``stride`` pixels).
    image : Tensor, shape (B, 3, H, W), float in 0..255
        The tiles; ``ceil(H / stride) == h`` and ``ceil(W / stride) == w``.
    stride : int
        Pixels per cell side.
    radius : int
        Cells on each side of the pixel's own cell that take part (1: 3 x 3 cells).
    sigma_spatial : float
        Spatial scale in pixels.
    sigma_colour : float
        Colour scale in 0..255 RGB units (Euclidean distance).

    Returns
    -------
    probs_full : Tensor, shape (B, K, H, W)
        Rows sum to 1 wherever ``probs`` do.

    Raises
    ------
    ValueError
        For shapes that do not fit or non-positive scales.
    """
    if probs.dim() != 4 or image.dim() != 4 or image.shape[1] != 3:
        raise ValueError(
            f"probs, image: expected (B, K, h, w) and (B, 3, H, W), got {tuple(probs.shape)} "
            f"and {tuple(image.shape)}"
        )
    b, k, h, w = probs.shape
    height, width = image.shape[-2:]
    if image.shape[0] != b or math.ceil(height / stride) != h or math.ceil(width / stride) != w:
        raise ValueError(
            f"image: expected {b} tiles whose size divided by stride {stride} (rounded up) is "
            f"{h} x {w}, got {tuple(image.shape)}; pass the tiles the probabilities belong to"
        )
    if radius < 0 or sigma_spatial <= 0 or sigma_colour <= 0:
        raise ValueError(
            f"radius, sigma_spatial, sigma_colour: expected >= 0, > 0, > 0, got {radius}, "
            f"{sigma_spatial}, {sigma_colour}"
        )
    s = stride
    img = image.to(probs.dtype)
    ph, pw = h * s - height, w * s - width
    if ph or pw:  # complete the last cells by repeating the edge pixels
        img = F.pad(img, (0, pw, 0, ph), mode="replicate")
    cell_colour = F.avg_pool2d(image.to(probs.dtype), s, ceil_mode=True)  # (B, 3, h, w)
    blocks = img.reshape(b, 3, h, s, w, s)  # pixel (i*s + a, j*s + c) -> [i, a, j, c]
    r = radius
    pp = F.pad(probs, (r, r, r, r))
    pc = F.pad(cell_colour, (r, r, r, r))
    valid = F.pad(torch.ones(1, 1, h, w, dtype=probs.dtype), (r, r, r, r))
    within = torch.arange(s, dtype=probs.dtype) + 0.5 - s / 2.0  # pixel offset from own centre
    num = torch.zeros(b, k, h, s, w, s, dtype=probs.dtype)
    den = torch.zeros(b, h, s, w, s, dtype=probs.dtype)
    inv_s = 1.0 / (2.0 * sigma_spatial**2)
    inv_c = 1.0 / (2.0 * sigma_colour**2)
    for dy in range(-r, r + 1):
        for dx in range(-r, r + 1):
            rows = slice(r + dy, r + dy + h)
            cols = slice(r + dx, r + dx + w)
            q = pp[:, :, rows, cols]  # (B, K, h, w)
            c = pc[:, :, rows, cols]
            v = valid[:, :, rows, cols]
            ey = (within - dy * s) ** 2  # (s,) squared row distance to the neighbour centre
            ex = (within - dx * s) ** 2
            spatial = torch.exp(-(ey[:, None] + ex[None, :]) * inv_s)  # (s, s)
            diff = blocks - c[:, :, :, None, :, None]  # (B, 3, h, s, w, s)
            # + a floor: a pixel unlike every nearby cell falls back to spatial weights
            colour = torch.exp(-(diff * diff).sum(dim=1) * inv_c) + _FLOOR  # (B, h, s, w, s)
            wgt = colour * spatial[None, None, :, None, :] * v[:, 0, :, None, :, None]
            den += wgt
            num += wgt[:, None] * q[:, :, :, None, :, None]
    out = num / den[:, None]
    return out.reshape(b, k, h * s, w * s)[:, :, :height, :width]
