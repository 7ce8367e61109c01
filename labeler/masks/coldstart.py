"""Cold-start proposals before any label exists: vegetation index plus crop rows.

Vegetation (ExG - ExR, :func:`labeler.masks.vegetation.vegetation_mask`) that lies on a
crop row band becomes crop (1), vegetation between the rows becomes weed (2), the rest
soil (0). Symptom (3) is never proposed at cold start: a colour index cannot find it.

Rows are best found on a whole image: a tile may hold only one or two rows. The caller
detects them once per image (:func:`detect_image_rows`) and passes the pattern with each
tile's top-left pixel::

    rows = detect_image_rows(image, settings=settings.cold_start)
    for window in windows:
        tile = image[window.slices]
        mask = cold_start_proposal(tile, settings=settings.cold_start, rows=rows,
                                   origin=(window.row, window.col))

The proposal is a starting point for an annotator, not a field map: weeds growing inside
the row are proposed as crop, and crop leaves reaching beyond the band as weed. Masks
are decision support only; where one would drive spot spraying or other treatment,
local regulations and licensed agronomic advice come first.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from labeler.masks.rows import RowPattern, detect_rows
from labeler.masks.vegetation import vegetation_mask
from labeler.settings import ColdStartSettings

__all__ = [
    "SOIL",
    "CROP",
    "WEED",
    "ColdStart",
    "image_vegetation",
    "detect_image_rows",
    "cold_start",
    "cold_start_proposal",
]

SOIL, CROP, WEED = 0, 1, 2


@dataclass(frozen=True)
class ColdStart:
    """A cold-start proposal with what it was made from.

    Attributes
    ----------
    mask : ndarray, shape (H, W), uint8
        0 soil, 1 crop, 2 weed.
    vegetation : ndarray, shape (H, W), bool
    rows : RowPattern or None
        The rows used (None: no rows were found; then all vegetation got
        ``no_rows_class``).
    """

    mask: np.ndarray
    vegetation: np.ndarray
    rows: RowPattern | None


def image_vegetation(rgb: np.ndarray, *, settings: ColdStartSettings | None = None) -> np.ndarray:
    """Vegetation mask of ``rgb`` (H, W, 3) with the project's cold-start settings."""
    s = ColdStartSettings() if settings is None else settings
    return vegetation_mask(
        rgb,
        exr_coefficient=s.exr_coefficient,
        threshold=s.threshold,
        min_object_px=s.min_object_px,
    )


def detect_image_rows(
    rgb: np.ndarray,
    *,
    settings: ColdStartSettings | None = None,
    half_width_px: float | None = None,
) -> RowPattern | None:
    """Crop rows of a whole image (H, W, 3), or None when it shows none."""
    return detect_rows(image_vegetation(rgb, settings=settings), half_width_px=half_width_px)


def cold_start(
    rgb: np.ndarray,
    *,
    settings: ColdStartSettings | None = None,
    rows: RowPattern | None = None,
    origin: tuple[int, int] = (0, 0),
    detect: bool = True,
    no_rows_class: int = CROP,
) -> ColdStart:
    """Propose soil / crop / weed for an image or one tile of it.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8 or float
        The image, or one tile of the image the ``rows`` were found on.
    settings : ColdStartSettings, optional
        ExR coefficient, threshold rule and speck size (defaults if omitted).
    rows : RowPattern, optional
        Rows found on the whole image (:func:`detect_image_rows`). If omitted and
        ``detect`` is true, rows are detected on ``rgb`` itself.
    origin : (int, int)
        Top-left pixel ``(row, col)`` of ``rgb`` within the image of ``rows``.
    detect : bool
        Detect rows on ``rgb`` when ``rows`` is None.
    no_rows_class : {1, 2}
        Class of all vegetation when there are no rows (default crop).

    Returns
    -------
    ColdStart
    """
    if no_rows_class not in (CROP, WEED):
        raise ValueError(
            f"no_rows_class: expected {CROP} (crop) or {WEED} (weed), got {no_rows_class!r}"
        )
    if len(origin) != 2:
        raise ValueError(
            f"origin: expected (row, col) of the tile's top-left pixel, got {origin!r}"
        )
    veg = image_vegetation(rgb, settings=settings)
    if rows is None and detect:
        rows = detect_rows(veg)
    mask = np.zeros(veg.shape, np.uint8)
    if rows is None or not rows.offsets:
        mask[veg] = no_rows_class
        return ColdStart(mask, veg, rows)
    band = rows.band_mask(veg.shape, origin=origin)
    mask[veg & band] = CROP
    mask[veg & ~band] = WEED
    return ColdStart(mask, veg, rows)


def cold_start_proposal(
    rgb: np.ndarray,
    *,
    settings: ColdStartSettings | None = None,
    rows: RowPattern | None = None,
    origin: tuple[int, int] = (0, 0),
) -> np.ndarray:
    """The cold-start mask (H, W) uint8 of :func:`cold_start` (0 soil, 1 crop, 2 weed)."""
    return cold_start(rgb, settings=settings, rows=rows, origin=origin).mask
