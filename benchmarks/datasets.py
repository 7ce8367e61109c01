"""Label decoders of the open datasets the benchmarks read in place (``../shared/datasets``)."""

from __future__ import annotations

import numpy as np

__all__ = ["peanut_truth"]


def peanut_truth(rgb: np.ndarray, name: str) -> np.ndarray:
    """Class mask (H, W) uint8 of a peanut-weed label image (H, W, 3).

    Label colours from the dataset's SOURCE.md (Tran & Phan 2023): black soil (0),
    (0, 255, 0) crop (1), (255, 0, 0) weed (2).

    Raises
    ------
    ValueError
        When the label holds any other colour; ``name`` names the file.
    """
    r, g, b = (rgb[..., i].astype(np.int32) for i in range(3))
    mask = np.full(rgb.shape[:2], 255, np.uint8)
    mask[(r == 0) & (g == 0) & (b == 0)] = 0
    mask[(r == 0) & (g == 255) & (b == 0)] = 1
    mask[(r == 255) & (g == 0) & (b == 0)] = 2
    if (mask == 255).any():
        raise ValueError(f"{name}: label holds colours other than black, green and red")
    return mask
