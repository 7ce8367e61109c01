"""Capture times from TIFF and EXIF date-time tags."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
import rasterio
from affine import Affine
from PIL import Image

from labeler.errors import InputError
from labeler.imagery.capture_date import CaptureTime, parse_exif_datetime, read_capture_time

# Tag numbers from Exif 2.32 (CIPA DC-008-2019) and TIFF Revision 6.0 (Adobe 1992)
DATETIME, EXIF_IFD = 306, 0x8769
ORIGINAL, DIGITIZED, OFFSET_ORIGINAL = 36867, 36868, 36881


def small_image() -> Image.Image:
    return Image.fromarray(np.full((8, 8, 3), 90, np.uint8))


def test_jpeg_prefers_date_time_original_with_its_offset(tmp_path):
    exif = Image.Exif()
    exif[DATETIME] = "2024:07:30 18:00:00"  # when the file was last written
    sub = exif.get_ifd(EXIF_IFD)
    sub[ORIGINAL] = "2024:06:14 10:32:05"
    sub[DIGITIZED] = "2024:06:14 10:32:06"
    sub[OFFSET_ORIGINAL] = "+02:00"
    path = tmp_path / "frame.jpg"
    small_image().save(path, exif=exif)
    got = read_capture_time(path)
    assert got == CaptureTime(
        datetime(2024, 6, 14, 10, 32, 5, tzinfo=timezone(timedelta(hours=2))), "DateTimeOriginal"
    )


def test_jpeg_falls_back_to_digitized_then_date_time(tmp_path):
    exif = Image.Exif()
    exif[DATETIME] = "2024:07:30 18:00:00"
    exif.get_ifd(EXIF_IFD)[DIGITIZED] = "2024:06:14 10:32:06"
    path = tmp_path / "digitized.jpg"
    small_image().save(path, exif=exif)
    assert read_capture_time(path) == CaptureTime(
        datetime(2024, 6, 14, 10, 32, 6), "DateTimeDigitized"
    )
    exif = Image.Exif()
    exif[DATETIME] = "2024:07:30 18:00:00"
    path = tmp_path / "plain.png"  # PNG carries EXIF in its eXIf chunk
    small_image().save(path, exif=exif)
    assert read_capture_time(path) == CaptureTime(datetime(2024, 7, 30, 18, 0, 0), "DateTime")


def test_geotiff_date_time_tag_written_by_gdal(tmp_path):
    # rasterio/GDAL write TIFFTAG_DATETIME as baseline TIFF tag 306
    path = tmp_path / "plot.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        height=8,
        width=8,
        count=3,
        dtype="uint8",
        crs="EPSG:32631",
        transform=Affine(0.01, 0, 512000, 0, -0.01, 5564000),
    ) as dst:
        dst.write(np.zeros((3, 8, 8), np.uint8))
        dst.update_tags(TIFFTAG_DATETIME="2023:09:01 07:45:00")
    # independent reader: tifffile sees the standard tag
    import tifffile

    with tifffile.TiffFile(path) as tf:
        assert tf.pages[0].tags[DATETIME].value == "2023:09:01 07:45:00"
    assert read_capture_time(path) == CaptureTime(datetime(2023, 9, 1, 7, 45), "DateTime")


def test_an_image_above_pillows_size_guard_still_gives_its_tags(tmp_path, monkeypatch):
    # Pillow refuses to open an image above 2 x MAX_IMAGE_PIXELS (a decompression-bomb
    # guard); a 20000 x 20000 orthomosaic is above it. Only tags are read here, so the
    # guard is lifted while they are, and put back after.
    exif = Image.Exif()
    exif[DATETIME] = "2025:05:02 11:00:00"
    path = tmp_path / "ortho.tif"
    small_image().save(path, exif=exif)
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 16)  # 8 x 8 = 64 > 2 x 16
    with pytest.raises(Image.DecompressionBombError):
        Image.open(path)
    assert read_capture_time(path) == CaptureTime(datetime(2025, 5, 2, 11, 0), "DateTime")
    assert Image.MAX_IMAGE_PIXELS == 16


def test_no_tags_gives_none(tmp_path):
    path = tmp_path / "bare.png"
    small_image().save(path)
    assert read_capture_time(path) is None


def test_unusable_values_are_skipped(tmp_path):
    exif = Image.Exif()
    exif[DATETIME] = "2024:05:02 09:00:00"
    exif.get_ifd(EXIF_IFD)[ORIGINAL] = "    :  :     :  :  "  # unknown (blank), Exif 2.32
    path = tmp_path / "blank.jpg"
    small_image().save(path, exif=exif)
    assert read_capture_time(path).tag == "DateTime"


@pytest.mark.parametrize(
    ("text", "want"),
    [
        ("2024:06:14 10:32:05", datetime(2024, 6, 14, 10, 32, 5)),
        (b"2024:06:14 10:32:05\x00", datetime(2024, 6, 14, 10, 32, 5)),
        ("2024-06-14T10:32:05", datetime(2024, 6, 14, 10, 32, 5)),
        ("2024:13:14 10:32:05", None),  # month 13
        ("", None),
        (None, None),
    ],
)
def test_parse(text, want):
    assert parse_exif_datetime(text) == want


def test_parse_offset():
    got = parse_exif_datetime("2024:06:14 10:32:05", "-05:30")
    assert got.utcoffset() == -timedelta(hours=5, minutes=30)
    assert parse_exif_datetime("2024:06:14 10:32:05", "bogus").tzinfo is None


def test_missing_and_unreadable_files(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        read_capture_time(tmp_path / "gone.jpg")
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"II*\x00" + b"\xff" * 4)
    with pytest.raises(InputError, match="bad.tif: cannot read the image's tags"):
        read_capture_time(bad)
