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
    datasets), or by colour when a ``colours`` table is given. 16-bit PNGs are accepted
    when every value is a valid 8-bit class value, refused otherwise.

Every problem raises :class:`labeler.errors.MaskImportError` naming the file and the problem; nothing
partial is returned.

Caution: imported masks are used for training and for field maps; where such a map
drives spraying or fungicide decisions, local regulations and licensed agronomic advice
come first.
"""

from __future__ import annotations

import difflib
import os
from collections.abc import Iterable, Mapping
from pathlib import Path

import numpy as np
from affine import Affine
from rasterio.crs import CRS

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import MaskImportError
from labeler.export.geojson_import import read_geojson_mask
from labeler.export.png_import import read_png_mask

__all__ = [
    "MASK_NAME_SUFFIXES",
    "MASK_FILE_EXTENSIONS",
    "match_mask_to_image",
    "read_mask_file",
]

#: Name endings that tie a mask file to the image ``<stem>``: ``<stem>.png``,
#: ``<stem>_mask.png``, ``<stem>_annotation.png`` (and the same with ``.geojson``).
MASK_NAME_SUFFIXES = ("", "_mask", "_annotation")
#: File extensions read as masks.
MASK_FILE_EXTENSIONS = (".png", ".geojson", ".json")


def match_mask_to_image(mask_path: str | os.PathLike[str], image_stems: Iterable[str]) -> str:
    """The image a mask file belongs to, by name.

    ``<stem>.png``, ``<stem>_mask.png`` and ``<stem>_annotation.png`` (or ``.geojson`` /
    ``.json``) belong to the image ``<stem>``.

    Parameters
    ----------
    mask_path : path
        The mask file (only its name is used).
    image_stems : iterable of str
        File names of the project's images without extension.

    Returns
    -------
    stem : str

    Raises
    ------
    MaskImportError
        When no image or more than one image matches; the message lists the candidates.
    """
    path = Path(mask_path)
    stems = sorted(set(image_stems))
    ext = path.suffix.lower()
    if ext not in MASK_FILE_EXTENSIONS:
        raise MaskImportError(
            f"{path}: expected a mask file ending in {', '.join(MASK_FILE_EXTENSIONS)}, "
            f"got {path.suffix or 'no extension'!r}"
        )
    base = path.name[: -len(path.suffix)]
    tried: list[str] = []
    for suffix in MASK_NAME_SUFFIXES:
        if suffix == "":
            tried.append(base)
        elif base.endswith(suffix) and len(base) > len(suffix):
            tried.append(base[: -len(suffix)])
    known = set(stems)
    matches = [s for s in dict.fromkeys(tried) if s in known]
    if len(matches) == 1:
        return matches[0]
    if matches:
        raise MaskImportError(
            f"{path}: the name fits several images ({', '.join(matches)}); rename the file "
            "or name the image explicitly"
        )
    close = difflib.get_close_matches(base, stems, n=5, cutoff=0.6)
    hint = f"; similar image names: {', '.join(close)}" if close else ""
    raise MaskImportError(
        f"{path}: no image of the project is called {' or '.join(repr(t) for t in tried)} "
        f"(a mask is named <image>.png, <image>_mask.png or <image>_annotation.png){hint}"
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
    """Read a ``.png`` mask or a ``.geojson``/``.json`` polygon file by its extension."""
    p = Path(path)
    ext = p.suffix.lower()
    if ext == ".png":
        return read_png_mask(p, shape=shape, schema=schema, colours=colours, values=values)
    if ext in (".geojson", ".json"):
        return read_geojson_mask(
            p, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill, image=image
        )
    raise MaskImportError(
        f"{p}: expected a .png, .geojson or .json mask file, got {p.suffix or 'no extension'!r}"
    )

