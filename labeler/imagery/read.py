"""Reading field images (PNG, JPEG, TIFF, GeoTIFF) as uint8 RGB, whole or by window.

Rules (documented here once):

* **Formats** are recognised by their first bytes, not by the file name: PNG, JPEG and
  TIFF/BigTIFF (GeoTIFF included). Anything else is refused.
* **TIFF** is read through rasterio window by window, so an orthomosaic of 20000 x 20000
  pixels is never loaded whole. **PNG and JPEG** are decoded whole (these formats have no
  random access); above :data:`MAX_DECODED_PIXELS` they are refused with advice to
  convert them to a tiled GeoTIFF.
* **16-bit** data are scaled linearly to 0..255 by the bit depth the file declares
  (TIFF ``NBITS``, e.g. 12 -> divide by 4095/255; otherwise the full 16-bit range):
  ``out = round(v * 255 / (2**nbits - 1))``, clipped. Signed 16-bit values below 0
  become 0. Floating-point rasters are refused (their range is not defined by the file).
* **Grey** images are repeated into three channels; **palette** images are expanded;
  an **alpha** channel is dropped (the RGB values are kept as stored).
* **Orientation**: the EXIF orientation of JPEG/PNG files and the Orientation tag of a
  TIFF (:mod:`labeler.imagery.orientation`) are applied: sizes, windows and
  georeferencing are those of the upright image, as a viewer shows it.
"""

from __future__ import annotations

import os
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine
from PIL import Image, ImageOps, UnidentifiedImageError
from rasterio.enums import ColorInterp
from rasterio.errors import NotGeoreferencedWarning, RasterioIOError
from rasterio.windows import Window as RioWindow

from labeler.errors import InputError
from labeler.imagery.georef import Georef, find_world_file, read_prj, read_world_file
from labeler.imagery.orientation import Orientation, tiff_orientation
from labeler.imagery.tiling import Window

__all__ = [
    "MAX_DECODED_PIXELS",
    "ImageInfo",
    "ImageReader",
    "check_image_size",
    "sniff_format",
    "open_image",
    "inspect_image",
    "read_image",
    "read_index_png",
    "to_rgb8",
]

#: Largest PNG/JPEG (pixels) decoded whole; bigger images must be tiled GeoTIFFs.
MAX_DECODED_PIXELS = 120_000_000
#: GDAL's block cache (MB) while a TIFF window is read. GDAL's own default is 5 % of the
#: machine's memory, kept for the whole process: reading every window of a 20000 x 20000
#: orthomosaic once filled it with decoded blocks (1.2 GB on a 24 GB machine), so peak
#: memory grew with the image. 64 MB holds the decoded blocks of a 2048-pixel band of
#: tiles, so windows that overlap their neighbours are still decoded once.
TIFF_BLOCK_CACHE_MB = 64


def sniff_format(path: str | os.PathLike[str]) -> str:
    """``"png"``, ``"jpeg"`` or ``"tiff"`` from the file's first bytes.

    Raises
    ------
    InputError
        For a missing, empty or unsupported file (naming it).
    """
    p = Path(path)
    try:
        with open(p, "rb") as fh:
            head = fh.read(8)
    except FileNotFoundError:
        raise InputError(f"{p}: no such file") from None
    except IsADirectoryError:
        raise InputError(f"{p}: is a folder, expected an image file") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read ({exc.strerror})") from None
    if not head:
        raise InputError(f"{p}: the file is empty")
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return "png"
    if head.startswith(b"\xff\xd8\xff"):
        return "jpeg"
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "tiff"
    raise InputError(
        f"{p}: unsupported file type (first bytes {head[:4]!r}); expected PNG, JPEG, TIFF or GeoTIFF"
    )


@dataclass(frozen=True)
class ImageInfo:
    """What is known of an image without reading its pixels.

    ``width``/``height`` are after EXIF orientation. ``bands``/``dtype`` describe the
    stored data; reads always return uint8 RGB.
    """

    path: Path
    format: str
    width: int
    height: int
    bands: int
    dtype: str
    nbits: int
    georef: Georef | None

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)


def to_rgb8(
    data: np.ndarray,
    *,
    nbits: int,
    colorinterp: tuple | None = None,
    colormap: dict | None = None,
    where: str = "image",
) -> np.ndarray:
    """Convert band-first raster data (bands, h, w) to (h, w, 3) uint8 RGB by the module rules."""
    if data.dtype.kind == "f":
        raise InputError(
            f"{where}: floating-point raster ({data.dtype}) has no defined 0..255 range; "
            "convert it to 8- or 16-bit first"
        )
    if data.dtype.kind not in "ui" or data.dtype.itemsize > 2:
        raise InputError(
            f"{where}: unsupported sample type {data.dtype}; expected 8- or 16-bit integers"
        )
    bands = data.shape[0]
    if colormap is not None and bands == 1:
        lut = np.zeros((256, 3), np.uint8)
        for k, rgba in colormap.items():
            if 0 <= k < 256:
                lut[k] = rgba[:3]
        return lut[np.clip(data[0], 0, 255).astype(np.uint8)]
    if data.dtype == np.uint8:
        scaled = data
    else:
        top = float(2**nbits - 1)
        scaled = np.clip(np.rint(data.astype(np.float32) * (255.0 / top)), 0, 255).astype(np.uint8)
    if colorinterp is not None:
        keep = [i for i, ci in enumerate(colorinterp) if ci != ColorInterp.alpha]
        scaled = scaled[keep] if keep else scaled[:1]
        bands = scaled.shape[0]
    if bands in (1, 2):
        grey = scaled[0]
        return np.repeat(grey[:, :, None], 3, axis=2)
    if bands >= 3:
        return np.ascontiguousarray(np.moveaxis(scaled[:3], 0, 2))
    raise InputError(f"{where}: no bands to read")  # pragma: no cover


class ImageReader:
    """An open image; :meth:`read` returns uint8 RGB windows.

    Use :func:`open_image` to make one, as a context manager.
    """

    def __init__(
        self,
        info: ImageInfo,
        *,
        dataset=None,
        pixels: np.ndarray | None = None,
        orientation: Orientation | None = None,
    ) -> None:
        self.info = info
        self._ds = dataset
        self._pixels = pixels
        self._orientation = orientation

    def __enter__(self) -> ImageReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        if self._ds is not None:
            self._ds.close()
            self._ds = None
        self._pixels = None

    def read(self, window: Window | None = None) -> np.ndarray:
        """Pixels of ``window`` (the whole image when None) as (h, w, 3) uint8 RGB.

        Raises
        ------
        InputError
            If the window leaves the image or the file is damaged there.
        """
        info = self.info
        w = window or Window(0, 0, info.height, info.width)
        if w.row < 0 or w.col < 0 or w.row + w.height > info.height or w.col + w.width > info.width:
            raise InputError(
                f"{info.path}: window {w.as_tuple()} leaves the image of {info.height} x {info.width} pixels"
            )
        if self._pixels is not None:
            return np.ascontiguousarray(self._pixels[w.slices])
        if self._ds is None:
            raise InputError(f"{info.path}: the image is closed")
        ds = self._ds
        turn = self._orientation
        stored = w if turn is None else turn.stored_window(w)
        try:
            with rasterio.Env(GDAL_CACHEMAX=TIFF_BLOCK_CACHE_MB):
                data = ds.read(
                    window=RioWindow(stored.col, stored.row, stored.width, stored.height)
                )
        except RasterioIOError as exc:
            raise InputError(
                f"{info.path}: damaged or truncated data in window {w.as_tuple()} ({exc})"
            ) from None
        cmap = None
        if ds.count == 1 and ds.colorinterp[0] == ColorInterp.palette:
            cmap = ds.colormap(1)
        rgb = to_rgb8(
            data,
            nbits=info.nbits,
            colorinterp=tuple(ds.colorinterp),
            colormap=cmap,
            where=str(info.path),
        )
        return rgb if turn is None else turn.upright(rgb)


def _georef_sidecar(p: Path) -> Georef | None:
    wf = find_world_file(p)
    if wf is None:
        return None
    transform = read_world_file(wf)
    prj = p.with_suffix(".prj")
    crs = read_prj(prj) if prj.is_file() else None
    return Georef(transform=transform, crs=crs, source="worldfile")


def check_image_size(
    path: str | os.PathLike[str], *, width: int, height: int, max_pixels: int | None
) -> None:
    """Refuse an image whose header declares more than ``max_pixels`` pixels.

    Raises
    ------
    InputError
        Naming the file, its declared size, the limit and the setting that sets it.
    """
    if max_pixels is not None and width * height > max_pixels:
        raise InputError(
            f"{path}: the file declares {width} x {height} pixels ({width * height:,}), more "
            f"than the limit of {max_pixels:,} (setting tiles.max_image_px); split the image "
            "into smaller GeoTIFFs (e.g. gdal_retile.py), or raise the limit if it is a real "
            "image and the machine can hold its tiles"
        )


def _open_tiff(p: Path, max_pixels: int | None = None) -> ImageReader:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            ds = rasterio.open(p)
    except RasterioIOError as exc:
        raise InputError(f"{p}: not a readable TIFF ({exc})") from None
    try:
        check_image_size(p, width=ds.width, height=ds.height, max_pixels=max_pixels)
        if ds.count < 1:
            raise InputError(f"{p}: the TIFF holds no bands")
        dtype = ds.dtypes[0]
        nbits = 8 if dtype == "uint8" else 16
        struct = {**ds.tags(ns="IMAGE_STRUCTURE"), **ds.tags(1, ns="IMAGE_STRUCTURE")}
        if "NBITS" in struct:
            nbits = int(struct["NBITS"])
        if np.dtype(dtype).kind == "f":
            raise InputError(
                f"{p}: floating-point raster ({dtype}) has no defined 0..255 range; "
                "convert it to 8- or 16-bit first"
            )
        code = tiff_orientation(p)  # GDAL reads rows as stored and does not report it
        turn = None if code == 1 else Orientation(code, (ds.height, ds.width))
        georef = None
        has_transform = ds.transform != Affine.identity()
        if ds.crs is not None or has_transform:
            georef = Georef(
                transform=ds.transform,
                crs=None if ds.crs is None else ds.crs.to_wkt(),
                source="geotiff",
            )
        if georef is None or georef.crs is None:
            side = _georef_sidecar(p)
            if side is not None:
                georef = (
                    side if georef is None else Georef(georef.transform, side.crs, georef.source)
                )
        if turn is not None and georef is not None:  # georeferencing of the upright image
            georef = Georef(turn.upright_transform(georef.transform), georef.crs, georef.source)
        height, width = (ds.height, ds.width) if turn is None else turn.shape
        info = ImageInfo(
            path=p,
            format="tiff",
            width=width,
            height=height,
            bands=ds.count,
            dtype=dtype,
            nbits=nbits,
            georef=georef,
        )
        return ImageReader(info, dataset=ds, orientation=turn)
    except BaseException:
        ds.close()
        raise


def _too_large(p: Path, size: str) -> InputError:
    return InputError(
        f"{p}: {size} is too large to decode whole (limit {MAX_DECODED_PIXELS:,} pixels); "
        "PNG/JPEG have no windowed read: convert it to a tiled GeoTIFF (e.g. gdal_translate "
        "-co TILED=YES) and add that"
    )


def _open_pil(p: Path, fmt: str, max_pixels: int | None = None) -> ImageReader:
    try:
        with warnings.catch_warnings():
            # Pillow's own size alarm is replaced by MAX_DECODED_PIXELS below (one clear
            # line instead of a library warning); far beyond it Pillow refuses at open
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            im = Image.open(p)
    except Image.DecompressionBombError as exc:
        found = re.search(r"\((\d+) pixels\)", str(exc))
        raise _too_large(p, f"{int(found.group(1)):,} pixels" if found else "the image") from None
    except (OSError, UnidentifiedImageError, SyntaxError, ValueError) as exc:
        raise InputError(f"{p}: damaged, truncated or unreadable {fmt.upper()} ({exc})") from None
    try:
        with im:
            w0, h0 = im.size
            check_image_size(p, width=w0, height=h0, max_pixels=max_pixels)
            if w0 * h0 > MAX_DECODED_PIXELS:
                raise _too_large(p, f"{w0} x {h0} pixels")
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", Image.DecompressionBombWarning)
                im.load()
            im = ImageOps.exif_transpose(im)
            mode = im.mode
            if mode.startswith("I"):
                arr = np.asarray(im)
                nbits = 16
                data = np.clip(arr, 0, 65535).astype(np.uint16)[None]
                rgb = to_rgb8(data, nbits=nbits, where=str(p))
                bands, dtype = 1, "uint16"
            elif mode == "F":
                raise InputError(
                    f"{p}: floating-point image has no defined 0..255 range; convert it first"
                )
            else:
                bands = len(im.getbands())
                dtype = "uint8"
                nbits = 8
                rgb = np.asarray(im.convert("RGB"))
    except InputError:
        raise
    except (
        OSError,
        UnidentifiedImageError,
        SyntaxError,
        ValueError,
        Image.DecompressionBombError,
        Image.DecompressionBombWarning,
    ) as exc:
        raise InputError(f"{p}: damaged, truncated or unreadable {fmt.upper()} ({exc})") from None
    if rgb.size == 0:
        raise InputError(f"{p}: the image has no pixels")
    georef = _georef_sidecar(p)
    info = ImageInfo(
        path=p,
        format=fmt,
        width=rgb.shape[1],
        height=rgb.shape[0],
        bands=bands,
        dtype=dtype,
        nbits=nbits,
        georef=georef,
    )
    return ImageReader(info, pixels=np.ascontiguousarray(rgb))


def open_image(path: str | os.PathLike[str], *, max_pixels: int | None = None) -> ImageReader:
    """Open an image for reading.

    Parameters
    ----------
    path : path-like
        The image file.
    max_pixels : int, optional
        Refuse an image whose header declares more pixels (width x height), before any
        pixel is decoded (:func:`check_image_size`).

    Raises
    ------
    InputError
        For a missing, empty, unsupported, damaged or too large file, or an unreadable
        world file or ``.prj``; the message names the file.
    """
    p = Path(path)
    fmt = sniff_format(p)
    if fmt == "tiff":
        return _open_tiff(p, max_pixels)
    return _open_pil(p, fmt, max_pixels)


def inspect_image(path: str | os.PathLike[str]) -> ImageInfo:
    """Size, bands and georeferencing of an image (PNG/JPEG are decoded to check them)."""
    with open_image(path) as reader:
        return reader.info


def read_image(path: str | os.PathLike[str]) -> np.ndarray:
    """The whole image as (H, W, 3) uint8 RGB (use :func:`open_image` for windows)."""
    with open_image(path) as reader:
        return reader.read()


def read_index_png(path: str | os.PathLike[str]) -> np.ndarray:
    """A single-channel 8-bit PNG of indices (a class mask as written by ``write_png``).

    Unlike :func:`read_image` the values are kept as stored: no conversion to RGB, no
    palette expansion, no EXIF orientation (a mask is never rotated by its viewer).

    Parameters
    ----------
    path : path-like
        A PNG file of mode ``L`` (8-bit grey).

    Returns
    -------
    ndarray, shape (H, W), uint8

    Raises
    ------
    InputError
        For a missing, non-PNG, damaged or empty file, or a PNG that is not 8-bit
        single-channel; the message names the file.
    """
    p = Path(path)
    fmt = sniff_format(p)
    if fmt != "png":
        raise InputError(f"{p}: expected a PNG mask, got a {fmt.upper()} file")
    try:
        with Image.open(p) as im:
            im.load()
            if im.mode != "L":
                raise InputError(
                    f"{p}: expected an 8-bit single-channel (mode L) PNG of indices, got mode "
                    f"{im.mode}; save the mask as 8-bit grey"
                )
            values = np.asarray(im).copy()
    except InputError:
        raise
    except (OSError, UnidentifiedImageError, SyntaxError, ValueError) as exc:
        raise InputError(f"{p}: damaged, truncated or unreadable PNG ({exc})") from None
    if values.size == 0:
        raise InputError(f"{p}: the mask has no pixels")
    return values
