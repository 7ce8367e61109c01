"""Hand-made PNG files for the import tests, written from the PNG specification.

W3C, "Portable Network Graphics (PNG) Specification (Second Edition)", 2003: chunk layout
and CRC (section 5.3), IHDR (11.2.2), filter type 0 "None" per scanline (9.2), Adam7
interlacing passes (8.2), PLTE (11.2.3). Used where the file itself is the point
(interlaced, damaged or header-only files); Pillow (a reference decoder) reads the
well-formed ones back as the oracle.
"""

from __future__ import annotations

import struct
import zlib

import numpy as np

__all__ = ["chunk", "header_only_png", "raw_png"]

SIGNATURE = b"\x89PNG\r\n\x1a\n"
#: Adam7 passes (x start, y start, x step, y step), PNG specification section 8.2.
ADAM7 = ((0, 0, 8, 8), (4, 0, 8, 8), (0, 4, 4, 8), (2, 0, 4, 4), (0, 2, 2, 4), (1, 0, 2, 2),
         (0, 1, 1, 2))


def chunk(kind: bytes, body: bytes) -> bytes:
    """One chunk: length, type, data, CRC-32 of type and data (section 5.3)."""
    return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))


def _ihdr(width, height, depth, colour_type, interlaced):
    return chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, depth, colour_type, 0, 0,
                                      int(interlaced)))


def header_only_png(width, height, *, depth=8, colour_type=0, interlaced=False) -> bytes:
    """A PNG with a header declaring ``width`` x ``height`` but no pixel data."""
    return (SIGNATURE + _ihdr(width, height, depth, colour_type, interlaced)
            + chunk(b"IDAT", b"") + chunk(b"IEND", b""))


def _scanlines(samples: np.ndarray) -> bytes:
    """Filter byte 0 before each row of big-endian samples (rows, width * channels)."""
    rows = samples.astype(samples.dtype.newbyteorder(">")).reshape(samples.shape[0], -1)
    return b"".join(b"\x00" + r.tobytes() for r in rows)


def raw_png(array: np.ndarray, *, colour_type: int, interlaced: bool = False,
            palette: list[tuple[int, int, int]] | None = None) -> bytes:
    """Encode an 8- or 16-bit array (H, W) or (H, W, C) as PNG, optionally Adam7-interlaced.

    Parameters
    ----------
    array : ndarray, uint8 or uint16
    colour_type : int
        0 grey, 2 RGB, 3 palette, 4 grey with alpha, 6 RGBA.
    interlaced : bool
    palette : list of (r, g, b), optional
        The PLTE entries of a palette image.
    """
    a = np.asarray(array)
    depth = 16 if a.dtype == np.uint16 else 8
    height, width = a.shape[:2]
    if interlaced:
        data = b""
        for x0, y0, dx, dy in ADAM7:
            sub = a[y0::dy, x0::dx]
            if sub.shape[0] and sub.shape[1]:
                data += _scanlines(sub)
    else:
        data = _scanlines(a)
    out = SIGNATURE + _ihdr(width, height, depth, colour_type, interlaced)
    if palette is not None:
        out += chunk(b"PLTE", bytes(v for rgb in palette for v in rgb))
    return out + chunk(b"IDAT", zlib.compress(data)) + chunk(b"IEND", b"")
