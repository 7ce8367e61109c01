"""Small clean-up helpers for boolean masks: drop specks, fill pinholes.

Both functions work on connected components (``scipy.ndimage.label``) and count
pixels, so their result does not depend on the order of the components.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["component_structure", "remove_small_regions", "fill_small_holes"]


def component_structure(connectivity: int) -> np.ndarray:
    """The 3 x 3 neighbourhood of ``connectivity`` 1 (4-neighbours) or 2 (8-neighbours).

    Raises
    ------
    ValueError
        For any other value.
    """
    if connectivity not in (1, 2):
        raise ValueError(
            f"connectivity: expected 1 (4-neighbours) or 2 (8-neighbours), got {connectivity!r}"
        )
    return ndimage.generate_binary_structure(2, connectivity)


def _as_bool_2d(mask: np.ndarray, name: str) -> np.ndarray:
    m = np.asarray(mask)
    if m.ndim != 2:
        raise ValueError(f"{name}: expected a 2-D mask of shape (H, W), got shape {m.shape}")
    if m.dtype != bool:
        raise ValueError(
            f"{name}: expected a boolean mask, got dtype {m.dtype}; pass e.g. `mask > 0`"
        )
    return m


def remove_small_regions(mask: np.ndarray, *, min_px: int, connectivity: int = 2) -> np.ndarray:
    """Drop connected regions of ``True`` smaller than ``min_px`` pixels.

    Parameters
    ----------
    mask : ndarray, shape (H, W), bool
    min_px : int
        Regions with fewer pixels are set to ``False``; 0 or 1 keeps everything.
    connectivity : {1, 2}
        1 joins 4-neighbours, 2 (default) also joins diagonal neighbours.

    Returns
    -------
    cleaned : ndarray, shape (H, W), bool
        A new array; ``mask`` is not modified. An empty mask stays empty.
    """
    m = _as_bool_2d(mask, "mask")
    if min_px < 0:
        raise ValueError(f"min_px: expected a pixel count >= 0, got {min_px}")
    structure = component_structure(connectivity)
    if min_px <= 1 or not m.any():
        return m.copy()
    labels, _ = ndimage.label(m, structure=structure)
    sizes = np.bincount(labels.ravel())
    keep = sizes >= min_px
    keep[0] = False
    return keep[labels]


def fill_small_holes(mask: np.ndarray, *, max_px: int, connectivity: int = 2) -> np.ndarray:
    """Set to ``True`` the regions of ``False`` with fewer than ``max_px`` pixels.

    A "hole" is any connected region of background, including one that touches the image
    edge; background regions are joined with the connectivity complementary to
    ``connectivity`` (4-neighbours when the foreground uses 8, and the other way round),
    so a diagonal line of foreground does cut the background.

    Parameters
    ----------
    mask : ndarray, shape (H, W), bool
    max_px : int
        Background regions with fewer pixels are filled; 0 or 1 fills nothing.
    connectivity : {1, 2}
        Connectivity of the foreground.

    Returns
    -------
    filled : ndarray, shape (H, W), bool
    """
    m = _as_bool_2d(mask, "mask")
    if max_px < 0:
        raise ValueError(f"max_px: expected a pixel count >= 0, got {max_px}")
    component_structure(connectivity)
    background = ~m
    if max_px <= 1 or not background.any():
        return m.copy()
    labels, _ = ndimage.label(background, structure=component_structure(3 - connectivity))
    sizes = np.bincount(labels.ravel())
    small = sizes < max_px
    small[0] = False
    return m | small[labels]
