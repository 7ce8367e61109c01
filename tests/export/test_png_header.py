"""PNG header and chunks checked without decoding (labeler/export/png_header.py).

Pillow writes the well-formed files (a reference encoder); damaged ones are made by hand
from the PNG specification (tests/export/pngs.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from labeler.errors import MaskImportError
from labeler.export.png_header import read_png_header
from tests.export.pngs import chunk, header_only_png


@pytest.mark.parametrize(
    ("array", "mode", "expected"),
    [
        (np.zeros((5, 7), np.uint8), "L", (5, 7, 8, 0, "8-bit grey")),
        (np.zeros((5, 7), np.uint16), None, (5, 7, 16, 0, "16-bit grey")),
        (np.zeros((5, 7, 3), np.uint8), "RGB", (5, 7, 8, 2, "8-bit RGB")),
        (np.zeros((5, 7, 4), np.uint8), "RGBA", (5, 7, 8, 6, "8-bit RGBA")),
        (np.zeros((5, 7, 2), np.uint8), "LA", (5, 7, 8, 4, "8-bit grey with alpha")),
    ],
)
def test_header_fields_of_files_pillow_wrote(tmp_path, array, mode, expected):
    path = tmp_path / "m.png"
    (Image.fromarray(array, mode=mode) if mode else Image.fromarray(array)).save(path)
    h = read_png_header(path)
    assert (h.height, h.width, h.bit_depth, h.colour_type, h.kind) == expected
    assert not h.interlaced


def test_palette_header(tmp_path):
    im = Image.fromarray(np.arange(12, dtype=np.uint8).reshape(3, 4), mode="L").convert("P")
    im.save(tmp_path / "p.png")
    h = read_png_header(tmp_path / "p.png")
    assert (h.colour_type, h.channels) == (3, 1) and h.kind.endswith("palette")


def test_structure_errors(tmp_path):
    path = tmp_path / "h.png"
    good = header_only_png(8, 8)
    assert len(good) == 57  # signature 8 + IHDR 25 + empty IDAT 12 + IEND 12
    cases = [
        (b"", r"not a PNG file \(an empty file\)"),
        (b"GIF89a" + good[6:], r"not a PNG file \(no PNG signature\)"),
        (good[:20], r"damaged PNG \(no complete IHDR header chunk\)"),
        (good[:29] + b"\0\0\0\0" + good[33:],
         r"damaged PNG \(the IHDR header chunk fails its CRC check\)"),
        (good[:43], r"truncated PNG \(the file ends inside its IDAT chunk at byte 33\)"),
        (good[:45], r"truncated PNG \(the file ends at byte 45 before its IEND chunk\)"),
        (good[:33] + chunk(b"IEND", b""), r"damaged PNG \(no IDAT image data chunk\)"),
        (good[:33] + b"\0\0\0\x04ID?T", r"damaged PNG \(no valid chunk at byte 33\)"),
        (header_only_png(0, 8), r"damaged PNG \(it declares 0 x 8 pixels\)"),
        (header_only_png(8, 8, depth=4, colour_type=2),
         r"damaged PNG \(colour type 2 with bit depth 4 is not defined by the PNG"),
    ]
    for data, match in cases:
        path.write_bytes(data)
        with pytest.raises(MaskImportError, match=f"^{path}: {match}"):
            read_png_header(path)
    path.write_bytes(good)
    assert (read_png_header(path).height, read_png_header(path).width) == (8, 8)


def test_chunk_helper_matches_the_specification_crc():
    # PNG specification section 5.3: the CRC covers type and data; IEND's is AE426082
    assert chunk(b"IEND", b"") == bytes.fromhex("0000000049454e44ae426082")
