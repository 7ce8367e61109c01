"""Writing a PNG block of rows by block of rows, so that no image is held whole.

A class mask or a colour preview of a 20000 x 20000 orthomosaic is 400 MB or 1.2 GB as
an array; :class:`PngRowWriter` takes it in blocks of rows (a strip of the stitched
mask, a strip of the preview), filters and deflates each block and appends it to the
file, so memory holds one block at a time.

The file is standard PNG (W3C Portable Network Graphics Specification, second edition,
ISO/IEC 15948:2003): an ``IHDR`` chunk (bit depth 8, colour type 0 for grey / class
indices or 2 for RGB, no interlace), the filtered rows deflated as one zlib stream split
over ``IDAT`` chunks, then ``IEND``. Each row gets the filter of the five the
specification defines (None, Sub, Up, Average, Paeth; section 9.2) whose output has the
smallest sum of absolute values taken as signed bytes, the heuristic of section 12.8.
Filtering is vectorised over a block; the Paeth predictor of encoding only looks at the
raw bytes of the neighbours, so it vectorises too (decoding, which needs the decoded
left neighbour, does not).

The file is written through :func:`labeler.fileio.atomic_writer`: it appears under its
name only once the last row is written; an error before that leaves nothing.
"""

from __future__ import annotations

import os
import struct
import zlib
from pathlib import Path
from types import TracebackType
from typing import BinaryIO

import numpy as np

from labeler.fileio import atomic_writer

__all__ = ["PNG_SIGNATURE", "PngRowWriter", "filter_rows"]

#: The eight bytes every PNG file starts with (specification section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
#: Deflated bytes gathered before an IDAT chunk is written.
_IDAT_BYTES = 1 << 20
#: Raw row bytes filtered at once (a longer block is filtered in parts).
_FILTER_BYTES = 1 << 22


def _chunk(kind: bytes, data: bytes) -> bytes:
    """A PNG chunk: length, type, data, CRC-32 of type and data (section 5.3)."""
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def filter_rows(rows: np.ndarray, above: np.ndarray, *, bpp: int) -> np.ndarray:
    """Filter rows of raw PNG bytes, each with its best filter (module docstring).

    Parameters
    ----------
    rows : ndarray, shape (n, rowbytes), uint8
        Raw bytes of ``n`` consecutive rows (pixels interleaved, e.g. R, G, B, R, ...).
    above : ndarray, shape (rowbytes,), uint8
        Raw bytes of the row above the first one; zeros for the first row of the image
        (the specification's rule for the first row).
    bpp : int
        Bytes per complete pixel (1 for grey, 3 for RGB).

    Returns
    -------
    ndarray, shape (n, 1 + rowbytes), uint8
        Per row its filter type byte (0..4) followed by the filtered bytes.
    """
    x = np.asarray(rows, np.uint8)
    n, width = x.shape
    b = np.empty_like(x)  # the raw row above
    b[0] = above
    b[1:] = x[:-1]
    a = np.zeros_like(x)  # the raw byte bpp to the left (0 before the row starts)
    a[:, bpp:] = x[:, :-bpp]
    c = np.zeros_like(x)  # the raw byte above-left
    c[:, bpp:] = b[:, :-bpp]
    a16, b16, c16 = a.astype(np.int16), b.astype(np.int16), c.astype(np.int16)
    p = a16 + b16 - c16
    pa, pb, pc = np.abs(p - a16), np.abs(p - b16), np.abs(p - c16)
    paeth = np.where((pa <= pb) & (pa <= pc), a, np.where(pb <= pc, b, c))
    candidates = (
        x,
        x - a,
        x - b,
        x - ((a16 + b16) >> 1).astype(np.uint8),
        x - paeth,
    )
    costs = np.stack(
        [np.abs(f.view(np.int8).astype(np.int32)).sum(axis=1) for f in candidates]
    )
    best = np.argmin(costs, axis=0)  # the first of equal costs: the simpler filter
    out = np.empty((n, width + 1), np.uint8)
    out[:, 0] = best
    for kind, f in enumerate(candidates):
        sel = best == kind
        if sel.any():
            out[sel, 1:] = f[sel]
    return out


class PngRowWriter:
    """A PNG file written block of rows by block of rows (see the module docstring).

    Use it as a context manager; :meth:`write` takes the rows top to bottom and the file
    is complete when every row has been written and the ``with`` block ends.

    Parameters
    ----------
    path : path-like
        Target file; missing folders are created; an existing file is replaced only
        when the new one is complete.
    height, width : int
        Image size in pixels, at least 1 each.
    channels : {1, 3}
        1 for a single-channel 8-bit image (class indices), 3 for 8-bit RGB.
    compress_level : int
        zlib level 0..9 (6, the usual default).

    Raises
    ------
    ValueError
        For a size below 1 pixel, a channel count other than 1 or 3, or a level
        outside 0..9.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        height: int,
        width: int,
        channels: int,
        compress_level: int = 6,
    ) -> None:
        if int(height) < 1 or int(width) < 1 or int(height) >= 2**31 or int(width) >= 2**31:
            raise ValueError(
                f"height, width: expected 1 .. 2**31 - 1 pixels each, got {height} x {width}"
            )
        if channels not in (1, 3):
            raise ValueError(f"channels: expected 1 (grey) or 3 (RGB), got {channels!r}")
        if not 0 <= int(compress_level) <= 9:
            raise ValueError(f"compress_level: expected 0..9, got {compress_level!r}")
        self.path = Path(path)
        self.height, self.width, self.channels = int(height), int(width), int(channels)
        self._level = int(compress_level)
        self._rows_done = 0
        self._above = np.zeros(self.width * self.channels, np.uint8)
        self._pending: list[bytes] = []
        self._pending_bytes = 0
        self._context = None
        self._fh: BinaryIO | None = None
        self._zlib = None

    # -- context -----------------------------------------------------------------------
    def __enter__(self) -> PngRowWriter:
        self._context = atomic_writer(self.path)
        self._fh = self._context.__enter__()
        self._zlib = zlib.compressobj(self._level)
        colour_type = 0 if self.channels == 1 else 2
        header = struct.pack(">IIBBBBB", self.width, self.height, 8, colour_type, 0, 0, 0)
        self._fh.write(PNG_SIGNATURE + _chunk(b"IHDR", header))
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        context, self._context = self._context, None
        if context is None:
            return
        if error is not None:  # drop the temporary file, let the error pass
            context.__exit__(kind, error, trace)
            return
        try:
            if self._rows_done != self.height:
                raise ValueError(
                    f"{self.path}: {self._rows_done} of {self.height} rows written; write "
                    "every row of the image before closing"
                )
            self._pending.append(self._zlib.flush())
            self._flush_idat(force=True)
            self._fh.write(_chunk(b"IEND", b""))
        except BaseException as exc:  # e.g. a full disk: drop the temporary file
            context.__exit__(type(exc), exc, exc.__traceback__)
            raise
        context.__exit__(None, None, None)

    # -- rows --------------------------------------------------------------------------
    def write(self, rows: np.ndarray) -> None:
        """Append the next rows of the image.

        Parameters
        ----------
        rows : ndarray, shape (n, width) for one channel or (n, width, 3) for RGB, uint8

        Raises
        ------
        ValueError
            For rows of another shape or type, or more rows than the image has.
        """
        if self._fh is None:
            raise ValueError(f"{self.path}: open the writer with 'with PngRowWriter(...)' first")
        r = np.asarray(rows)
        want = (self.width,) if self.channels == 1 else (self.width, 3)
        if r.dtype != np.uint8 or r.ndim != 1 + len(want) or r.shape[1:] != want:
            raise ValueError(
                f"rows: expected uint8 of shape (n, {', '.join(map(str, want))}), got "
                f"{r.dtype} {r.shape}"
            )
        if self._rows_done + len(r) > self.height:
            raise ValueError(
                f"rows: {len(r)} more rows would pass the image height {self.height} "
                f"({self._rows_done} written)"
            )
        flat = r.reshape(len(r), -1)
        step = max(1, _FILTER_BYTES // flat.shape[1])
        for start in range(0, len(flat), step):
            block = np.ascontiguousarray(flat[start : start + step])
            filtered = filter_rows(block, self._above, bpp=self.channels)
            self._above = block[-1].copy()
            self._pending.append(self._zlib.compress(filtered.tobytes()))
            self._pending_bytes += len(self._pending[-1])
            self._flush_idat(force=False)
        self._rows_done += len(r)

    def _flush_idat(self, *, force: bool) -> None:
        if self._pending_bytes < _IDAT_BYTES and not force:
            return
        data = b"".join(self._pending)
        self._pending, self._pending_bytes = [], 0
        if data:
            self._fh.write(_chunk(b"IDAT", data))
