"""The structure of a PNG file: its header and chunks, checked without decoding a pixel.

PNG specification (W3C, second edition, 2003): the signature (section 5.2), the chunk
layout with its CRC-32 over type and data (5.3), the ``IHDR`` header chunk (11.2.2) and
the colour types with their allowed bit depths (table 11.1). :func:`read_png_header`
reads the header and walks every chunk once, so a file that is not a PNG, is damaged
(a chunk failing its CRC) or is cut short is refused before any pixel is decoded: a
damaged compressed stream could otherwise decode into plausible class values.
"""

from __future__ import annotations

import os
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path

from labeler.errors import MaskImportError
from labeler.export.mask_files import check_mask_path

__all__ = ["COLOUR_TYPES", "PngHeader", "read_png_header"]

_SIGNATURE = b"\x89PNG\r\n\x1a\n"
#: Colour type -> (name, channels, allowed bit depths); PNG specification table 11.1.
COLOUR_TYPES = {
    0: ("grey", 1, (1, 2, 4, 8, 16)),
    2: ("RGB", 3, (8, 16)),
    3: ("palette", 1, (1, 2, 4, 8)),
    4: ("grey with alpha", 2, (8, 16)),
    6: ("RGBA", 4, (8, 16)),
}


@dataclass(frozen=True)
class PngHeader:
    """The ``IHDR`` chunk of a PNG file.

    Attributes
    ----------
    height, width : int
        Size in pixels.
    bit_depth : int
        Bits per sample (per palette index for palette images).
    colour_type : int
        0 grey, 2 RGB, 3 palette, 4 grey with alpha, 6 RGBA.
    interlaced : bool
        Adam7 interlacing.
    """

    height: int
    width: int
    bit_depth: int
    colour_type: int
    interlaced: bool

    @property
    def kind(self) -> str:
        """E.g. ``"8-bit grey"``, ``"16-bit RGB"``, ``"4-bit palette"``."""
        return f"{self.bit_depth}-bit {COLOUR_TYPES[self.colour_type][0]}"

    @property
    def channels(self) -> int:
        """Samples per pixel as stored (1 for palette images)."""
        return COLOUR_TYPES[self.colour_type][1]


def read_png_header(path: str | os.PathLike[str]) -> PngHeader:
    """Read and check the signature and ``IHDR`` chunk of a PNG file (no pixel is decoded).

    Parameters
    ----------
    path : path-like

    Returns
    -------
    PngHeader

    Raises
    ------
    MaskImportError
        Naming the file: missing, not a regular file, unreadable, not a PNG, damaged
        header (zero size, a colour type or bit depth the specification does not
        define), a chunk failing its CRC check, or truncated.
    """
    p = Path(path)
    name = str(p)
    check_mask_path(p)
    try:
        with open(p, "rb") as fh:
            head = fh.read(33)
    except OSError as err:
        raise MaskImportError(f"{name}: cannot be read ({err.strerror or err})") from None
    if not head.startswith(_SIGNATURE):
        what = "an empty file" if not head else "no PNG signature"
        raise MaskImportError(
            f"{name}: not a PNG file ({what}); class masks are read from PNG or GeoJSON files"
        )
    if len(head) < 33 or head[12:16] != b"IHDR" or struct.unpack(">I", head[8:12])[0] != 13:
        raise MaskImportError(f"{name}: damaged PNG (no complete IHDR header chunk)")
    body = head[16:29]
    if struct.unpack(">I", head[29:33])[0] != zlib.crc32(head[12:29]):
        raise MaskImportError(f"{name}: damaged PNG (the IHDR header chunk fails its CRC check)")
    width, height, depth, ctype, compression, filtering, interlace = struct.unpack(">IIBBBBB", body)
    if width == 0 or height == 0 or width >= 2**31 or height >= 2**31:
        raise MaskImportError(f"{name}: damaged PNG (it declares {width} x {height} pixels)")
    if ctype not in COLOUR_TYPES or depth not in COLOUR_TYPES[ctype][2]:
        raise MaskImportError(
            f"{name}: damaged PNG (colour type {ctype} with bit depth {depth} is not defined "
            "by the PNG specification)"
        )
    if compression != 0 or filtering != 0 or interlace not in (0, 1):
        raise MaskImportError(f"{name}: damaged PNG (unknown compression, filter or interlace)")
    _check_chunks(p, name)
    return PngHeader(
        height=height, width=width, bit_depth=depth, colour_type=ctype, interlaced=bool(interlace)
    )


def _check_chunks(path: Path, name: str) -> None:
    """Walk every chunk: each must pass its CRC check, and IEND must end the image data.

    PNG specification section 5.3: the CRC-32 covers the chunk type and data. Reading the
    file once this way (a megabyte at a time) finds damage and truncation before any
    pixel is decoded; a damaged stream could otherwise decode to plausible class values.
    """
    seen_data = False
    try:
        with open(path, "rb") as fh:
            fh.seek(len(_SIGNATURE))
            while True:
                at = fh.tell()
                head = fh.read(8)
                if len(head) < 8:
                    raise MaskImportError(
                        f"{name}: truncated PNG (the file ends at byte {at} before its IEND "
                        "chunk); copy or export it again"
                    )
                length, kind = struct.unpack(">I", head[:4])[0], head[4:]
                if length >= 2**31 or not kind.isalpha():
                    raise MaskImportError(f"{name}: damaged PNG (no valid chunk at byte {at})")
                crc = zlib.crc32(kind)
                left = length
                while left:
                    piece = fh.read(min(left, 2**20))
                    if not piece:
                        break
                    crc = zlib.crc32(piece, crc)
                    left -= len(piece)
                stored = fh.read(4)
                label = kind.decode("ascii")
                if left or len(stored) < 4:
                    raise MaskImportError(
                        f"{name}: truncated PNG (the file ends inside its {label} chunk at "
                        f"byte {at}); copy or export it again"
                    )
                if struct.unpack(">I", stored)[0] != crc:
                    raise MaskImportError(
                        f"{name}: damaged PNG (its {label} chunk at byte {at} fails its CRC "
                        "check); copy or export it again"
                    )
                seen_data |= kind == b"IDAT"
                if kind == b"IEND":
                    break
    except OSError as err:
        raise MaskImportError(f"{name}: cannot be read ({err.strerror or err})") from None
    if not seen_data:
        raise MaskImportError(f"{name}: damaged PNG (no IDAT image data chunk)")
