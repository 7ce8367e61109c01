"""Reading masks made elsewhere back into per-image class masks.

Two kinds of file are read:

GeoJSON polygons (:func:`read_geojson_mask`)
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

PNG class masks (:func:`read_png_mask`)
    8-bit single-channel PNGs whose values are schema indices or 255 (unlabelled), or
    whose grey values a ``values`` table maps to classes. RGB (or fully opaque RGBA)
    PNGs are read only with a ``colours`` table mapping every colour present to a class.
    Palette PNGs are read by their palette INDEX (the common convention of segmentation
    datasets), or by colour when a ``colours`` table is given. 16-bit PNGs are accepted
    when every value is a valid 8-bit class value, refused otherwise.

Every problem raises :class:`MaskImportError` naming the file and the problem; nothing
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
import shapely
from affine import Affine
from PIL import Image, UnidentifiedImageError
from rasterio.crs import CRS

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import InputError
from labeler.export.geojson import (
    COORDINATES_MEMBER,
    WGS84,
    as_crs,
    geometry_from_geojson,
    read_geojson,
    reprojector,
)
from labeler.masks.polygons import polygons_to_mask

__all__ = [
    "MaskImportError",
    "MASK_NAME_SUFFIXES",
    "MASK_FILE_EXTENSIONS",
    "match_mask_to_image",
    "features_to_mask",
    "read_geojson_mask",
    "read_png_mask",
    "read_mask_file",
]

#: Name endings that tie a mask file to the image ``<stem>``: ``<stem>.png``,
#: ``<stem>_mask.png``, ``<stem>_annotation.png`` (and the same with ``.geojson``).
MASK_NAME_SUFFIXES = ("", "_mask", "_annotation")
#: File extensions read as masks.
MASK_FILE_EXTENSIONS = (".png", ".geojson", ".json")
#: Names under which an old-style GeoJSON ``crs`` member means WGS 84 longitude/latitude.
_CRS84_NAMES = {
    "urn:ogc:def:crs:ogc:1.3:crs84",
    "urn:ogc:def:crs:ogc::crs84",
    "ogc:crs84",
    "crs84",
}


class MaskImportError(InputError):
    """A mask file that cannot be imported; the message names the file and the problem."""


# -- names ---------------------------------------------------------------------------


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


# -- GeoJSON ---------------------------------------------------------------------------


def _class_of(props: object, schema: ClassSchema, where: str) -> int:
    if not isinstance(props, Mapping):
        raise ValueError(f"{where}: no properties; give each feature a 'class' or 'class_index'")
    name = props.get("class")
    index = props.get("class_index")
    by_name: int | None = None
    if name is not None:
        folded = {n.casefold(): c.index for n, c in zip(schema.names, schema.classes, strict=True)}
        if not isinstance(name, str) or name.casefold() not in folded:
            raise ValueError(
                f"{where}: unknown class {name!r}; known classes: {', '.join(schema.names)}"
            )
        by_name = folded[name.casefold()]
    by_index: int | None = None
    if index is not None:
        if isinstance(index, bool) or not isinstance(index, int | float) or int(index) != index:
            raise ValueError(f"{where}: class_index must be an integer, got {index!r}")
        if int(index) not in schema.indices:
            raise ValueError(
                f"{where}: unknown class_index {index!r}; known indices: "
                + ", ".join(f"{c.index} ({c.name})" for c in schema.classes)
            )
        by_index = int(index)
    if by_name is None and by_index is None:
        raise ValueError(
            f"{where}: no 'class' or 'class_index' property; known classes: "
            f"{', '.join(schema.names)}"
        )
    if by_name is not None and by_index is not None and by_name != by_index:
        raise ValueError(
            f"{where}: class {name!r} (index {by_name}) contradicts class_index {by_index}"
        )
    return by_name if by_name is not None else int(by_index)  # type: ignore[arg-type]


def _check_crs_member(collection: Mapping, name: str) -> None:
    if "crs" not in collection:
        return
    crs = collection["crs"]
    label = None
    if isinstance(crs, Mapping):
        props = crs.get("properties")
        if isinstance(props, Mapping):
            label = props.get("name")
    if isinstance(label, str) and label.strip().casefold() in _CRS84_NAMES:
        return
    raise MaskImportError(
        f"{name}: wrong CRS: the file names {label or crs!r}, but RFC 7946 GeoJSON holds WGS 84 "
        "longitude/latitude and has no 'crs' member; export it again from your GIS as "
        "GeoJSON in EPSG:4326 (longitude/latitude)"
    )


def features_to_mask(
    collection: Mapping,
    *,
    shape: tuple[int, int],
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    fill: int = UNLABELLED,
    image: str | None = None,
    name: str = "<collection>",
) -> np.ndarray:
    """Rasterise a GeoJSON FeatureCollection (as a dict) onto an image's pixel grid.

    Parameters
    ----------
    collection : mapping
        A FeatureCollection or a single Feature.
    shape : (int, int)
        ``(height, width)`` of the image.
    transform : affine.Affine or None
        The image's pixel-corner transform; needed unless the file is in pixel
        coordinates.
    crs : rasterio CRS, str or None
        The image's CRS; needed with ``transform``.
    schema : ClassSchema
    fill : int
        Value of pixels no polygon covers: 255 (unlabelled, a weak label) or 0 (soil,
        when the features cover every non-soil pixel); see the module docstring.
    image : str or None
        Keep only features whose ``image`` property is this name (features without an
        ``image`` property are kept). None accepts a file naming at most one image.
    name : str
        How to name the source in error messages (the file path).

    Returns
    -------
    mask : ndarray, shape ``shape``, uint8

    Raises
    ------
    MaskImportError
    """
    try:
        return _features_to_mask(
            collection, shape=shape, transform=transform, crs=crs, schema=schema,
            fill=fill, image=image, name=name,
        )
    except MaskImportError:
        raise
    except ValueError as err:
        raise MaskImportError(f"{name}: {err}") from None


def _features_to_mask(
    collection: Mapping,
    *,
    shape: tuple[int, int],
    transform: Affine | None,
    crs: CRS | str | None,
    schema: ClassSchema,
    fill: int,
    image: str | None,
    name: str,
) -> np.ndarray:
    if fill != UNLABELLED and fill not in schema.indices:
        raise ValueError(
            f"fill: expected 255 (unlabelled) or a class index {schema.indices}, got {fill!r}"
        )
    height, width = int(shape[0]), int(shape[1])
    if not isinstance(collection, Mapping):
        raise ValueError("not a GeoJSON object")
    kind = collection.get("type")
    if kind == "FeatureCollection":
        features = collection.get("features")
        if not isinstance(features, list):
            raise ValueError("FeatureCollection without a 'features' list (RFC 7946 section 3.3)")
    elif kind == "Feature":
        features = [collection]
    else:
        raise ValueError(
            f"expected a GeoJSON FeatureCollection or Feature, got type {kind!r}"
        )
    _check_crs_member(collection, name)
    pixel_mode = collection.get(COORDINATES_MEMBER) == "pixel"
    if not pixel_mode and (transform is None or crs is None):
        raise ValueError(
            "the file holds longitude/latitude, but the image has no georeferencing "
            "(transform and crs), so the polygons cannot be placed on its pixels"
        )

    images_named = sorted(
        {
            f["properties"]["image"]
            for f in features
            if isinstance(f, Mapping)
            and isinstance(f.get("properties"), Mapping)
            and isinstance(f["properties"].get("image"), str)
        }
    )
    if image is None and len(images_named) > 1:
        raise ValueError(
            f"the file holds features of {len(images_named)} images "
            f"({', '.join(images_named[:5])}{', ...' if len(images_named) > 5 else ''}); "
            "name the image to import"
        )
    geoms: list[shapely.Geometry] = []
    values: list[int] = []
    labels: list[str] = []
    for k, feature in enumerate(features):
        fid = feature.get("id") if isinstance(feature, Mapping) else None
        where = f"feature {k}" + (f" (id {fid!r})" if fid is not None else "")
        if not isinstance(feature, Mapping) or feature.get("type") != "Feature":
            raise ValueError(f"{where}: expected an object of type 'Feature'")
        props = feature.get("properties")
        if image is not None and isinstance(props, Mapping):
            named = props.get("image")
            if isinstance(named, str) and named != image:
                continue
        if feature.get("geometry") is None:
            continue  # an unlocated feature (RFC 7946 section 3.2) marks no pixel
        value = _class_of(props, schema, where)
        geom = geometry_from_geojson(feature.get("geometry"), where=where)
        if not shapely.is_valid(geom):
            raise ValueError(
                f"{where}: invalid polygon ({shapely.is_valid_reason(geom)}); repair it in "
                "your GIS (e.g. a 'fix geometries' tool) and export again"
            )
        if not pixel_mode:
            xy = shapely.get_coordinates(geom)
            if (np.abs(xy[:, 0]) > 180).any() or (np.abs(xy[:, 1]) > 90).any():
                raise ValueError(
                    f"{where}: positions outside longitude -180..180 / latitude -90..90; "
                    "the file is not in WGS 84 longitude/latitude (wrong CRS)"
                )
        geoms.append(geom)
        values.append(value)
        labels.append(where)
    if image is not None and features and not geoms and images_named and image not in images_named:
        raise ValueError(
            f"no feature belongs to image {image!r}; the file names "
            f"{', '.join(images_named[:5])}"
        )
    if not geoms:
        return np.full((height, width), fill, np.uint8)
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = geoms
    if not pixel_mode:
        src = as_crs(crs)
        inverse = ~transform
        a, b, c, d, e, f = inverse.a, inverse.b, inverse.c, inverse.d, inverse.e, inverse.f

        def to_pixel(xy: np.ndarray) -> np.ndarray:
            x, y = xy[:, 0], xy[:, 1]
            return np.column_stack([a * x + b * y + c, d * x + e * y + f])

        arr = shapely.transform(shapely.transform(arr, reprojector(WGS84, src)), to_pixel)
    bounds = shapely.bounds(arr)
    tol = 0.5
    outside = (
        (bounds[:, 0] < -tol)
        | (bounds[:, 1] < -tol)
        | (bounds[:, 2] > width + tol)
        | (bounds[:, 3] > height + tol)
        | ~np.isfinite(bounds).all(axis=1)
    )
    if outside.any():
        k = int(np.flatnonzero(outside)[0])
        x0, y0, x1, y1 = bounds[k]
        raise ValueError(
            f"{labels[k]}: lies outside the image ({int(outside.sum())} feature(s) do): it spans "
            f"columns {x0:.1f}..{x1:.1f} and rows {y0:.1f}..{y1:.1f}, the image is "
            f"{width} columns x {height} rows; is it the right image and georeferencing?"
        )
    return polygons_to_mask(list(zip(arr, values, strict=True)), shape=(height, width), fill=fill)


def read_geojson_mask(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    fill: int = UNLABELLED,
    image: str | None = None,
) -> np.ndarray:
    """Read a GeoJSON file into a class mask; see :func:`features_to_mask`.

    Raises
    ------
    MaskImportError
        Naming the file: unreadable, not JSON, not RFC 7946, wrong CRS, unknown class,
        invalid or out-of-image polygon.
    """
    p = Path(path)
    try:
        collection = read_geojson(p)
    except OSError as err:
        raise MaskImportError(f"{p}: cannot be read ({err.strerror or err})") from None
    except ValueError as err:
        raise MaskImportError(str(err)) from None
    return features_to_mask(
        collection, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill,
        image=image, name=str(p),
    )


# -- PNG --------------------------------------------------------------------------------


def _map_values(
    raw: np.ndarray, table: Mapping[int, int], name: str, what: str
) -> np.ndarray:
    lut = np.full(1 << 16, -1, np.int32)
    for key, value in table.items():
        lut[int(key)] = int(value)
    mapped = lut[raw]
    if (mapped < 0).any():
        unknown, counts = np.unique(raw[mapped < 0], return_counts=True)
        listed = ", ".join(
            f"{int(v)} ({int(n)} px)" for v, n in zip(unknown[:5], counts[:5], strict=True)
        )
        raise MaskImportError(
            f"{name}: {what} {listed}{' ...' if len(unknown) > 5 else ''} are not in the "
            "given table; add them to it"
        )
    return mapped.astype(np.uint8)


def _map_colours(
    rgb: np.ndarray, colours: Mapping[tuple[int, int, int], int], name: str
) -> np.ndarray:
    key = (rgb[..., 0].astype(np.int64) << 16) | (rgb[..., 1].astype(np.int64) << 8) | rgb[..., 2]
    uniq, inverse = np.unique(key.ravel(), return_inverse=True)
    table: dict[int, int] = {}
    for colour, value in colours.items():
        if len(colour) != 3:
            raise MaskImportError(
                f"{name}: colours table key {colour!r} is not an (r, g, b) triple"
            )
        r, g, b = (int(v) for v in colour)
        table[(r << 16) | (g << 8) | b] = int(value)
    missing = [int(u) for u in uniq if int(u) not in table]
    if missing:
        shown = ", ".join(f"({u >> 16}, {(u >> 8) & 255}, {u & 255})" for u in missing[:5])
        known = ", ".join(f"{tuple(int(v) for v in c)} -> {v}" for c, v in colours.items())
        raise MaskImportError(
            f"{name}: {len(missing)} colour(s) are not in the colour table: {shown}"
            f"{' ...' if len(missing) > 5 else ''}; the table knows {known}"
        )
    out = np.asarray([table[int(u)] for u in uniq], np.uint8)[inverse]
    return out.reshape(rgb.shape[:2])


def _check_table_values(table: Mapping, schema: ClassSchema, name: str, what: str) -> None:
    for key, value in table.items():
        if not isinstance(value, int | np.integer) or (
            int(value) != UNLABELLED and int(value) not in schema.indices
        ):
            raise MaskImportError(
                f"{name}: {what} maps {key!r} to {value!r}, which is not a class index "
                f"{schema.indices} or 255"
            )


def read_png_mask(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    schema: ClassSchema = DEFAULT_SCHEMA,
    colours: Mapping[tuple[int, int, int], int] | None = None,
    values: Mapping[int, int] | None = None,
) -> np.ndarray:
    """Read a PNG class mask (see the module docstring for the accepted kinds).

    Parameters
    ----------
    path : path
    shape : (int, int)
        ``(height, width)`` of the image the mask belongs to.
    schema : ClassSchema
    colours : mapping (r, g, b) -> class index, or None
        Needed for RGB images; every colour present must be in it.
    values : mapping grey value -> class index, or None
        Optional remapping of a grey (or 16-bit) mask; every value present must be in it.

    Returns
    -------
    mask : ndarray, shape ``shape``, uint8

    Raises
    ------
    MaskImportError
    """
    p = Path(path)
    name = str(p)
    if colours is not None:
        _check_table_values(colours, schema, name, "colours table")
    if values is not None:
        _check_table_values(values, schema, name, "values table")
        for key in values:
            if not isinstance(key, int | np.integer) or not 0 <= int(key) < 1 << 16:
                raise MaskImportError(f"{name}: values table key {key!r} is not a grey value")
    try:
        with Image.open(p) as im:
            fmt = im.format
            im.load()
            mode = im.mode
            size = im.size
            if fmt != "PNG":
                raise MaskImportError(f"{name}: expected a PNG file, got {fmt or 'unknown'} data")
            if mode == "P":
                raw_index = np.asarray(im)
                as_rgb = np.asarray(im.convert("RGB")) if colours is not None else None
            else:
                raw_index = None
                as_rgb = None
                arr = np.asarray(im)
    except MaskImportError:
        raise
    except FileNotFoundError:
        raise MaskImportError(f"{name}: no such file") from None
    except Image.DecompressionBombError as err:
        raise MaskImportError(f"{name}: image too large to read safely ({err})") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as err:
        raise MaskImportError(f"{name}: not a readable PNG image ({err})") from None
    width, height = size
    if (height, width) != (int(shape[0]), int(shape[1])):
        raise MaskImportError(
            f"{name}: mask is {height} x {width} pixels (rows x columns) but its image is "
            f"{int(shape[0])} x {int(shape[1])}; a mask must have the size of its image"
        )
    if mode == "P":
        if as_rgb is not None:
            mask = _map_colours(as_rgb, colours, name)  # type: ignore[arg-type]
        elif values is not None:
            mask = _map_values(raw_index.astype(np.int64), values, name, "palette indices")
        else:
            mask = raw_index.astype(np.uint8)
    elif mode in ("L", "I;16", "I;16B", "I;16L", "I"):
        raw = arr.astype(np.int64)
        if values is not None:
            if raw.min() < 0 or raw.max() >= 1 << 16:
                raise MaskImportError(f"{name}: grey values outside 0..65535")
            mask = _map_values(raw, values, name, "grey values")
        else:
            if raw.min() < 0 or raw.max() > 255:
                raise MaskImportError(
                    f"{name}: {'16-bit' if mode != 'L' else 'grey'} mask holds values up to "
                    f"{int(raw.max())}; class masks are 8-bit (0..254 classes, 255 "
                    "unlabelled): save it as 8-bit or pass a values table"
                )
            mask = raw.astype(np.uint8)
    elif mode in ("LA", "RGBA"):
        if (arr[..., -1] != 255).any():
            raise MaskImportError(
                f"{name}: the mask has transparent pixels (alpha channel); a class mask must "
                "be fully opaque: remove the alpha channel"
            )
        if mode == "LA":
            if values is not None:
                mask = _map_values(arr[..., 0].astype(np.int64), values, name, "grey values")
            else:
                mask = arr[..., 0].astype(np.uint8)
        elif colours is None:
            raise MaskImportError(
                f"{name}: an RGBA mask needs a colour table (colour -> class); pass colours"
            )
        else:
            mask = _map_colours(arr[..., :3], colours, name)
    elif mode == "RGB":
        if colours is None:
            raise MaskImportError(
                f"{name}: an RGB mask needs a colour table (colour -> class); pass colours, "
                "or save the mask as 8-bit single-channel class indices"
            )
        mask = _map_colours(arr, colours, name)
    else:
        raise MaskImportError(
            f"{name}: PNG mode {mode!r} is not a class mask; save it as 8-bit single-channel "
            "class indices (or RGB with a colour table)"
        )
    allowed = np.zeros(256, bool)
    allowed[list(schema.indices)] = True
    allowed[UNLABELLED] = True
    present = np.flatnonzero(np.bincount(mask.ravel(), minlength=256))
    bad = [int(v) for v in present if not allowed[v]]
    if bad:
        raise MaskImportError(
            f"{name}: holds values {bad[:10]}{' ...' if len(bad) > 10 else ''} that are not "
            f"class indices {schema.indices} or 255 (unlabelled); pass a values table to map them"
        )
    return np.ascontiguousarray(mask)


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

