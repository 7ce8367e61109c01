"""PNG class masks read a band of rows at a time (labeler/export/png_import.py).

Pillow decodes the same files whole as the reference; hand-made files (tests/export/pngs.py,
written from the PNG specification) cover interlaced, damaged and header-only files.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from PIL import Image

from labeler.errors import MaskImportError
from labeler.export import png_import
from labeler.export.png_header import read_png_header
from labeler.export.png_import import PngMaskReader, read_png_mask
from labeler.imagery.tiling import axis_starts
from tests.export.pngs import chunk, header_only_png, raw_png


def class_mask(seed: int, shape=(300, 70)) -> np.ndarray:
    rng = np.random.default_rng(seed)
    m = rng.integers(0, 4, shape).astype(np.uint8)
    m[rng.random(shape) < 0.05] = 255
    return m


def tile_bands(height: int, size: int = 64, overlap: int = 8) -> list[tuple[int, int]]:
    """Row bands of a tile grid (as the import reads them): overlapping, top to bottom."""
    return [(int(s), int(s) + min(size, height)) for s in axis_starts(height, size=size,
                                                                     overlap=overlap)]


def recording(reader: PngMaskReader) -> list[tuple[int, int]]:
    """Record every (start, stop) the reader asks the decoder for."""
    asked: list[tuple[int, int]] = []
    decode = reader._decode

    def spy(start, stop):
        asked.append((start, stop))
        return decode(start, stop)

    reader._decode = spy
    return asked


@pytest.mark.parametrize("kind", ["grey", "palette", "grey+alpha", "16-bit grey"])
def test_bands_equal_the_whole_mask_decoded_by_pillow(tmp_path, kind):
    m = class_mask(1)
    path = tmp_path / "plot.png"
    if kind == "grey":
        Image.fromarray(m).save(path)
    elif kind == "palette":
        im = Image.fromarray(m, mode="L").convert("P")
        im.putpalette([v for i in range(256) for v in (i, 255 - i, i // 2)])
        im.save(path)
    elif kind == "grey+alpha":
        Image.fromarray(np.stack([m, np.full_like(m, 255)], axis=2), mode="LA").save(path)
    else:
        Image.fromarray(m.astype(np.uint16)).save(path)
    with Image.open(path) as im:  # Pillow, the reference decoder
        reference = np.asarray(im)
    reference = (reference[..., 0] if reference.ndim == 3 else reference).astype(np.uint8)
    np.testing.assert_array_equal(reference, m)
    with PngMaskReader(path, shape=m.shape) as reader:
        asked = recording(reader)
        bands = tile_bands(m.shape[0])
        for start, stop in bands:
            np.testing.assert_array_equal(reader.read_rows(start, stop), m[start:stop])
    # every row was decoded exactly once, top to bottom, never more than a band at a time
    assert asked[0][0] == 0 and asked[-1][1] == m.shape[0]
    assert all(a[1] == b[0] for a, b in zip(asked, asked[1:], strict=False))
    assert max(stop - start for start, stop in asked) <= 64
    assert np.array_equal(read_png_mask(path, shape=m.shape), m)


def test_going_back_decodes_from_the_top_again(tmp_path):
    m = class_mask(2)
    path = tmp_path / "plot.png"
    Image.fromarray(m).save(path)
    with PngMaskReader(path, shape=m.shape) as reader:
        asked = recording(reader)
        np.testing.assert_array_equal(reader.read_rows(200, 260), m[200:260])
        np.testing.assert_array_equal(reader.read_rows(10, 30), m[10:30])  # back: restart
        np.testing.assert_array_equal(reader.read_rows(25, 40), m[25:40])  # reuses 25..29
        np.testing.assert_array_equal(reader.read_rows(299, 300), m[299:300])
        with pytest.raises(ValueError, match=r"rows: expected 0 <= start < stop <= 300, got 5, 5"):
            reader.read_rows(5, 5)
    assert asked == [(200, 260), (10, 30), (30, 40), (299, 300)]


def test_values_are_checked_band_by_band(tmp_path):
    m = class_mask(3)
    m[290, 5] = 7  # only the last band holds a value that is no class
    path = tmp_path / "late.png"
    Image.fromarray(m).save(path)
    with PngMaskReader(path, shape=m.shape) as reader:
        reader.read_rows(0, 256)
        with pytest.raises(MaskImportError, match=r"late.png: holds values \[7\] that are not "
                                                  r"class indices \(0, 1, 2, 3\) or 255 .*first "
                                                  r"seen in rows 256..299"):
            reader.read_rows(236, 300)


def test_interlaced_png_is_read_and_refused_when_large(tmp_path, monkeypatch):
    m = class_mask(4, shape=(37, 29))  # odd sizes exercise the short Adam7 passes
    path = tmp_path / "adam7.png"
    path.write_bytes(raw_png(m, colour_type=0, interlaced=True))
    with Image.open(path) as im:  # the reference decoder agrees the file is what we meant
        assert im.info.get("interlace") == 1
        np.testing.assert_array_equal(np.asarray(im), m)
    assert read_png_header(path).interlaced
    np.testing.assert_array_equal(read_png_mask(path, shape=m.shape), m)
    monkeypatch.setattr(png_import, "MAX_INTERLACED_BYTES", 37 * 29 - 1)
    with pytest.raises(MaskImportError, match=r"adam7.png: an interlaced PNG of 29 x 37 pixels "
                                              r"cannot be read a band of rows at a time; save it "
                                              r"without interlacing"):
        PngMaskReader(path, shape=m.shape)


def test_kinds_of_png_that_are_not_class_masks(tmp_path):
    path = tmp_path / "h.png"
    cases = [
        (header_only_png(8, 8, depth=16, colour_type=2),
         r"a 16-bit RGB PNG is not a class mask; colour masks are 8-bit"),
        (header_only_png(8, 8, depth=4, colour_type=0),
         r"a 4-bit grey PNG is not a class mask; save it as 8-bit"),
        (header_only_png(8, 8, colour_type=6), r"an RGBA mask needs a colour table"),
        (header_only_png(9, 8), r"mask is 8 x 9 pixels \(rows x columns\) but its image is 8 x 8"),
    ]
    for data, match in cases:
        path.write_bytes(data)
        with pytest.raises(MaskImportError, match=f"^{path}: {match}"):
            PngMaskReader(path, shape=(8, 8))


def test_damaged_or_cut_files_are_refused_before_decoding(tmp_path):
    m = class_mask(5)
    data = raw_png(m, colour_type=0)
    idat = data.index(b"IDAT") - 4
    broken = bytearray(data)
    broken[idat + 8 + 200 : idat + 8 + 210] = b"\xff" * 10  # inside the compressed rows
    path = tmp_path / "broken.png"
    path.write_bytes(bytes(broken))
    with pytest.raises(MaskImportError, match=rf"broken.png: damaged PNG \(its IDAT chunk at "
                                              rf"byte {idat} fails its CRC check\)"):
        PngMaskReader(path, shape=m.shape)
    path.write_bytes(data[: idat + 200])
    with pytest.raises(MaskImportError, match=r"broken.png: truncated PNG"):
        PngMaskReader(path, shape=m.shape)
    # pixel data that passes the CRC but does not inflate: one line from the decoder
    bad = raw_png(m, colour_type=0)
    start = bad.index(b"IDAT") - 4
    junk = b"\x78\x9c" + b"\xff" * 64
    path.write_bytes(bad[:start] + chunk(b"IDAT", junk) + chunk(b"IEND", b""))
    with pytest.raises(MaskImportError, match=r"broken.png: damaged or truncated PNG: rows 0.."):
        read_png_mask(path, shape=m.shape)


def test_palette_by_colour_and_rgb_by_colour_band_by_band(tmp_path):
    m = class_mask(6, shape=(90, 40))
    m[m == 255] = 0
    colours = [(0, 0, 0), (0, 114, 178), (230, 159, 0), (204, 121, 167)]
    table = {c: k for k, c in enumerate(colours)}
    path = tmp_path / "pal.png"
    path.write_bytes(raw_png(m, colour_type=3, palette=colours))
    rgb = np.asarray(colours, np.uint8)[m]
    (tmp_path / "rgb.png").write_bytes(raw_png(rgb, colour_type=2))
    for name in ("pal.png", "rgb.png"):
        with PngMaskReader(tmp_path / name, shape=m.shape, colours=table) as reader:
            got = np.concatenate([reader.read_rows(a, b) for a, b in ((0, 30), (30, 90))])
        np.testing.assert_array_equal(got, m)
    # a palette index with no palette entry
    short = raw_png(m, colour_type=3, palette=colours[:3])
    (tmp_path / "short.png").write_bytes(short)
    with pytest.raises(MaskImportError, match=r"short.png: palette indices \[3\] have no palette"):
        read_png_mask(tmp_path / "short.png", shape=m.shape, colours=table)


def test_transparent_pixels_named_with_their_rows(tmp_path):
    m = class_mask(7, shape=(20, 10))
    rgba = np.zeros((20, 10, 4), np.uint8)
    rgba[..., 3] = 255
    rgba[12, 3, 3] = 0
    (tmp_path / "a.png").write_bytes(raw_png(rgba, colour_type=6))
    with pytest.raises(MaskImportError, match=r"a.png: the mask has transparent pixels \(alpha "
                                              r"channel, first in rows 0..19\)"):
        read_png_mask(tmp_path / "a.png", shape=(20, 10), colours={(0, 0, 0): 0})
    wide = np.stack([m.astype(np.uint16), np.full(m.shape, 65535, np.uint16)], axis=2)
    (tmp_path / "la16.png").write_bytes(raw_png(wide, colour_type=4))
    np.testing.assert_array_equal(read_png_mask(tmp_path / "la16.png", shape=m.shape), m)


def test_paths_that_are_not_regular_files(tmp_path):
    with pytest.raises(MaskImportError, match=r"folder.png: is a folder, not a mask file"):
        (tmp_path / "folder.png").mkdir()
        read_png_mask(tmp_path / "folder.png", shape=(4, 4))
    fifo = tmp_path / "pipe.png"
    os.mkfifo(fifo)  # opening it for reading would wait for a writer for ever
    with pytest.raises(MaskImportError, match=r"pipe.png: not a regular file \(a pipe, device"):
        read_png_mask(fifo, shape=(4, 4))
    with pytest.raises(MaskImportError, match=r"null: not a regular file"):
        read_png_mask("/dev/null", shape=(4, 4))
