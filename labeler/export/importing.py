"""Importing masks made elsewhere: which image a file belongs to, and reading it by kind.

Two kinds of file are read:

GeoJSON polygons (:func:`labeler.export.geojson_import.read_geojson_mask`)
    A FeatureCollection written by :mod:`labeler.export.geojson` or by a GIS. Each feature
    names its class by ``class`` (a name of the schema, case-insensitive) or
    ``class_index``. Positions are WGS 84 longitude/latitude (RFC 7946); they are
    reprojected into the image's CRS and then, through the inverse of the image transform,
    into its pixel grid. A file marked ``"labeler:coordinates": "pixel"`` (our export of an
    image without georeferencing) holds pixel coordinates and is read without
    reprojection. A pixel takes the class of a polygon that contains its centre; later
    features overwrite earlier ones where they overlap.

    What the pixels that no polygon covers become is the caller's choice, ``fill``:

    * ``fill=255`` (default): they stay unlabelled, so a file that outlines only some
      plants is a weak label. A file that also has soil (class 0) polygons wherever the
      ground is bare covers the whole image and becomes a full mask.
    * ``fill=0``: they become soil. Use this for files in which the features cover every
      non-soil pixel, which is what our own export writes (it drops soil polygons unless
      asked for them).

PNG class masks (:func:`labeler.export.png_import.read_png_mask`)
    8-bit single-channel PNGs whose values are schema indices or 255 (unlabelled), or
    whose grey values a ``values`` table maps to classes. RGB (or fully opaque RGBA)
    PNGs are read only with a ``colours`` table mapping every colour present to a class.
    Palette PNGs are read by their palette INDEX (the common convention of segmentation
    datasets), or by colour when a ``colours`` table is given. 16-bit grey PNGs are
    accepted when every value is a valid 8-bit class value, refused otherwise.

Both are read a band of rows at a time (:func:`open_mask_file` gives a
:class:`labeler.export.mask_files.MaskSource`), so an orthomosaic-sized mask is never
held whole; :func:`read_mask_file` reads a whole (small) mask at once.

Every problem raises :class:`labeler.errors.MaskImportError` naming the file and the
problem; nothing partial is returned.

Caution: imported masks are used for training and for field maps; where such a map
drives spraying or fungicide decisions, local regulations and licensed agronomic advice
come first.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

import numpy as np
from affine import Affine
from rasterio.crs import CRS

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import MaskImportError
from labeler.export.geojson_import import open_geojson_mask
from labeler.export.mask_files import (
    MASK_FILE_EXTENSIONS,
    MASK_NAME_SUFFIXES,
    MaskSource,
    check_mask_path,
    match_mask_to_image,
)
from labeler.export.png_import import PngMaskReader

__all__ = [
    "MASK_NAME_SUFFIXES",
    "MASK_FILE_EXTENSIONS",
    "MaskSource",
    "check_mask_path",
    "match_mask_to_image",
    "open_mask_file",
    "read_mask_file",
]


def open_mask_file(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    fill: int = UNLABELLED,
    image: str | None = None,
    colours: Mapping[tuple[int, int, int], int] | None = None,
    values: Mapping[int, int] | None = None,
) -> MaskSource:
    """Open a ``.png`` mask or a ``.geojson``/``.json`` polygon file by its extension.

    The path, the file's header (PNG) or whole content (GeoJSON, every feature) are
    checked here; PNG pixel values are checked as rows are read.

    Parameters
    ----------
    path : path-like
        The mask file.
    shape : (int, int)
        ``(height, width)`` of its image.
    transform, crs
        The image's georeferencing (GeoJSON in longitude/latitude needs it).
    schema : ClassSchema
    fill : int
        GeoJSON: value of pixels no polygon covers (255 unlabelled, or 0 soil).
    image : str, optional
        GeoJSON: keep the features of this image.
    colours, values : mapping, optional
        PNG: colour and grey-value tables (see :mod:`labeler.export.png_import`).

    Returns
    -------
    MaskSource
        Read it with ``read_rows(start, stop)``, top to bottom; close it after use.

    Raises
    ------
    MaskImportError
        Naming the file and the problem.
    """
    p = Path(path)
    ext = p.suffix.lower()
    if ext not in MASK_FILE_EXTENSIONS:
        raise MaskImportError(
            f"{p}: expected a .png, .geojson or .json mask file, got "
            f"{p.suffix or 'no extension'!r}"
        )
    check_mask_path(p)
    if ext == ".png":
        return PngMaskReader(p, shape=shape, schema=schema, colours=colours, values=values)
    return open_geojson_mask(
        p, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill, image=image
    )


def read_mask_file(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    fill: int = UNLABELLED,
    image: str | None = None,
    colours: Mapping[tuple[int, int, int], int] | None = None,
    values: Mapping[int, int] | None = None,
) -> np.ndarray:
    """Read a whole ``.png`` or ``.geojson``/``.json`` mask file; see :func:`open_mask_file`.

    Returns
    -------
    mask : ndarray, shape ``shape``, uint8
    """
    source = open_mask_file(
        path, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill,
        image=image, colours=colours, values=values,
    )
    try:
        return source.read_rows(0, source.shape[0])
    finally:
        source.close()
