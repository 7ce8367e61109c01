"""Revisits: the same ground in two georeferenced images taken on different dates.

A field flown or photographed again shows the same ground grown a little, under other
light and with the frame shifted. Crops of the same ground from two dates are free
positive pairs for self-supervised adaptation. This module finds them from the images'
georeferencing alone, without reading pixels (the caller reads the windows it names):

* :func:`overlap_windows`: given a window in one image, the part of it that another
  image also covers and the window of the other image that sees that ground;
* :func:`pixel_mapping`: the affine map from one image's pixels to another's;
* :func:`align_revisit`: resample a crop of the other image onto the first window's
  pixel grid, so the two crops line up pixel for pixel;
* :func:`revisit_pairs`: every tile of every image paired with the same ground in each
  other image whose footprint overlaps it and whose capture date differs.

Coordinates follow :mod:`labeler.imagery.georef`: pixel-corner transforms, rows and
columns inside, x/y only where the transform is applied. Images in different coordinate
reference systems are compared through ``rasterio.warp.transform``; over a tile, a map
projection is affine to far below a pixel, so the mapping between two CRSs is an affine
fitted at the corners of the window concerned. Images without a CRS are compared only
with each other (one shared local frame is assumed). Where the two pixel grids are
turned against each other, the target window is the bounding box of the ground, so its
corners hold some ground the source window does not; :func:`align_revisit` resamples
exactly, whatever the turn.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime

import cv2
import numpy as np
from affine import Affine
from rasterio.crs import CRS
from rasterio.warp import transform as warp_transform

from labeler.imagery.tiling import Window

__all__ = [
    "Footprint",
    "RevisitPair",
    "days_apart",
    "pixel_mapping",
    "overlap_windows",
    "align_revisit",
    "revisit_pairs",
]


@dataclass(frozen=True)
class Footprint:
    """Where an image's pixels lie on the ground, and when it was taken.

    Attributes
    ----------
    key : hashable
        The caller's name for the image (an image id, a path).
    transform : affine.Affine
        Pixel-corner transform.
    crs : str or None
        Coordinate reference system (WKT or ``EPSG:...``); None for a local frame.
    height, width : int
        Image size in pixels.
    captured : date or datetime, optional
        Capture date (time of day is ignored).
    """

    key: Hashable
    transform: Affine
    crs: str | None
    height: int
    width: int
    captured: date | datetime | None = None


@dataclass(frozen=True)
class RevisitPair:
    """A tile and the same ground in another image.

    Attributes
    ----------
    image_a : hashable
        Key of the image of the tile.
    tile_a : Window
        The tile in ``image_a``.
    window_a : Window
        The part of ``tile_a`` that ``image_b`` also covers.
    image_b : hashable
        Key of the other image.
    window_b : Window
        The window of ``image_b`` that sees the ground of ``window_a``.
    tile_b : Window or None
        The tile of ``image_b`` (of those given) that shares most ground with
        ``window_b``; None when no tiles of ``image_b`` were given.
    share : float
        Area of ``window_a`` over the area of ``tile_a``.
    days : int
        Calendar days between the two capture dates.
    """

    image_a: Hashable
    tile_a: Window
    window_a: Window
    image_b: Hashable
    window_b: Window
    tile_b: Window | None
    share: float
    days: int


def days_apart(first: date | datetime, second: date | datetime) -> int:
    """Calendar days between two capture dates (time of day and time zone ignored)."""
    d1 = first.date() if isinstance(first, datetime) else first
    d2 = second.date() if isinstance(second, datetime) else second
    return abs((d2 - d1).days)


def _apply(t: Affine, cols: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``t`` applied to points ``(cols, rows)``, written out (no operator overloads)."""
    return t.a * cols + t.b * rows + t.c, t.d * cols + t.e * rows + t.f


def _then(first: Affine, second: Affine) -> Affine:
    """The affine that applies ``first`` and then ``second``."""
    s, f = second, first
    return Affine(
        s.a * f.a + s.b * f.d,
        s.a * f.b + s.b * f.e,
        s.a * f.c + s.b * f.f + s.c,
        s.d * f.a + s.e * f.d,
        s.d * f.b + s.e * f.e,
        s.d * f.c + s.e * f.f + s.f,
    )


def _same_frame(source: Footprint, target: Footprint) -> bool:
    if source.crs is None and target.crs is None:
        return True
    if source.crs is None or target.crs is None:
        missing = source if source.crs is None else target
        raise ValueError(
            f"footprint {missing.key!r}: has no coordinate reference system while the other "
            "image has one; georeference it (GeoTIFF or world file with .prj) to compare them"
        )
    return CRS.from_user_input(source.crs) == CRS.from_user_input(target.crs)


def _corners(window: Window) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-corner coordinates (cols, rows) of the four corners of a window."""
    c = np.array([window.col, window.col + window.width] * 2, np.float64)
    r = np.array([window.row] * 2 + [window.row + window.height] * 2, np.float64)
    return c, r


def pixel_mapping(source: Footprint, target: Footprint, *, near: Window | None = None) -> Affine:
    """The affine map from ``source`` pixel coordinates to ``target`` pixel coordinates.

    Both in ``(col, row)`` order with corner convention, as :class:`affine.Affine` takes
    them: ``pixel_mapping(a, b) * (col_a, row_a) == (col_b, row_b)``.

    Parameters
    ----------
    source, target : Footprint
    near : Window, optional
        Where in ``source`` the mapping is used; between different CRSs the affine is
        fitted at this window's corners and centre (the whole image by default).

    Returns
    -------
    affine.Affine
        Exact when both images share a CRS.
    """
    if _same_frame(source, target):
        return _then(source.transform, ~target.transform)
    w = near or Window(0, 0, source.height, source.width)
    c, r = _corners(w)
    c = np.append(c, w.col + w.width / 2.0)
    r = np.append(r, w.row + w.height / 2.0)
    x, y = _apply(source.transform, c, r)
    xt, yt = warp_transform(
        CRS.from_user_input(source.crs), CRS.from_user_input(target.crs), x.tolist(), y.tolist()
    )
    ct, rt = _apply(~target.transform, np.asarray(xt), np.asarray(yt))
    design = np.stack([c, r, np.ones_like(c)], axis=1)
    (a, b, cc), *_ = np.linalg.lstsq(design, ct, rcond=None)
    (d, e, f), *_ = np.linalg.lstsq(design, rt, rcond=None)
    return Affine(a, b, cc, d, e, f)


def _box(mapping: Affine, window: Window, height: int, width: int) -> Window | None:
    """Window (rounded to whole pixels) of the mapped corners of ``window``, clipped."""
    c, r = _apply(mapping, *_corners(window))
    r0 = max(0, int(math.floor(float(np.min(r)) + 0.5)))
    r1 = min(height, int(math.floor(float(np.max(r)) + 0.5)))
    c0 = max(0, int(math.floor(float(np.min(c)) + 0.5)))
    c1 = min(width, int(math.floor(float(np.max(c)) + 0.5)))
    if r1 - r0 < 1 or c1 - c0 < 1:
        return None
    return Window(r0, c0, r1 - r0, c1 - c0)


def _intersect(a: Window, b: Window) -> Window | None:
    r0, c0 = max(a.row, b.row), max(a.col, b.col)
    r1 = min(a.row + a.height, b.row + b.height)
    c1 = min(a.col + a.width, b.col + b.width)
    if r1 <= r0 or c1 <= c0:
        return None
    return Window(r0, c0, r1 - r0, c1 - c0)


def overlap_windows(
    source: Footprint, window: Window, target: Footprint
) -> tuple[Window, Window] | None:
    """The same ground in two images: part of ``window`` and its window in ``target``.

    Parameters
    ----------
    source : Footprint
        The image ``window`` belongs to.
    window : Window
        A window of ``source`` (a tile).
    target : Footprint
        Another image.

    Returns
    -------
    (window_a, window_b) or None
        ``window_a`` is the part of ``window`` that ``target`` also covers (within a pixel
        at its edges), ``window_b`` the window of ``target`` that sees that ground; None
        when they share less than one pixel.

    Raises
    ------
    ValueError
        If one image has a CRS and the other has none.
    """
    forward = pixel_mapping(source, target, near=window)
    window_b = _box(forward, window, target.height, target.width)
    if window_b is None:
        return None
    window_a = _box(~forward, window_b, source.height, source.width)
    window_a = None if window_a is None else _intersect(window_a, window)
    if window_a is None:
        return None
    # map the trimmed source window back so both name the same ground
    window_b = _box(forward, window_a, target.height, target.width)
    if window_b is None:
        return None
    return window_a, window_b


def align_revisit(
    crop_b: np.ndarray, *, window_a: Window, window_b: Window, mapping: Affine
) -> np.ndarray:
    """Resample ``crop_b`` (the pixels of ``window_b``) onto the pixel grid of ``window_a``.

    Parameters
    ----------
    crop_b : ndarray, shape (window_b.height, window_b.width, ...)
        Pixels read from the target image.
    window_a, window_b : Window
        As returned by :func:`overlap_windows`.
    mapping : affine.Affine
        :func:`pixel_mapping` from the source image to the target image.

    Returns
    -------
    ndarray, shape (window_a.height, window_a.width, ...), dtype of ``crop_b``
        Bilinear; pixels whose ground lies just outside ``window_b`` repeat its edge.

    Raises
    ------
    ValueError
        If ``crop_b`` does not have the shape of ``window_b``.
    """
    if crop_b.shape[:2] != (window_b.height, window_b.width):
        raise ValueError(
            f"crop_b: expected the shape of window_b {(window_b.height, window_b.width)}, "
            f"got {crop_b.shape[:2]}; read exactly window_b from the other image"
        )
    # destination pixel centre (x + 0.5, y + 0.5) in window A -> source pixel index in crop B
    m = _then(
        _then(Affine.translation(window_a.col + 0.5, window_a.row + 0.5), mapping),
        Affine.translation(-window_b.col - 0.5, -window_b.row - 0.5),
    )
    matrix = np.array([[m.a, m.b, m.c], [m.d, m.e, m.f]], np.float64)
    return cv2.warpAffine(
        np.ascontiguousarray(crop_b),
        matrix,
        (window_a.width, window_a.height),
        flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP,
        borderMode=cv2.BORDER_REPLICATE,
    )


def _area(w: Window) -> int:
    return w.height * w.width


def _footprints_meet(a: Footprint, b: Footprint) -> bool:
    whole = Window(0, 0, a.height, a.width)
    return _box(pixel_mapping(a, b, near=whole), whole, b.height, b.width) is not None


def revisit_pairs(
    footprints: Sequence[Footprint],
    tiles: Mapping[Hashable, Sequence[Window]],
    *,
    min_share: float = 0.5,
    min_days: int = 1,
) -> list[RevisitPair]:
    """Tiles paired with the same ground in other images taken on other dates.

    Parameters
    ----------
    footprints : sequence of Footprint
        The images; those without ``captured`` are skipped.
    tiles : mapping of key -> sequence of Window
        The tiles of each image (images without tiles give no pairs as ``image_a``).
    min_share : float
        Least share of a tile's area that the other image must also cover, in (0, 1].
    min_days : int
        Least number of calendar days between the two captures (1 = another date).

    Returns
    -------
    list of RevisitPair
        Each unordered pair of images once (the earlier in ``footprints`` is
        ``image_a``), tiles in the order given.

    Raises
    ------
    ValueError
        If ``min_share`` is outside (0, 1], ``min_days`` is below 1, two footprints share
        a key, or one image has a CRS and an overlapping candidate has none.
    """
    if not 0 < min_share <= 1:
        raise ValueError(f"min_share: expected a share in (0, 1], got {min_share}")
    if min_days < 1:
        raise ValueError(
            f"min_days: expected at least 1 (revisits come from other dates), got {min_days}"
        )
    keys = [f.key for f in footprints]
    if len(set(keys)) != len(keys):
        raise ValueError("footprints: two footprints share a key; give each image its own")
    dated = [f for f in footprints if f.captured is not None]
    out: list[RevisitPair] = []
    for i, a in enumerate(dated):
        for b in dated[i + 1 :]:
            days = days_apart(a.captured, b.captured)
            if days < min_days or not _footprints_meet(a, b):
                continue
            for tile in tiles.get(a.key, ()):
                found = overlap_windows(a, tile, b)
                if found is None:
                    continue
                window_a, window_b = found
                share = _area(window_a) / _area(tile)
                if share < min_share:
                    continue
                shared = [(_intersect(t, window_b), t) for t in tiles.get(b.key, ())]
                best = max(
                    ((_area(s), t) for s, t in shared if s is not None),
                    default=None,
                    key=lambda st: st[0],
                )
                out.append(
                    RevisitPair(
                        image_a=a.key,
                        tile_a=tile,
                        window_a=window_a,
                        image_b=b.key,
                        window_b=window_b,
                        tile_b=None if best is None else best[1],
                        share=share,
                        days=days,
                    )
                )
    return out
