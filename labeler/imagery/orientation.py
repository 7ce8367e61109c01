"""The TIFF orientation tag: reading it, and windows of the upright image from the stored one.

A TIFF may store its rows in another order than a viewer shows them: tag 274,
*Orientation* (TIFF 6.0 specification, section 8; the same eight values as EXIF), says
where row 0 and column 0 of the stored raster lie. GDAL, and so rasterio, reads the
raster as stored and does not report the tag, so :func:`tiff_orientation` reads it from
the file's first image directory itself.

The program works on the upright image (as a viewer shows it). A window of the upright
image is a window of the stored raster (:meth:`Orientation.stored_window`), read as
stored and turned (:meth:`Orientation.upright`); a georeferencing transform of the stored
raster becomes one of the upright image (:meth:`Orientation.upright_transform`). The
eight turns are those of Pillow's ``ImageOps.exif_transpose`` (the tests use it as the
reference).
"""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass

import numpy as np
from affine import Affine

from labeler.imagery.tiling import Window

__all__ = ["ORIENTATION_TAG", "Orientation", "tiff_orientation"]

#: TIFF tag number of Orientation (TIFF 6.0, section 8).
ORIENTATION_TAG = 274

#: Stored corner coordinates (x, y) of an upright point (u, v), as affine coefficients
#: (a, b, c, d, e, f): x = a*u + b*v + c*W, y = d*u + e*v + f*H (W, H: stored size).
_TO_STORED = {
    1: (1, 0, 0, 0, 1, 0),
    2: (-1, 0, 1, 0, 1, 0),  # row 0 top, column 0 right: mirrored left-right
    3: (-1, 0, 1, 0, -1, 1),  # row 0 bottom, column 0 right: turned half a turn
    4: (1, 0, 0, 0, -1, 1),  # row 0 bottom, column 0 left: mirrored top-bottom
    5: (0, 1, 0, 1, 0, 0),  # row 0 left, column 0 top: transposed
    6: (0, 1, 0, -1, 0, 1),  # row 0 right, column 0 top: a quarter turn clockwise to view
    7: (0, -1, 1, -1, 0, 1),  # row 0 right, column 0 bottom: transverse
    8: (0, -1, 1, 1, 0, 0),  # row 0 left, column 0 bottom: a quarter turn anticlockwise
}


def tiff_orientation(path: str | os.PathLike[str]) -> int:
    """The Orientation tag of a TIFF's first image (1 when absent or unreadable).

    Reads the header and the first image file directory only (classic TIFF and
    BigTIFF, either byte order).

    Parameters
    ----------
    path : path-like
        A TIFF file.

    Returns
    -------
    int
        1..8; 1 (top-left) when the tag is missing, out of range or the header damaged
        (the reader reports a damaged file itself).
    """
    try:
        with open(path, "rb") as fh:
            head = fh.read(16)
            order = {b"II": "<", b"MM": ">"}.get(head[:2])
            if order is None:
                return 1
            magic = struct.unpack(order + "H", head[2:4])[0]
            if magic == 42:
                offset = struct.unpack(order + "I", head[4:8])[0]
                count_fmt, entry_size, value_at = "H", 12, 8
            elif magic == 43:
                offset = struct.unpack(order + "Q", head[8:16])[0]
                count_fmt, entry_size, value_at = "Q", 20, 12
            else:
                return 1
            fh.seek(offset)
            raw = fh.read(struct.calcsize(count_fmt))
            (count,) = struct.unpack(order + count_fmt, raw)
            entries = fh.read(min(count, 4096) * entry_size)
    except (OSError, struct.error):
        return 1
    for k in range(len(entries) // entry_size):
        entry = entries[k * entry_size : (k + 1) * entry_size]
        tag, kind = struct.unpack(order + "HH", entry[:4])
        if tag != ORIENTATION_TAG:
            continue
        if kind == 3:  # SHORT, left-justified in the value field
            value = struct.unpack(order + "H", entry[value_at : value_at + 2])[0]
        elif kind == 4:  # LONG (not the specification's type, but written by some tools)
            value = struct.unpack(order + "I", entry[value_at : value_at + 4])[0]
        else:
            return 1
        return value if value in _TO_STORED else 1
    return 1


@dataclass(frozen=True)
class Orientation:
    """How a stored raster of ``stored_shape`` (rows, columns) is turned upright.

    Attributes
    ----------
    code : int
        The TIFF Orientation value, 1..8.
    stored_shape : tuple of int
        (rows, columns) of the raster as stored.
    """

    code: int
    stored_shape: tuple[int, int]

    def __post_init__(self) -> None:
        if self.code not in _TO_STORED:
            raise ValueError(f"code: expected a TIFF orientation 1..8, got {self.code!r}")

    @property
    def swaps_axes(self) -> bool:
        """Rows become columns (orientations 5 to 8)."""
        return self.code >= 5

    @property
    def shape(self) -> tuple[int, int]:
        """(rows, columns) of the upright image."""
        h, w = self.stored_shape
        return (w, h) if self.swaps_axes else (h, w)

    def _to_stored(self) -> Affine:
        a, b, c, d, e, f = _TO_STORED[self.code]
        h, w = self.stored_shape
        return Affine(a, b, c * w, d, e, f * h)

    def stored_window(self, window: Window) -> Window:
        """The stored window holding the pixels of the upright ``window``.

        Parameters
        ----------
        window : Window
            Rows and columns of the upright image.

        Returns
        -------
        Window
            Rows and columns of the stored raster (same pixel count).
        """
        m = self._to_stored()
        corners = [
            m @ (window.col, window.row),
            m @ (window.col + window.width, window.row + window.height),
        ]
        xs = sorted(round(x) for x, _ in corners)
        ys = sorted(round(y) for _, y in corners)
        return Window(ys[0], xs[0], ys[1] - ys[0], xs[1] - xs[0])

    def upright(self, stored: np.ndarray) -> np.ndarray:
        """Turn pixels read from :meth:`stored_window` (rows, columns, ...) upright."""
        c = self.code
        if c == 1:
            return stored
        if c == 2:
            out = stored[:, ::-1]
        elif c == 3:
            out = stored[::-1, ::-1]
        elif c == 4:
            out = stored[::-1]
        elif c == 5:
            out = stored.swapaxes(0, 1)
        elif c == 6:
            out = np.rot90(stored, -1)
        elif c == 7:
            out = np.rot90(stored, -1)[::-1]
        else:
            out = np.rot90(stored, 1)
        return np.ascontiguousarray(out)

    def upright_transform(self, stored: Affine) -> Affine:
        """The georeferencing transform of the upright image from that of the stored raster.

        Parameters
        ----------
        stored : affine.Affine
            Pixel corner (column, row) of the stored raster -> map (x, y).

        Returns
        -------
        affine.Affine
            Pixel corner (column, row) of the upright image -> the same map (x, y).
        """
        return stored @ self._to_stored()
