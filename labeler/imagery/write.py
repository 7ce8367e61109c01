"""Writing rasters: GeoTIFF images and PNG masks, atomically (temp file + rename).

A crash while writing leaves either the old file or the new one, never half a file; the
generic atomic write itself is :func:`labeler.fileio.atomic_write_bytes`.
"""

from __future__ import annotations

import io
import os
import tempfile
from datetime import datetime
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine
from PIL import Image

from labeler.fileio import atomic_write_bytes, file_mode

__all__ = [
    "write_geotiff",
    "write_png",
    "png_bytes",
    "png_decode",
]


def png_bytes(array: np.ndarray) -> bytes:
    """Encode a 2-D uint8 array (grey/class index) or (H, W, 3) uint8 RGB as PNG bytes."""
    a = np.asarray(array)
    if a.dtype != np.uint8 or not (a.ndim == 2 or (a.ndim == 3 and a.shape[2] in (3, 4))):
        raise ValueError(
            "array: expected uint8 of shape (H, W), (H, W, 3) or (H, W, 4), "
            f"got {a.dtype} {a.shape}"
        )
    if a.size == 0:
        raise ValueError(f"array: expected a non-empty image, got shape {a.shape}")
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(a)).save(buf, format="PNG", compress_level=6)
    return buf.getvalue()


def png_decode(data: bytes) -> np.ndarray:
    """Decode PNG bytes made by :func:`png_bytes` back to the uint8 array."""
    with Image.open(io.BytesIO(data)) as im:
        im.load()
        if im.mode not in ("L", "RGB", "RGBA"):
            raise ValueError(f"data: expected an 8-bit L, RGB or RGBA PNG, got mode {im.mode}")
        return np.asarray(im).copy()


def write_png(path: str | os.PathLike[str], array: np.ndarray) -> Path:
    """Write a class-index mask (H, W) or an RGB image (H, W, 3) as PNG, atomically."""
    return atomic_write_bytes(path, png_bytes(array))


def write_geotiff(
    path: str | os.PathLike[str],
    image: np.ndarray,
    *,
    transform: Affine,
    crs: str,
    compress: str = "deflate",
    jpeg_quality: int = 92,
    taken: datetime | None = None,
) -> Path:
    """Write an RGB image (H, W, 3) uint8 as a tiled GeoTIFF, atomically.

    Parameters
    ----------
    path : path
        Target file (``.tif``).
    image : ndarray, shape (H, W, 3), uint8
    transform : affine.Affine
        Pixel-corner transform: ``transform * (col, row)`` is the map position of the
        top-left corner of pixel (row, col).
    crs : str
        Coordinate reference system, e.g. ``"EPSG:32631"``.
    compress : {"deflate", "jpeg", "none"}
        Compression; ``"jpeg"`` is lossy (YCbCr), small and fine for demo photos.
    taken : datetime, optional
        Written as the TIFF ``DateTime`` tag (306, ``"YYYY:MM:DD HH:MM:SS"``; TIFF
        Revision 6.0), which :func:`labeler.imagery.capture_date.read_capture_time` reads.
    """
    a = np.asarray(image)
    if a.dtype != np.uint8 or a.ndim != 3 or a.shape[2] != 3:
        raise ValueError(f"image: expected uint8 of shape (H, W, 3), got {a.dtype} {a.shape}")
    if compress not in ("deflate", "jpeg", "none"):
        raise ValueError(f"compress: expected 'deflate', 'jpeg' or 'none', got {compress!r}")
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    h, w = a.shape[:2]
    profile = dict(
        driver="GTiff",
        height=h,
        width=w,
        count=3,
        dtype="uint8",
        crs=crs,
        transform=transform,
        tiled=True,
        blockxsize=256,
        blockysize=256,
        photometric="RGB",
    )
    if compress == "jpeg":
        profile.update(compress="jpeg", photometric="YCBCR", jpeg_quality=jpeg_quality)
    elif compress == "deflate":
        profile.update(compress="deflate", predictor=2)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tif", dir=target.parent)
    os.close(fd)
    try:
        with rasterio.open(tmp, "w", **profile) as dst:
            dst.write(np.moveaxis(a, 2, 0))
            if taken is not None:
                dst.update_tags(TIFFTAG_DATETIME=taken.strftime("%Y:%m:%d %H:%M:%S"))
        os.chmod(tmp, file_mode())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target
