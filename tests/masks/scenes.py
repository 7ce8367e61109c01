"""Hand-made field scenes for the mask tools: flat-coloured plants on flat soil.

Colours are round numbers picked by hand (a brown loam and a leaf green); they are
about 64 Delta E*ab apart (CIE 1976), a strong colour edge. Noise and blur are seeded.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy import ndimage as ndi

__all__ = ["SOIL_RGB", "LEAF_RGB", "plant_scene", "disc"]

SOIL_RGB = (150, 110, 70)
LEAF_RGB = (50, 160, 60)


def disc(shape: tuple[int, int], centre: tuple[float, float], radius: float) -> np.ndarray:
    """Pixels whose centre lies within ``radius`` of ``centre`` (bool, ``shape``)."""
    r, c = np.indices(shape)
    return (r - centre[0]) ** 2 + (c - centre[1]) ** 2 <= radius**2


def plant_scene(
    shape: tuple[int, int] = (64, 64),
    plants: Sequence[np.ndarray] = (),
    *,
    noise_sd: float = 6.0,
    blur_sigma: float = 0.0,
    seed: int = 0,
    soil_rgb: tuple[int, int, int] = SOIL_RGB,
    leaf_rgb: tuple[int, int, int] = LEAF_RGB,
) -> np.ndarray:
    """An RGB tile: ``leaf_rgb`` on every plant footprint, ``soil_rgb`` elsewhere.

    ``blur_sigma`` softens the edges like a lens (Gaussian, pixels) before seeded
    Gaussian noise of ``noise_sd`` is added; the result is clipped to uint8.
    """
    image = np.empty((*shape, 3), np.float64)
    image[:] = soil_rgb
    for footprint in plants:
        image[footprint] = leaf_rgb
    if blur_sigma > 0:
        image = ndi.gaussian_filter(image, sigma=(blur_sigma, blur_sigma, 0))
    rng = np.random.default_rng(seed)
    image += rng.normal(0.0, noise_sd, image.shape)
    return np.clip(np.rint(image), 0, 255).astype(np.uint8)
