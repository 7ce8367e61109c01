"""Hand-made field scenes for the mask tools: flat-coloured plants on flat soil.

Colours are round numbers picked by hand (a brown loam and a leaf green); they are
about 64 Delta E*ab apart (CIE 1976), a strong colour edge. Noise and blur are seeded.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy import ndimage as ndi

__all__ = ["SOIL_RGB", "LEAF_RGB", "YELLOW_LEAF_RGB", "plant_scene", "disc", "two_hue_scene"]

SOIL_RGB = (150, 110, 70)
LEAF_RGB = (50, 160, 60)
#: A yellow-green leaf, 40.6 Delta E*ab from LEAF_RGB (CIE 1976, computed with
#: ``skimage.color.rgb2lab``); both are vegetation by ExG - ExR > 0, the loam is not.
YELLOW_LEAF_RGB = (170, 200, 30)


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


def two_hue_scene() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two discs of radius 9 touching along a short arc on 48 x 48 soil: ``LEAF_RGB`` on
    the left, ``YELLOW_LEAF_RGB`` on the right. Returns ``(image, left, right)``."""
    left, right = disc((48, 48), (24, 16), 9), disc((48, 48), (24, 33), 9)
    right &= ~left  # the discs overlap by a sliver: they touch along a short arc
    image = plant_scene((48, 48), [left, right])
    image[right] = plant_scene((48, 48), [right], leaf_rgb=YELLOW_LEAF_RGB)[right]
    return image, left, right
