"""The figures of the agreement report and table, as plain dataclasses.

:func:`labeler.agreement.summary.summarise_agreement` fills them; the report writer
and the terminal screens only read them. No array here is of image size.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import date, datetime

import numpy as np

__all__ = [
    "ComparedImage",
    "PairFigures",
    "ClassFigures",
    "TileFigures",
    "ImageFigures",
    "DayFigures",
    "AgreementSummary",
]


@dataclass(frozen=True)
class ComparedImage:
    """One image labelled by several annotators, as the store hands it over.

    Attributes
    ----------
    image : str
        Image identifier shown in the report (file name or id).
    masks : mapping str -> ndarray (H, W) uint8
        Annotator name -> stitched image mask (each image pixel once; 255 unlabelled).
    saved_at : mapping str -> datetime
        Annotator name -> time of the save the mask comes from.
    tiles : mapping str -> window, optional
        Tile id -> ``(row, col, height, width)`` (or a ``tiling.Window``) inside the
        image; when given, agreement is also figured per tile for the least agreed list.
    """

    image: str
    masks: Mapping[str, np.ndarray]
    saved_at: Mapping[str, datetime]
    tiles: Mapping[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class PairFigures:
    """Figures of one annotator pair pooled over the images both labelled.

    ``confusion`` (K, K) int64 has rows = ``annotators[0]``, columns = ``annotators[1]``
    and K = ``schema.n_values``; per-class arrays (K,) are indexed by class index.
    ``images_compared`` counts images with at least one pixel both labelled.
    """

    annotators: tuple[str, str]
    confusion: np.ndarray
    images_compared: int
    pixels_compared: int
    kappa: float
    band: str
    pixel_accuracy: float
    mean_iou: float
    iou: np.ndarray
    dice: np.ndarray
    class_kappa: np.ndarray

    @property
    def label(self) -> str:
        """``"a / b"`` for tables and plots."""
        return f"{self.annotators[0]} / {self.annotators[1]}"


@dataclass(frozen=True)
class ClassFigures:
    """Figures of one class pooled over all pairs and images.

    ``pixels`` counts compared pixels that at least one side put in the class.
    """

    index: int
    name: str
    iou: float
    dice: float
    kappa: float
    band: str
    pixels: int


@dataclass(frozen=True)
class TileFigures:
    """Agreement on one tile window of an image (pairs pooled as for the image)."""

    image: str
    tile: str
    window: tuple[int, int, int, int]
    agreement: float
    kappa: float
    mean_iou: float
    pixels_compared: int


@dataclass(frozen=True)
class ImageFigures:
    """Agreement on one image.

    ``agreement`` is the summary metric (``"kappa"`` or ``"iou"``) of the confusion
    matrix pooled over all annotator pairs of the image; with two annotators it equals
    :func:`tile_agreement` on the stitched masks. ``worst_pair`` is the pair with the
    lowest value of that metric (``None`` when no pair shares a pixel).
    """

    image: str
    annotators: tuple[str, ...]
    agreement: float
    kappa: float
    mean_iou: float
    pixels_compared: int
    worst_pair: tuple[str, str] | None
    worst_value: float
    last_saved: datetime
    tiles: tuple[TileFigures, ...] = ()


@dataclass(frozen=True)
class DayFigures:
    """Agreement pooled over all pair comparisons whose later save fell on ``day``."""

    day: date
    kappa: float
    mean_iou: float
    pixel_accuracy: float
    comparisons: int
    pixels_compared: int


@dataclass(frozen=True)
class AgreementSummary:
    """Everything the report and the agreement table show (no arrays of image size).

    Attributes
    ----------
    metric : {"kappa", "iou"}
        Metric of the per-image and per-tile ``agreement`` values.
    class_indices, class_names : tuple
        The schema's classes in index order.
    pairs : tuple of PairFigures
        Sorted by annotator names.
    classes : tuple of ClassFigures
        One per schema class.
    images : tuple of ImageFigures
        In input order.
    days : tuple of DayFigures
        Sorted by day.
    overall : PairFigures
        All pairs pooled (``annotators == ("all", "all")``).
    """

    metric: str
    class_indices: tuple[int, ...]
    class_names: tuple[str, ...]
    pairs: tuple[PairFigures, ...]
    classes: tuple[ClassFigures, ...]
    images: tuple[ImageFigures, ...]
    days: tuple[DayFigures, ...]
    overall: PairFigures

    def least_agreed(
        self, n: int = 10, *, whole_tiles: bool = True
    ) -> tuple[ImageFigures | TileFigures, ...]:
        """The ``n`` least agreed tiles (or images, when no tile windows were given).

        Sorted by ``agreement`` ascending; entries with ``nan`` (nothing compared) are
        left out. Tiles are listed when any image carries tile windows.

        Parameters
        ----------
        n : int
            Length of the list.
        whole_tiles : bool
            List only tiles compared over the whole tile: at least as many pixels
            compared as the tile has, i.e. two or more annotators labelled every pixel
            of it. A tile only one person labelled is otherwise compared on the strip a
            neighbouring tile of the other person overlaps, which says little about it.
        """
        has_tiles = any(img.tiles for img in self.images)
        pool: list[ImageFigures | TileFigures] = []
        if has_tiles:
            pool = [
                t
                for img in self.images
                for t in img.tiles
                if not whole_tiles or t.pixels_compared >= t.window[2] * t.window[3]
            ]
        else:
            pool = list(self.images)
        pool = [p for p in pool if not math.isnan(p.agreement)]
        pool.sort(key=lambda p: (p.agreement, p.image, getattr(p, "tile", "")))
        return tuple(pool[: max(int(n), 0)])
