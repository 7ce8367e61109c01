"""View geometry of the editor: tile <-> view coordinates, zoom, pan, the two panes.

Coordinates
    Tile points are ``(row, col)`` in tile pixel index units (pixel ``(i, j)`` has its
    centre at ``(i, j)``; see :mod:`labeler.masks.edits`). View points are ``(row, col)``
    of the rendered view, in view pixels. :class:`ViewTransform` converts between them.

Panes
    The view shows one pane, or several side by side (this edit on the left, the masks
    compared with it to its right: a second mask, or every annotator's mask when a
    reviewer settles a tile) separated by :data:`PANE_GAP` view pixels. All panes share
    one transform. :class:`Viewport` holds the view size, the transform and the number of
    panes, and answers which pane a view point falls in.

Nothing here draws or edits a mask.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "PANE_GAP",
    "ZOOM_RANGE",
    "ViewTransform",
    "Viewport",
    "fit_view_shape",
    "check_view_shape",
]

#: View pixels between the two panes of the side-by-side view.
PANE_GAP = 4
#: Smallest and largest zoom (view pixels per tile pixel) that zooming reaches.
ZOOM_RANGE = (1.0 / 16.0, 64.0)


@dataclass(frozen=True)
class ViewTransform:
    """Maps view pixels to tile pixels: a zoom and the tile position of the view's corner.

    Parameters
    ----------
    zoom : float
        View pixels per tile pixel (> 0).
    origin_row, origin_col : float
        Tile position (in pixel-corner units: pixel ``i`` spans ``[i, i + 1)``) of the
        top-left corner of the view.

    Notes
    -----
    The centre of view pixel ``v`` sits at corner coordinate ``v + 0.5`` of the view, that
    is tile corner coordinate ``origin + (v + 0.5) / zoom``; view pixel ``v`` shows tile
    pixel ``floor(origin + (v + 0.5) / zoom)``, and its centre in tile index units (centre
    of pixel ``i`` at ``i``) is ``origin + (v + 0.5) / zoom - 0.5``.
    """

    zoom: float = 1.0
    origin_row: float = 0.0
    origin_col: float = 0.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.zoom) and self.zoom > 0):
            raise ValueError(f"zoom: expected a positive number, got {self.zoom}")

    @classmethod
    def fit(cls, tile_shape: tuple[int, int], view_shape: tuple[int, int]) -> ViewTransform:
        """The largest zoom showing the whole tile, centred in the view.

        Parameters
        ----------
        tile_shape : (int, int)
            ``(H, W)`` of the tile.
        view_shape : (int, int)
            ``(rows, cols)`` of the view (or pane).

        Returns
        -------
        ViewTransform
        """
        th, tw = int(tile_shape[0]), int(tile_shape[1])
        vh, vw = int(view_shape[0]), int(view_shape[1])
        if min(th, tw, vh, vw) < 1:
            raise ValueError(
                f"tile_shape, view_shape: expected sizes of at least 1 px, got {tile_shape} "
                f"and {view_shape}"
            )
        zoom = min(vh / th, vw / tw)
        return cls(zoom, (th - vh / zoom) / 2.0, (tw - vw / zoom) / 2.0)

    def view_to_tile(self, view_row, view_col):
        """Tile index coordinates (floats) of view pixel centres (scalars or arrays)."""
        return (
            self.origin_row + (np.asarray(view_row, np.float64) + 0.5) / self.zoom - 0.5,
            self.origin_col + (np.asarray(view_col, np.float64) + 0.5) / self.zoom - 0.5,
        )

    def tile_to_view(self, tile_row, tile_col):
        """View coordinates (floats) of tile index coordinates; inverse of view_to_tile."""
        return (
            (np.asarray(tile_row, np.float64) + 0.5 - self.origin_row) * self.zoom - 0.5,
            (np.asarray(tile_col, np.float64) + 0.5 - self.origin_col) * self.zoom - 0.5,
        )

    def pixel_at(self, view_row, view_col) -> tuple[int, int]:
        """The tile pixel ``(row, col)`` that view pixel ``(view_row, view_col)`` shows
        (may lie outside the tile)."""
        return (
            int(math.floor(self.origin_row + (view_row + 0.5) / self.zoom)),
            int(math.floor(self.origin_col + (view_col + 0.5) / self.zoom)),
        )

    def index_map(self, n_view: int, n_tile: int, *, axis: int) -> np.ndarray:
        """Tile index shown by each view pixel along ``axis`` (0 rows, 1 cols), -1 outside.

        Returns
        -------
        index : ndarray, shape (n_view,), int64
        """
        origin = self.origin_row if axis == 0 else self.origin_col
        idx = np.floor(origin + (np.arange(n_view) + 0.5) / self.zoom).astype(np.int64)
        idx[(idx < 0) | (idx >= n_tile)] = -1
        return idx

    def zoomed(self, factor: float, *, at: tuple[float, float]) -> ViewTransform:
        """Zoom by ``factor`` keeping the tile point under view point ``at`` in place
        (the zoom stays within :data:`ZOOM_RANGE`)."""
        zoom = float(np.clip(self.zoom * factor, *ZOOM_RANGE))
        vr, vc = at
        ur = self.origin_row + (vr + 0.5) / self.zoom
        uc = self.origin_col + (vc + 0.5) / self.zoom
        return ViewTransform(zoom, ur - (vr + 0.5) / zoom, uc - (vc + 0.5) / zoom)

    def panned(self, d_rows: float, d_cols: float) -> ViewTransform:
        """Move the content by ``(d_rows, d_cols)`` view pixels (as a drag does)."""
        return ViewTransform(
            self.zoom, self.origin_row - d_rows / self.zoom, self.origin_col - d_cols / self.zoom
        )


def fit_view_shape(
    tile_shape: tuple[int, int],
    *,
    max_shape: tuple[int, int] = (900, 1200),
    max_zoom: int = 8,
    panes: int = 1,
) -> tuple[int, int]:
    """A view size for a tile: the largest whole zoom (1..``max_zoom``) that fits in
    ``max_shape``, or the tile scaled down to fit when it is larger than that.

    With ``panes`` > 1 the view holds that many copies of the tile side by side,
    :data:`PANE_GAP` apart, each at that zoom: the view is exactly as wide as the panes,
    so no backdrop bands are left beside or above them.

    Parameters
    ----------
    tile_shape : (int, int)
        ``(H, W)`` of the tile.
    max_shape : (int, int)
        Largest ``(rows, cols)`` of the view (leave room for the status strip).
    max_zoom : int
        Largest whole zoom.
    panes : int
        Panes side by side (1: the edit alone).

    Returns
    -------
    (rows, cols) : (int, int)
        At least 8 x 8 per pane.
    """
    h, w = int(tile_shape[0]), int(tile_shape[1])
    mr, mc = int(max_shape[0]), int(max_shape[1])
    n = int(panes)
    if n < 1:
        raise ValueError(f"panes: expected 1 or more panes side by side, got {panes}")
    pane_cols = (mc - (n - 1) * PANE_GAP) // n
    if min(h, w, mr, pane_cols) < 1 or max_zoom < 1:
        raise ValueError(
            f"tile_shape, max_shape, max_zoom: expected positive sizes, got {tile_shape}, "
            f"{max_shape}, {max_zoom} (for {n} panes of at most {pane_cols} columns)"
        )
    scale = min(mr / h, pane_cols / w)
    if scale >= 1:
        scale = float(min(int(scale), int(max_zoom)))
    rows, cols = max(int(h * scale), 8), max(int(w * scale), 8)
    return rows, n * cols + (n - 1) * PANE_GAP


def check_view_shape(view_shape: tuple[int, int]) -> tuple[int, int]:
    """``view_shape`` as two ints, or ``ValueError`` when it is not at least 8 x 8."""
    if len(view_shape) != 2 or int(view_shape[0]) < 8 or int(view_shape[1]) < 8:
        raise ValueError(
            f"view_shape: expected (rows, cols) of at least 8 px each, got {view_shape}"
        )
    return int(view_shape[0]), int(view_shape[1])


class Viewport:
    """The view of one tile: its size, the transform and the split into two panes.

    Parameters
    ----------
    tile_shape : (int, int)
        ``(H, W)`` of the tile.
    view_shape : (int, int)
        ``(rows, cols)`` of the whole view, at least 8 x 8.

    Notes
    -----
    Every change of the size or the split fits the tile into a pane again (the zoom and
    pan are reset); zooming and panning keep the split.
    """

    def __init__(self, tile_shape: tuple[int, int], view_shape: tuple[int, int]) -> None:
        self._tile_shape = (int(tile_shape[0]), int(tile_shape[1]))
        self._view_shape = check_view_shape(view_shape)
        self._panes = 1
        self.transform = ViewTransform.fit(self._tile_shape, self.pane_shape)

    @property
    def view_shape(self) -> tuple[int, int]:
        """``(rows, cols)`` of the whole view."""
        return self._view_shape

    @property
    def split(self) -> bool:
        """True when the view shows more than one pane side by side."""
        return self._panes > 1

    @property
    def panes(self) -> int:
        """Number of panes side by side (1: the edit alone)."""
        return self._panes

    @property
    def pane_shape(self) -> tuple[int, int]:
        """Size of one pane: the whole view, or its share (less the gaps) when split."""
        vh, vw = self._view_shape
        n = self._panes
        return vh, max((vw - (n - 1) * PANE_GAP) // n, 1)

    @property
    def pane_offsets(self) -> tuple[int, ...]:
        """First view column of each pane: ``(0,)``, ``(0, pane width + gap, ...)``."""
        step = self.pane_shape[1] + PANE_GAP
        return tuple(k * step for k in range(self._panes))

    def resize(self, view_shape: tuple[int, int]) -> None:
        """Change the view size and fit the tile into it."""
        self._view_shape = check_view_shape(view_shape)
        self.fit()

    def set_split(self, split: bool) -> None:
        """Show one pane or two, and fit the tile into a pane."""
        self.set_panes(2 if split else 1)

    def set_panes(self, panes: int) -> None:
        """Show ``panes`` panes side by side (at least 1), and fit the tile into a pane."""
        n = int(panes)
        if n < 1:
            raise ValueError(f"panes: expected 1 or more panes side by side, got {panes}")
        self._panes = n
        self.fit()

    def fit(self) -> None:
        """Show the whole tile, centred in a pane."""
        self.transform = ViewTransform.fit(self._tile_shape, self.pane_shape)

    def zoom_at(self, view_point: tuple[float, float], factor: float) -> None:
        """Zoom by ``factor`` about a view point (of either pane)."""
        _pane, pr, pc = self.pane_of(view_point)
        self.transform = self.transform.zoomed(factor, at=(pr, pc))

    def pan(self, d_rows: float, d_cols: float) -> None:
        """Move the content by view pixels."""
        self.transform = self.transform.panned(d_rows, d_cols)

    def pane_of(self, view_point: tuple[float, float]) -> tuple[int, float, float]:
        """Which pane a view point is in, and the point within that pane.

        Returns
        -------
        (pane, row, col) : (int, float, float)
            ``pane`` is 0 (the left or only pane), 1, 2, ... (the panes to its right) or
            -1 (a gap); ``row, col`` are relative to the pane's top-left corner. Points
            left of the view count to pane 0, points right of it to the last pane.
        """
        vr, vc = float(view_point[0]), float(view_point[1])
        if self._panes == 1:
            return 0, vr, vc
        pw = self.pane_shape[1]
        step = pw + PANE_GAP
        k = min(max(int(math.floor(vc / step)), 0), self._panes - 1)
        within = vc - k * step
        if within < pw or k == self._panes - 1 or vc < 0:
            return k, vr, within
        return -1, vr, vc
