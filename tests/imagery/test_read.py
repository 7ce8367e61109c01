"""Reading images: formats, bit depths, grey/alpha, EXIF orientation, bad input."""

import numpy as np
import pytest
import rasterio
from affine import Affine
from PIL import Image

from labeler.errors import InputError
from labeler.imagery.read import inspect_image, open_image, read_image, sniff_format, to_rgb8
from labeler.imagery.tiling import Window
from labeler.imagery.write import write_geotiff


@pytest.fixture
def rgb():
    return np.random.default_rng(1).integers(0, 256, (40, 60, 3), dtype=np.uint8)


def test_png_jpeg_tiff_read_as_rgb(tmp_path, rgb):
    Image.fromarray(rgb).save(tmp_path / "a.png")
    np.testing.assert_array_equal(read_image(tmp_path / "a.png"), rgb)
    Image.fromarray(rgb).save(tmp_path / "a.jpg", quality=95)
    jpg = read_image(tmp_path / "a.jpg")
    assert jpg.shape == rgb.shape and jpg.dtype == np.uint8
    write_geotiff(
        tmp_path / "a.tif", rgb, transform=Affine(0.01, 0, 500000, 0, -0.01, 10), crs="EPSG:32631"
    )
    with open_image(tmp_path / "a.tif") as r:
        np.testing.assert_array_equal(r.read(Window(5, 7, 10, 20)), rgb[5:15, 7:27])
        assert r.info.georef.source == "geotiff"
        assert rasterio.crs.CRS.from_wkt(r.info.georef.crs).to_epsg() == 32631


def test_format_by_content_not_name(tmp_path, rgb):
    Image.fromarray(rgb).save(tmp_path / "x.png")
    (tmp_path / "x.png").rename(tmp_path / "x.jpg")
    assert sniff_format(tmp_path / "x.jpg") == "png"


def test_sixteen_bit_rule():
    # 16-bit scaled by the declared bit depth: out = round(v * 255 / (2**nbits - 1))
    data = np.array([[[0, 4095, 2048, 65535]]], np.uint16)
    np.testing.assert_array_equal(to_rgb8(data, nbits=12)[0, :, 0], [0, 255, 128, 255])
    np.testing.assert_array_equal(to_rgb8(data, nbits=16)[0, :, 0], [0, 16, 8, 255])


def test_sixteen_bit_tiff_with_nbits(tmp_path):
    data = (np.arange(12, dtype=np.uint16).reshape(1, 3, 4) * 300).clip(0, 4095)
    path = tmp_path / "g12.tif"
    with rasterio.open(
        path, "w", driver="GTiff", width=4, height=3, count=1, dtype="uint16", nbits=12
    ) as dst:
        dst.write(data)
    out = read_image(path)
    expected = np.rint(data[0].astype(np.float64) * 255 / 4095).astype(np.uint8)
    np.testing.assert_array_equal(out[..., 0], expected)
    np.testing.assert_array_equal(out[..., 1], expected)


def test_grey_and_alpha(tmp_path, rgb):
    grey = rgb[..., 0]
    Image.fromarray(grey).save(tmp_path / "g.png")
    out = read_image(tmp_path / "g.png")
    np.testing.assert_array_equal(out, np.repeat(grey[..., None], 3, axis=2))
    rgba = np.dstack([rgb, np.full(rgb.shape[:2], 7, np.uint8)])
    Image.fromarray(rgba).save(tmp_path / "a.png")
    np.testing.assert_array_equal(read_image(tmp_path / "a.png"), rgb)


def test_exif_orientation_applied(tmp_path, rgb):
    # EXIF tag 274 = 6: the stored pixels must be turned 90 degrees clockwise to display
    im = Image.fromarray(rgb)
    exif = im.getexif()
    exif[274] = 6
    im.save(tmp_path / "o.jpg", exif=exif, quality=100, subsampling=0)
    out = read_image(tmp_path / "o.jpg")
    assert out.shape == (60, 40, 3)
    stored = np.asarray(Image.open(tmp_path / "o.jpg"))
    np.testing.assert_array_equal(out, np.rot90(stored, k=-1))
    assert inspect_image(tmp_path / "o.jpg").shape == (60, 40)


@pytest.mark.parametrize(
    ("content", "match"),
    [
        (b"", "empty"),
        (b"GIF89a......", "unsupported file type"),
        (b"\x89PNG\r\n\x1a\n" + b"\x00" * 30, "damaged, truncated or unreadable PNG"),
    ],
)
def test_bad_files(tmp_path, content, match):
    p = tmp_path / "bad.png"
    p.write_bytes(content)
    with pytest.raises(InputError, match=match) as info:
        read_image(p)
    assert "bad.png" in str(info.value)


def test_missing_and_folder(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        read_image(tmp_path / "none.png")
    with pytest.raises(InputError, match="is a folder"):
        read_image(tmp_path)


def test_truncated_jpeg_and_tiff(tmp_path, rgb):
    Image.fromarray(rgb).save(tmp_path / "a.jpg")
    data = (tmp_path / "a.jpg").read_bytes()
    (tmp_path / "t.jpg").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="t.jpg: damaged, truncated"):
        read_image(tmp_path / "t.jpg")
    write_geotiff(tmp_path / "a.tif", rgb, transform=Affine(1, 0, 0, 0, -1, 0), crs="EPSG:32631")
    data = (tmp_path / "a.tif").read_bytes()
    (tmp_path / "t.tif").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="t.tif"):
        read_image(tmp_path / "t.tif")


def test_float_raster_refused(tmp_path):
    path = tmp_path / "f.tif"
    with rasterio.open(
        path, "w", driver="GTiff", width=4, height=3, count=1, dtype="float32"
    ) as dst:
        dst.write(np.zeros((1, 3, 4), np.float32))
    with pytest.raises(InputError, match="floating-point"):
        read_image(path)


def test_window_outside(tmp_path, rgb):
    Image.fromarray(rgb).save(tmp_path / "a.png")
    with open_image(tmp_path / "a.png") as r, pytest.raises(InputError, match="leaves the image"):
        r.read(Window(30, 0, 20, 10))


def test_too_large_png_refused(tmp_path, monkeypatch):
    import labeler.imagery.read as read_mod

    monkeypatch.setattr(read_mod, "MAX_DECODED_PIXELS", 100)
    Image.fromarray(np.zeros((20, 20), np.uint8)).save(tmp_path / "big.png")
    with pytest.raises(InputError, match="too large to decode whole.*tiled GeoTIFF"):
        read_image(tmp_path / "big.png")


def test_world_file_and_prj_for_png(tmp_path, rgb):
    from rasterio.crs import CRS

    Image.fromarray(rgb).save(tmp_path / "p.png")
    (tmp_path / "p.pgw").write_text("0.01\n0\n0\n-0.01\n1000.005\n2000.995\n")
    (tmp_path / "p.prj").write_text(CRS.from_epsg(32632).to_wkt())
    g = inspect_image(tmp_path / "p.png").georef
    assert g.source == "worldfile"
    assert (g.transform.c, g.transform.f) == (pytest.approx(1000.0), pytest.approx(2001.0))
    assert CRS.from_wkt(g.crs).to_epsg() == 32632
    (tmp_path / "p.pgw").write_text("garbage\n")
    with pytest.raises(InputError, match="p.pgw"):
        inspect_image(tmp_path / "p.png")


def test_large_geotiff_is_read_by_window_never_whole(tmp_path):
    import tracemalloc

    import rasterio
    from rasterio.windows import Window as RioWindow

    # a 12000 x 12000 RGB orthomosaic (432 MB as uint8 RGB), tiled and deflated on disk
    path = tmp_path / "ortho.tif"
    size, block = 12_000, 1024
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=size,
        height=size,
        count=3,
        dtype="uint8",
        crs="EPSG:32631",
        transform=Affine(0.01, 0, 431000, 0, -0.01, 5712000),
        tiled=True,
        blockxsize=512,
        blockysize=512,
        compress="deflate",
    ) as dst:
        for r in range(0, size, block):
            h = min(block, size - r)
            dst.write(
                np.full((3, h, size), (r // block) % 200, np.uint8), window=RioWindow(0, r, size, h)
            )
    tracemalloc.start()
    with open_image(path) as reader:
        assert reader.info.shape == (size, size) and reader.info.georef.source == "geotiff"
        tile = reader.read(Window(6000, 9000, 256, 256))
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    expected = ((np.arange(6000, 6256) // block) % 200).astype(np.uint8)  # value per row
    assert tile.shape == (256, 256, 3)
    np.testing.assert_array_equal(tile, np.broadcast_to(expected[:, None, None], tile.shape))
    assert peak < 20e6  # bytes: a window, not the 432 MB image


def test_index_png_keeps_values_and_refuses_other_forms(tmp_path, rgb):
    from labeler.imagery.read import read_index_png
    from labeler.imagery.write import write_png

    mask = np.array([[0, 1, 2], [3, 255, 0]], np.uint8)
    write_png(tmp_path / "m.png", mask)
    np.testing.assert_array_equal(read_index_png(tmp_path / "m.png"), mask)
    Image.fromarray(rgb).save(tmp_path / "rgb.png")
    with pytest.raises(InputError, match=r"rgb.png: expected an 8-bit single-channel \(mode L\)"):
        read_index_png(tmp_path / "rgb.png")
    Image.fromarray(rgb).save(tmp_path / "photo.jpg")
    with pytest.raises(InputError, match="photo.jpg: expected a PNG mask, got a JPEG file"):
        read_index_png(tmp_path / "photo.jpg")
    (tmp_path / "cut.png").write_bytes((tmp_path / "m.png").read_bytes()[:40])
    with pytest.raises(InputError, match="cut.png: damaged, truncated or unreadable PNG"):
        read_index_png(tmp_path / "cut.png")


def test_pillow_size_alarm_becomes_our_own_message(tmp_path, monkeypatch):
    # Pillow warns above Image.MAX_IMAGE_PIXELS and refuses above twice that (Pillow
    # documentation, "Image.open": decompression bomb protection); labeler applies its
    # own limit instead, so no library warning escapes (warnings are errors in the tests)
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 300)
    Image.fromarray(np.full((20, 20), 9, np.uint8)).save(tmp_path / "warned.png")  # 400 px
    assert read_image(tmp_path / "warned.png").shape == (20, 20, 3)
    Image.fromarray(np.zeros((30, 30), np.uint8)).save(tmp_path / "refused.png")  # 900 px
    with pytest.raises(InputError, match=r"refused\.png: 900 pixels is too large to decode whole"):
        read_image(tmp_path / "refused.png")


def test_tiff_windows_are_read_with_a_small_gdal_block_cache(tmp_path, rgb):
    """GDAL keeps decoded blocks in a process-wide cache of 5 % of the machine's memory by
    default: reading every window of a big orthomosaic once made peak memory grow with the
    image. Each window is read under the project's cap instead."""
    from rasterio.env import getenv

    from labeler.imagery.read import TIFF_BLOCK_CACHE_MB

    path = write_geotiff(
        tmp_path / "plot.tif", rgb, transform=Affine(1, 0, 0, 0, -1, 0), crs="EPSG:32631"
    )
    seen = []
    with open_image(path) as reader:
        real = reader._ds

        class Spy:  # the dataset, noting GDAL's cache setting at each read
            def __getattr__(self, name):
                return getattr(real, name)

            def read(self, **kwargs):
                seen.append(getenv().get("GDAL_CACHEMAX"))
                return real.read(**kwargs)

        reader._ds = Spy()
        np.testing.assert_array_equal(reader.read(Window(1, 2, 3, 4)), rgb[1:4, 2:6])
        reader._ds = real
    assert seen == [TIFF_BLOCK_CACHE_MB] and 0 < TIFF_BLOCK_CACHE_MB <= 256
