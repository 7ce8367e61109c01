"""Georeferencing: pixel <-> map coordinates, world files, ``.prj`` sidecars.

This module is the boundary where row/column (inside the code) meets x/y (easting and
northing, or longitude and latitude). A transform is an :class:`affine.Affine` in the
pixel-corner convention used by rasterio and GDAL: ``transform * (col, row)`` is the map
position of the top-left corner of pixel ``(row, col)``, so the centre of that pixel is
``transform * (col + 0.5, row + 0.5)``.

A world file holds six lines in the conventional order A, D, B, E, C, F, where
``x = A*col + B*row + C`` and ``y = D*col + E*row + F`` give the CENTRE of pixel
(row, col); (C, F) is the centre of the upper-left pixel (common GIS practice). The
corner transform is therefore shifted by half a pixel.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from affine import Affine
from rasterio.crs import CRS
from rasterio.errors import CRSError

from labeler.errors import InputError

__all__ = [
    "Georef",
    "pixel_centres_to_map",
    "map_to_pixel",
    "world_file_to_affine",
    "affine_to_world_file",
    "find_world_file",
    "read_world_file",
    "read_prj",
    "pixel_size",
]

#: World-file suffixes tried for an image ``name.ext`` (besides ``name.wld``).
_WORLD_SUFFIXES = {
    ".tif": (".tfw", ".tifw"),
    ".tiff": (".tfw", ".tiffw"),
    ".png": (".pgw", ".pngw"),
    ".jpg": (".jgw", ".jpgw"),
    ".jpeg": (".jgw", ".jpegw"),
}


@dataclass(frozen=True)
class Georef:
    """Where an image lies on the ground.

    Parameters
    ----------
    transform : affine.Affine
        Pixel-corner transform (see module docstring).
    crs : str or None
        The coordinate reference system as WKT or an authority string (``EPSG:32631``);
        None when the source gave none (map units then unknown).
    source : str
        ``"geotiff"`` or ``"worldfile"``.
    """

    transform: Affine
    crs: str | None
    source: str

    @property
    def coefficients(self) -> tuple[float, float, float, float, float, float]:
        """``(a, b, c, d, e, f)`` of the corner transform, for storing."""
        t = self.transform
        return (t.a, t.b, t.c, t.d, t.e, t.f)


def pixel_centres_to_map(
    transform: Affine, rows: np.ndarray, cols: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Map coordinates ``(x, y)`` of pixel centres.

    Parameters
    ----------
    transform : affine.Affine
        Pixel-corner transform.
    rows, cols : array_like of int, same shape
        Pixel indices.

    Returns
    -------
    x, y : ndarray of float64, the shape of ``rows``
    """
    r = np.asarray(rows, np.float64) + 0.5
    c = np.asarray(cols, np.float64) + 0.5
    x = transform.a * c + transform.b * r + transform.c
    y = transform.d * c + transform.e * r + transform.f
    return x, y


def map_to_pixel(transform: Affine, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Continuous pixel coordinates ``(row, col)`` of map points (corner convention:
    the centre of pixel (r, c) maps back to ``(r + 0.5, c + 0.5)``)."""
    inv = ~transform
    xa = np.asarray(x, np.float64)
    ya = np.asarray(y, np.float64)
    col = inv.a * xa + inv.b * ya + inv.c
    row = inv.d * xa + inv.e * ya + inv.f
    return row, col


def world_file_to_affine(a: float, d: float, b: float, e: float, c: float, f: float) -> Affine:
    """The corner transform of world-file lines A, D, B, E, C, F (file order)."""
    return Affine(a, b, c - 0.5 * a - 0.5 * b, d, e, f - 0.5 * d - 0.5 * e)


def affine_to_world_file(transform: Affine) -> tuple[float, float, float, float, float, float]:
    """World-file lines A, D, B, E, C, F (file order) of a corner transform."""
    t = transform
    cx = t.c + 0.5 * t.a + 0.5 * t.b
    cy = t.f + 0.5 * t.d + 0.5 * t.e
    return (t.a, t.d, t.b, t.e, cx, cy)


def find_world_file(image_path: str | os.PathLike[str]) -> Path | None:
    """The world file beside ``image_path`` (``.tfw``, ``.jgw``, ``.pgw``, ``.wld``, ...), or None."""
    p = Path(image_path)
    suffixes = _WORLD_SUFFIXES.get(p.suffix.lower(), ()) + (".wld",)
    for suf in suffixes:
        for cand in (p.with_suffix(suf), p.with_suffix(suf.upper())):
            if cand.is_file():
                return cand
    return None


def read_world_file(path: str | os.PathLike[str]) -> Affine:
    """Read a world file into a corner transform.

    Raises
    ------
    InputError
        Naming the file when it does not hold exactly six numbers, or the pixel size
        is zero.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8", errors="strict")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: cannot read the world file ({exc})") from None
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    if len(lines) != 6:
        raise InputError(
            f"{p}: a world file holds 6 numbers (A, D, B, E, C, F, one per line), got {len(lines)} lines"
        )
    try:
        a, d, b, e, c, f = (float(v) for v in lines)
    except ValueError:
        raise InputError(f"{p}: world file lines must be numbers, got {lines!r}") from None
    if a * e - b * d == 0:
        raise InputError(
            f"{p}: world file gives a zero pixel size (A*E - B*D = 0); it cannot locate pixels"
        )
    if not all(np.isfinite([a, d, b, e, c, f])):
        raise InputError(f"{p}: world file holds a non-finite number")
    return world_file_to_affine(a, d, b, e, c, f)


def read_prj(path: str | os.PathLike[str]) -> str:
    """The CRS of a ``.prj`` sidecar (WKT) as WKT text.

    Raises
    ------
    InputError
        Naming the file when it is not a readable coordinate reference system.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8").strip()
        crs = CRS.from_user_input(text)
    except (OSError, UnicodeDecodeError, CRSError) as exc:
        raise InputError(f"{p}: not a readable coordinate reference system ({exc})") from None
    return crs.to_wkt()


def pixel_size(transform: Affine) -> float:
    """Ground sampling distance: the mean edge of one pixel in map units."""
    return float(np.sqrt(abs(transform.a * transform.e - transform.b * transform.d)))
