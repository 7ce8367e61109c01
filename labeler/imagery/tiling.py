"""Tile grids with overlap, and stitching of tile masks back into one image mask.

Rows and columns are in image order (row 0 at the top). A grid covers every pixel. When
the image is at least one tile large in a direction, every tile is full size in that
direction: the last tile is moved back to end at the image edge, so it may share more
than ``overlap`` pixels with its neighbour. A smaller image gets one tile as large as
the image.

Big images are never stitched whole: :class:`TileLayout` knows which tile each pixel
comes from and stitches any window of the image from the tiles that reach into it, and
:class:`StitchedMask` is an image mask that is stitched window by window as it is read
(``mask[r0:r1]``), loading the tile masks it needs on the way. :func:`row_strips` cuts an
image into strips of bounded size for such reads. :func:`stitch` and :func:`owner_map`
are the whole-image forms, for images small enough to hold.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from labeler.classes import UNLABELLED

__all__ = [
    "Window",
    "axis_starts",
    "tile_grid",
    "cut",
    "STRIP_PX",
    "row_strips",
    "nearest_tile_index",
    "TileLayout",
    "LazyRaster",
    "StitchedMask",
    "stitch",
    "owner_map",
]

#: Pixels of one strip when a big image is read strip by strip (4 Mpx: 4 MB of mask,
#: 12 MB of RGB; labelling its regions takes some 30 bytes per pixel for a moment).
STRIP_PX = 1 << 22


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


def row_strips(height: int, width: int, *, max_px: int | None = None) -> list[Window]:
    """Full-width strips covering an image top to bottom, each at most ``max_px`` pixels.

    Parameters
    ----------
    height, width : int
        Image size in pixels.
    max_px : int, optional
        Largest strip (default :data:`STRIP_PX`); a strip has at least one row however
        wide the image.

    Returns
    -------
    list of Window
        ``Window(r0, 0, rows, width)``, consecutive, covering every row once.
    """
    if height < 0 or width < 0:
        raise ValueError(f"height, width: expected sizes >= 0, got {height} x {width}")
    if max_px is None:
        max_px = STRIP_PX
    if max_px < 1:
        raise ValueError(f"max_px: expected at least 1 pixel, got {max_px}")
    step = max(1, int(max_px) // max(1, int(width)))
    return [Window(r, 0, min(step, height - r), width) for r in range(0, height, step)]


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
    st = np.asarray(starts, np.int64)
    centres = st.astype(np.float64) + extent / 2.0
    out = np.empty(length, np.int64)
    chunk = max(1, (1 << 22) // max(1, len(st)))  # bounded (pixels x tiles) temporaries
    for a in range(0, length, chunk):
        pix = np.arange(a, min(length, a + chunk), dtype=np.float64) + 0.5
        dist = np.abs(pix[:, None] - centres[None, :])
        inside = (pix[:, None] >= st[None, :]) & (pix[:, None] < st[None, :] + extent)
        dist[~inside] = np.inf
        out[a : a + len(pix)] = np.argmin(dist, axis=1)  # the first of equal minima
    return out


class TileLayout:
    """Which tile each pixel of a stitched image mask comes from; stitching by window.

    Each pixel takes its value from the tile whose centre is nearest among the tiles
    that contain it, along rows and columns separately. The windows must form a grid
    (a product of row starts and column starts, as :func:`tile_grid` makes); the grid
    is that of the windows given, so a missing tile shifts its pixels to the nearest
    tiles that are given. Pixels whose owning grid tile is missing fall back to any
    given tile that contains them (the first in the given order); pixels no tile covers
    keep the fill value.

    Parameters
    ----------
    windows : sequence of Window
        The tiles, inside the image; their order numbers the tiles.
    shape : (int, int)
        ``(height, width)`` of the image.

    Raises
    ------
    ValueError
        If a window reaches outside the image.
    """

    def __init__(self, windows: Sequence[Window], *, shape: tuple[int, int]) -> None:
        height, width = (int(v) for v in shape)
        self.shape = (height, width)
        self.windows = list(windows)
        for k, w in enumerate(self.windows):
            if w.row < 0 or w.col < 0 or w.row + w.height > height or w.col + w.width > width:
                raise ValueError(
                    f"windows[{k}]: {w.as_tuple()} reaches outside the image of "
                    f"{height} x {width} pixels"
                )
        n = len(self.windows)
        self._box = np.array([w.as_tuple() for w in self.windows], np.int64).reshape(n, 4)
        if n == 0:
            return
        row_starts = np.unique(self._box[:, 0])
        col_starts = np.unique(self._box[:, 1])
        self._ri = nearest_tile_index(height, row_starts, int(self._box[:, 2].max()))
        self._ci = nearest_tile_index(width, col_starts, int(self._box[:, 3].max()))
        self._tile_ri = np.searchsorted(row_starts, self._box[:, 0])
        self._tile_ci = np.searchsorted(col_starts, self._box[:, 1])
        # the grid pass uses one tile per grid position: the last given at that position
        last: dict[tuple[int, int], int] = {}
        for k, w in enumerate(self.windows):
            last[(w.row, w.col)] = k
        self._grid_tile = np.zeros(n, bool)
        self._grid_tile[list(last.values())] = True

    def tiles_in(self, window: Window) -> np.ndarray:
        """Indices of the tiles that reach into ``window``, in the given order.

        Returns
        -------
        ndarray, shape (k,), int64
        """
        if len(self.windows) == 0:
            return np.zeros(0, np.int64)
        b = self._box
        hit = (
            (b[:, 0] < window.row + window.height)
            & (b[:, 0] + b[:, 2] > window.row)
            & (b[:, 1] < window.col + window.width)
            & (b[:, 1] + b[:, 3] > window.col)
        )
        return np.flatnonzero(hit)

    def stitch(
        self,
        masks: Callable[[int], np.ndarray] | Sequence[np.ndarray],
        window: Window | None = None,
        *,
        fill: int = UNLABELLED,
        dtype: np.dtype | type = np.uint8,
    ) -> np.ndarray:
        """The stitched mask inside ``window`` (the whole image when None).

        Parameters
        ----------
        masks : callable(k) -> ndarray, or sequence of ndarray
            The mask of tile ``k``, shape (window height, window width); only the tiles
            reaching into ``window`` are asked for.
        window : Window, optional
            Part of the image to stitch.
        fill : int
            Value of pixels no tile covers.
        dtype : numpy dtype
            Type of the result.

        Returns
        -------
        ndarray, shape (window.height, window.width)
        """
        get = masks if callable(masks) else masks.__getitem__
        height, width = self.shape
        w = window or Window(0, 0, height, width)
        out = np.full((w.height, w.width), fill, dtype=dtype)
        ks = self.tiles_in(w)
        if len(ks) == 0:
            return out
        covered = np.zeros((w.height, w.width), bool)
        ri = self._ri[w.row : w.row + w.height]
        ci = self._ci[w.col : w.col + w.width]
        parts: list[tuple[int, tuple[slice, slice], tuple[slice, slice], np.ndarray]] = []
        for k in ks:
            tile = self.windows[k]
            m = np.asarray(get(int(k)))
            if m.shape[:2] != (tile.height, tile.width):
                raise ValueError(
                    f"masks: tile at row {tile.row} col {tile.col} expected shape "
                    f"{(tile.height, tile.width)}, got {m.shape}"
                )
            r0, r1 = max(tile.row, w.row), min(tile.row + tile.height, w.row + w.height)
            c0, c1 = max(tile.col, w.col), min(tile.col + tile.width, w.col + w.width)
            at_out = (slice(r0 - w.row, r1 - w.row), slice(c0 - w.col, c1 - w.col))
            at_tile = (slice(r0 - tile.row, r1 - tile.row), slice(c0 - tile.col, c1 - tile.col))
            parts.append((int(k), at_out, at_tile, m))
            if not self._grid_tile[k]:
                continue
            rsel = ri[at_out[0]] == self._tile_ri[k]
            csel = ci[at_out[1]] == self._tile_ci[k]
            sel = rsel[:, None] & csel[None, :]
            out[at_out][sel] = m[at_tile][sel]
            covered[at_out] |= sel
        if not covered.all():
            # a missing grid tile: let any given tile that contains the pixel fill it
            for _k, at_out, at_tile, m in parts:
                hole = ~covered[at_out]
                if hole.any():
                    out[at_out][hole] = m[at_tile][hole]
                    covered[at_out] |= hole
        return out

    def owner(self, window: Window | None = None) -> np.ndarray:
        """Index of the tile each pixel of ``window`` is taken from; -1 where none covers.

        Returns
        -------
        ndarray, shape (window.height, window.width), int32
        """
        return self.stitch(
            lambda k: np.full((self.windows[k].height, self.windows[k].width), k, np.int32),
            window,
            fill=-1,
            dtype=np.int32,
        )


def _window_of_key(key: object, shape: tuple[int, ...]) -> Window:
    """The window of ``raster[key]`` for a row slice or a (row slice, column slice)."""
    keys = key if isinstance(key, tuple) else (key,)
    if keys and keys[0] is Ellipsis:
        keys = keys[1:]
    if len(keys) > 2 or not all(isinstance(k, slice) for k in keys):
        raise TypeError(
            f"index: expected a row slice or (row slice, column slice), got {key!r}; "
            "read big rasters by window"
        )
    bounds = []
    for k, n in zip((*keys, slice(None), slice(None))[:2], shape[:2], strict=True):
        start, stop, step = k.indices(n)
        if step != 1:
            raise TypeError(f"index: expected slices with step 1, got {key!r}")
        bounds.append((start, max(start, stop)))
    (r0, r1), (c0, c1) = bounds
    return Window(r0, c0, r1 - r0, c1 - c0)


class LazyRaster:
    """An image or mask that is read window by window, sliced like an array.

    ``raster[r0:r1]`` and ``raster[r0:r1, c0:c1]`` (slices of step 1) return numpy
    arrays of that window; ``raster.shape`` is the whole size. Converting the whole
    raster to an array is refused: read it strip by strip (:func:`row_strips`).

    Parameters
    ----------
    read : callable(Window) -> ndarray
        Returns the pixels of a window inside the raster.
    shape : tuple of int
        ``(height, width)`` or ``(height, width, channels)``.
    dtype : numpy dtype
        Type of what ``read`` returns.
    """

    def __init__(
        self,
        read: Callable[[Window], np.ndarray],
        *,
        shape: tuple[int, ...],
        dtype: np.dtype | type = np.uint8,
    ) -> None:
        self._read = read
        self.shape = tuple(int(v) for v in shape)
        self.dtype = np.dtype(dtype)

    @property
    def ndim(self) -> int:
        return len(self.shape)

    def read(self, window: Window) -> np.ndarray:
        """The pixels of ``window``."""
        return self._read(window)

    def __getitem__(self, key: object) -> np.ndarray:
        w = _window_of_key(key, self.shape)
        if w.height == 0 or w.width == 0:
            return np.zeros((w.height, w.width, *self.shape[2:]), self.dtype)
        return self._read(w)

    def __array__(self, dtype=None, copy=None):  # noqa: ANN001 - numpy protocol
        raise TypeError(
            f"a LazyRaster of shape {self.shape} is read window by window "
            "(raster[r0:r1]), not converted whole"
        )


class StitchedMask(LazyRaster):
    """An image mask stitched from tile masks window by window as it is read.

    The tile masks are loaded only for the windows read, and kept while they fit the
    ``cache_bytes`` budget (strips read top to bottom reuse the tiles they share).

    Parameters
    ----------
    layout : TileLayout
        The tiles and the image shape.
    load : callable(k) -> ndarray
        The mask of tile ``k`` of ``layout.windows``.
    fill : int
        Value of pixels no tile covers (255, unlabelled).
    dtype : numpy dtype
        Type of the masks.
    cache_bytes : int
        Decoded tile masks kept for the next read.
    """

    def __init__(
        self,
        layout: TileLayout,
        load: Callable[[int], np.ndarray],
        *,
        fill: int = UNLABELLED,
        dtype: np.dtype | type = np.uint8,
        cache_bytes: int = 1 << 26,
    ) -> None:
        super().__init__(self._stitch, shape=layout.shape, dtype=dtype)
        self.layout = layout
        self.fill = fill
        self._load = load
        self._cache: OrderedDict[int, np.ndarray] = OrderedDict()
        self._cache_bytes = int(cache_bytes)
        self._held = 0

    def _tile(self, k: int) -> np.ndarray:
        m = self._cache.get(k)
        if m is not None:
            self._cache.move_to_end(k)
            return m
        m = np.asarray(self._load(k))
        self._cache[k] = m
        self._held += m.nbytes
        while self._held > self._cache_bytes and len(self._cache) > 1:
            _, old = self._cache.popitem(last=False)
            self._held -= old.nbytes
        return m

    def _stitch(self, window: Window) -> np.ndarray:
        return self.layout.stitch(self._tile, window, fill=self.fill, dtype=self.dtype)


def stitch(
    masks: Sequence[np.ndarray],
    windows: Sequence[Window],
    *,
    shape: tuple[int, int],
    fill: int = UNLABELLED,
) -> np.ndarray:
    """Assemble tile masks into one image mask (the rule of :class:`TileLayout`).

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
    dtype = masks[0].dtype if len(masks) else np.uint8
    return TileLayout(windows, shape=shape).stitch(masks, fill=fill, dtype=dtype)


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
    return TileLayout(windows, shape=shape).owner()
