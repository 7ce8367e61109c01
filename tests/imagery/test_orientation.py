"""The TIFF Orientation tag (274): read from the file, applied to sizes, windows, georeferencing.

Reference: Pillow's ``ImageOps.exif_transpose`` turns an image upright by the same tag
(TIFF 6.0 specification, section 8, Orientation; EXIF uses the same eight values); the
stored pixels are read back with Pillow and turned by it. Georeferencing is checked
against rasterio's ``transform.xy`` of the stored raster.
"""

import numpy as np
import pytest
import rasterio
from affine import Affine
from PIL import Image, ImageOps, TiffImagePlugin

from labeler.imagery.orientation import Orientation, tiff_orientation
from labeler.imagery.read import inspect_image, open_image, read_image
from labeler.imagery.tiling import Window, tile_grid


def _tiff(path, rgb, orientation, *, big=False):
    tags = TiffImagePlugin.ImageFileDirectory_v2()
    tags[274] = orientation
    Image.fromarray(rgb).save(path, tiffinfo=tags, big_tiff=big)
    return path


@pytest.fixture
def rgb():
    # 5 x 7, every pixel different: a wrong turn cannot pass
    return np.arange(5 * 7 * 3, dtype=np.uint8).reshape(5, 7, 3)


@pytest.mark.parametrize("code", range(1, 9))
@pytest.mark.parametrize("big", [False, True])
def test_tag_read_from_classic_and_big_tiff(tmp_path, rgb, code, big):
    path = _tiff(tmp_path / "o.tif", rgb, code, big=big)
    assert tiff_orientation(path) == code


def test_no_tag_or_not_a_tiff_means_top_left(tmp_path, rgb):
    Image.fromarray(rgb).save(tmp_path / "plain.tif")
    assert tiff_orientation(tmp_path / "plain.tif") == 1
    (tmp_path / "junk.tif").write_bytes(b"II*\x00\xff\xff\xff\x7f")  # IFD offset past the end
    assert tiff_orientation(tmp_path / "junk.tif") == 1


@pytest.mark.parametrize("code", range(1, 9))
def test_whole_image_upright_as_pillow_shows_it(tmp_path, rgb, code):
    path = _tiff(tmp_path / "o.tif", rgb, code)
    with Image.open(path) as im:
        expected = np.asarray(ImageOps.exif_transpose(im).convert("RGB"))
    out = read_image(path)
    np.testing.assert_array_equal(out, expected)
    assert inspect_image(path).shape == expected.shape[:2]


@pytest.mark.parametrize("code", range(1, 9))
def test_every_window_is_the_window_of_the_upright_image(tmp_path, rgb, code):
    path = _tiff(tmp_path / "o.tif", rgb, code)
    whole = read_image(path)
    with open_image(path) as reader:
        h, w = reader.info.shape
        for window in [*tile_grid(h, w, size=3, overlap=1), Window(1, 2, 2, 3), Window(0, 0, h, w)]:
            if window.row + window.height > h or window.col + window.width > w:
                continue
            np.testing.assert_array_equal(reader.read(window), whole[window.slices])


@pytest.mark.parametrize("code", range(1, 9))
def test_georeferencing_follows_the_turn(tmp_path, code):
    rgb = np.zeros((4, 6, 3), np.uint8)
    stored = Affine(0.5, 0, 431000, 0, -0.5, 5712000)
    path = tmp_path / "o.tif"
    profile = dict(
        driver="GTiff",
        width=6,
        height=4,
        count=3,
        dtype="uint8",
        crs="EPSG:32631",
        transform=stored,
    )
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.moveaxis(rgb, 2, 0))
    _set_orientation(path, code)
    assert tiff_orientation(path) == code
    info = inspect_image(path)
    turn = Orientation(code, (4, 6))
    assert info.shape == turn.shape
    upright = info.georef.transform
    for row in range(info.height):
        for col in range(info.width):
            # the centre of an upright pixel lies where the centre of its stored pixel lies
            s = turn.stored_window(Window(row, col, 1, 1))
            expected = rasterio.transform.xy(stored, s.row, s.col, offset="center")
            got = upright @ (col + 0.5, row + 0.5)
            assert got == pytest.approx(expected, abs=1e-9)


def _set_orientation(path, code):
    """Add tag 274 to a GeoTIFF written by rasterio (Pillow keeps the GeoTIFF tags)."""
    with Image.open(path) as im:
        tags = TiffImagePlugin.ImageFileDirectory_v2()
        for key, value in im.tag_v2.items():
            tags[key] = value
            if key in im.tag_v2.tagtype:
                tags.tagtype[key] = im.tag_v2.tagtype[key]
        tags[274] = code
        pixels = im.copy()
    pixels.save(path, tiffinfo=tags)


def test_bad_code_refused():
    with pytest.raises(ValueError, match=r"code: expected a TIFF orientation 1\.\.8, got 9"):
        Orientation(9, (2, 2))
