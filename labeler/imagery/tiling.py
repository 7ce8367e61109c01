"""Tile grids with overlap, and stitching of tile masks back into one image mask.

Rows and columns are in image order (row 0 at the top). A grid covers every pixel. When
the image is at least one tile large in a direction, every tile is full size in that
direction: the last tile is moved back to end at the image edge, so it may share more
than ``overlap`` pixels with its neighbour. A smaller image gets one tile as large as
the image.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.classes import UNLABELLED

__all__ = [
    "Window",
    "axis_starts",
    "tile_grid",
    "cut",
    "stitch",
    "nearest_tile_index",
    "owner_map",
]


@dataclass(frozen=True, order=True)
class Window:
    """A rectangle of an image in pixel units (row/column order).

    Parameters
    ----------
    row, col : int
        Top-left pixel.
    height, width : int
        Size in pixels.
    """

    row: int
    col: int
    height: int
    width: int

    @property
    def slices(self) -> tuple[slice, slice]:
        """``(rows, cols)`` slices to index an array with."""
        return slice(self.row, self.row + self.height), slice(self.col, self.col + self.width)

    @property
    def centre(self) -> tuple[float, float]:
        """Centre ``(row, col)`` in continuous pixel coordinates."""
        return self.row + self.height / 2.0, self.col + self.width / 2.0

    def as_tuple(self) -> tuple[int, int, int, int]:
        return (self.row, self.col, self.height, self.width)


def axis_starts(length: int, *, size: int, overlap: int) -> np.ndarray:
    """Start offsets of tiles along one axis.

    Parameters
    ----------
    length : int
        Image extent along the axis (pixels), at least 1.
    size : int
        Tile extent.
    overlap : int
        Pixels shared by neighbouring tiles, ``0 <= overlap < size``.

    Returns
    -------
    starts : ndarray, shape (n,), int64
        Increasing offsets; the last tile ends at ``length`` (or is the whole axis when
        ``length <= size``).
    """
    if length < 1:
        raise ValueError(f"length: expected at least 1 pixel, got {length}")
    if size < 1:
        raise ValueError(f"size: expected at least 1 pixel, got {size}")
    if not 0 <= overlap < size:
        raise ValueError(f"overlap: expected 0 <= overlap < size ({size}), got {overlap}")
    if length <= size:
        return np.zeros(1, np.int64)
    stride = size - overlap
    n = int(np.ceil((length - size) / stride)) + 1
    starts = np.arange(n, dtype=np.int64) * stride
    starts[-1] = length - size
    return starts


def tile_grid(height: int, width: int, *, size: int = 256, overlap: int = 32) -> list[Window]:
    """Windows covering a ``height`` x ``width`` image, row-major order.

    Returns
    -------
    windows : list of Window
        Each window has ``min(size, height)`` rows and ``min(size, width)`` columns.
    """
    rows = axis_starts(height, size=size, overlap=overlap)
    cols = axis_starts(width, size=size, overlap=overlap)
    th, tw = min(size, height), min(size, width)
    return [Window(int(r), int(c), th, tw) for r in rows for c in cols]


def cut(image: np.ndarray, windows: Sequence[Window]) -> list[np.ndarray]:
    """Copies of ``image[window]`` for each window (``image`` shape (H, W, ...))."""
    return [np.array(image[w.slices]) for w in windows]


def nearest_tile_index(length: int, starts: np.ndarray, extent: int) -> np.ndarray:
    """For each pixel along an axis, the index of the tile whose centre is nearest.

    Only tiles containing the pixel are candidates; ties go to the earlier tile.

    Parameters
    ----------
    length : int
        Axis extent in pixels.
    starts : ndarray, shape (n,)
        Tile starts along the axis, increasing.
    extent : int
        Tile extent along the axis.

    Returns
    -------
    index : ndarray, shape (length,), int64
    """
    centres = np.asarray(starts, np.float64) + extent / 2.0
    pix = np.arange(length, dtype=np.float64) + 0.5
    dist = np.abs(pix[:, None] - centres[None, :])
    inside = (pix[:, None] >= starts[None, :]) & (pix[:, None] < starts[None, :] + extent)
    dist[~inside] = np.inf
    return np.argmin(dist, axis=1)  # argmin returns the first of equal minima


def stitch(
    masks: Sequence[np.ndarray],
    windows: Sequence[Window],
    *,
    shape: tuple[int, int],
    fill: int = UNLABELLED,
) -> np.ndarray:
    """Assemble tile masks into one image mask.

    Each pixel takes its value from the tile whose centre is nearest among the tiles
    that contain it. The windows must form a grid (a product of row starts and column
    starts, as :func:`tile_grid` makes); tiles that are missing leave their pixels at
    ``fill`` unless a neighbour covers them.

    Parameters
    ----------
    masks : sequence of ndarray, each shape (h, w)
        Tile masks, same length and order as ``windows``.
    windows : sequence of Window
    shape : (int, int)
        ``(height, width)`` of the image.
    fill : int
        Value of pixels no given tile covers.

    Returns
    -------
    mask : ndarray, shape ``shape``, dtype of the first mask (uint8 when empty)
    """
    if len(masks) != len(windows):
        raise ValueError(f"masks: expected one mask per window ({len(windows)}), got {len(masks)}")
    height, width = shape
    dtype = masks[0].dtype if masks else np.uint8
    out = np.full((height, width), fill, dtype=dtype)
    if not masks:
        return out
    for m, w in zip(masks, windows, strict=True):
        if m.shape[:2] != (w.height, w.width):
            raise ValueError(
                f"masks: tile at row {w.row} col {w.col} expected shape "
                f"{(w.height, w.width)}, got {m.shape}"
            )
    row_starts = np.array(sorted({w.row for w in windows}), np.int64)
    col_starts = np.array(sorted({w.col for w in windows}), np.int64)
    th = max(w.height for w in windows)
    tw = max(w.width for w in windows)
    # choose among all grid tiles, then fall back to any present covering tile
    ri = nearest_tile_index(height, row_starts, th)
    ci = nearest_tile_index(width, col_starts, tw)
    lookup = {(w.row, w.col): k for k, w in enumerate(windows)}
    covered = np.zeros((height, width), bool)
    for (r0, c0), k in lookup.items():
        rs, cs = windows[k].slices
        rsel = ri[rs] == np.searchsorted(row_starts, r0)
        csel = ci[cs] == np.searchsorted(col_starts, c0)
        sel = rsel[:, None] & csel[None, :]
        out[rs, cs][sel] = masks[k][sel]
        covered[rs, cs] |= sel
    if not covered.all():
        # a missing grid tile: let any present tile that contains the pixel fill it
        for m, w in zip(masks, windows, strict=True):
            rs, cs = w.slices
            hole = ~covered[rs, cs]
            if hole.any():
                out[rs, cs][hole] = m[hole]
                covered[rs, cs] |= hole
    return out


def owner_map(windows: Sequence[Window], *, shape: tuple[int, int]) -> np.ndarray:
    """Index of the tile that :func:`stitch` takes each pixel from.

    Parameters
    ----------
    windows : sequence of Window
        The tiles (a grid, as :func:`tile_grid` makes).
    shape : (int, int)
        ``(height, width)`` of the image.

    Returns
    -------
    owner : ndarray, shape ``shape``, int32
        Position in ``windows`` of the owning tile; -1 where no tile covers the pixel.
    """
    index = [np.full((w.height, w.width), k, np.int32) for k, w in enumerate(windows)]
    if not index:
        return np.full(shape, -1, np.int32)
    return stitch(index, windows, shape=shape, fill=-1)
