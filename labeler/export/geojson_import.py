"""Reading GeoJSON polygon files made elsewhere back into class masks.

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
  non-soil pixel.

Our own export also writes a ``looked_at`` outline of every saved tile
(:mod:`labeler.export.footprint`): its pixels are soil (the background class) unless a
class polygon covers them, whatever ``fill`` is. So an exported file imported back with
the default ``fill`` gives full masks on the tiles that were saved and leaves the rest
unlabelled.

The file is read and every feature checked and placed on the image's pixel grid when
a :class:`GeoJsonMask` is made; its mask is then drawn a band of rows at a time
(:meth:`GeoJsonMask.read_rows`, only the polygons that reach the band), so an image of
20000 x 20000 pixels is never drawn whole. A file larger than
:data:`MAX_GEOJSON_BYTES`, or nested deeper than JSON reading allows, is refused.

Every problem raises :class:`labeler.errors.MaskImportError` naming the file and the
problem; nothing partial is returned.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import shapely
from affine import Affine
from rasterio.crs import CRS

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import MaskImportError
from labeler.export.crs import WGS84, as_crs, reprojector
from labeler.export.footprint import is_footprint
from labeler.export.geojson import COORDINATES_MEMBER, read_geojson
from labeler.export.geometry import geometry_from_geojson
from labeler.export.mask_files import check_mask_path
from labeler.masks.polygons import polygons_to_mask

__all__ = [
    "MAX_GEOJSON_BYTES",
    "GeoJsonMask",
    "open_geojson_mask",
    "features_to_mask",
    "read_geojson_mask",
]

#: Largest GeoJSON file read (bytes). A parsed file with its polygons takes about 13 times
#: its size in memory (measured on a 8.5 MiB file of 49 000 polygons), so 64 MiB keeps an
#: import well under 1.5 GB; larger masks are better imported as PNG.
MAX_GEOJSON_BYTES = 64 * 2**20

#: Names under which an old-style GeoJSON ``crs`` member means WGS 84 longitude/latitude.
_CRS84_NAMES = {
    "urn:ogc:def:crs:ogc:1.3:crs84",
    "urn:ogc:def:crs:ogc::crs84",
    "ogc:crs84",
    "crs84",
}


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


class GeoJsonMask:
    """A GeoJSON FeatureCollection checked and placed on an image's pixel grid.

    Every feature is checked (class, geometry, validity, CRS, inside the image) when the
    object is made; :meth:`read_rows` then draws any band of rows. A pixel takes the
    class of a polygon that contains its centre; later features overwrite earlier ones.

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

    Raises
    ------
    MaskImportError
        Naming ``name`` and the feature: not RFC 7946, wrong CRS, unknown class,
        invalid or out-of-image polygon.
    """

    def __init__(
        self,
        collection: Mapping,
        *,
        shape: tuple[int, int],
        transform: Affine | None = None,
        crs: CRS | str | None = None,
        schema: ClassSchema = DEFAULT_SCHEMA,
        fill: int = UNLABELLED,
        image: str | None = None,
        name: str = "<collection>",
    ) -> None:
        self.name = name
        self.path = Path(name)
        self.shape = (int(shape[0]), int(shape[1]))
        self.fill = fill
        try:
            geoms, values = _place_features(
                collection, shape=self.shape, transform=transform, crs=crs, schema=schema,
                fill=fill, image=image, name=name,
            )
        except MaskImportError:
            raise
        except ValueError as err:
            raise MaskImportError(f"{name}: {err}") from None
        self._geoms = geoms
        self._values = values
        bounds = shapely.bounds(geoms) if len(geoms) else np.zeros((0, 4))
        self._top = bounds[:, 1]
        self._bottom = bounds[:, 3]

    def read_rows(self, start: int, stop: int) -> np.ndarray:
        """The class mask of rows ``[start, stop)``.

        Parameters
        ----------
        start, stop : int
            ``0 <= start < stop <= height``; any order of bands may be asked for.

        Returns
        -------
        ndarray, shape (stop - start, width), uint8
            Class indices; ``fill`` where no polygon covers a pixel centre.
        """
        height, width = self.shape
        if not 0 <= start < stop <= height:
            raise ValueError(f"rows: expected 0 <= start < stop <= {height}, got {start}, {stop}")
        hit = np.flatnonzero((self._top < stop) & (self._bottom > start))  # in file order
        if hit.size == 0:
            return np.full((stop - start, width), self.fill, np.uint8)
        offset = np.array([0.0, float(start)])
        moved = shapely.transform(self._geoms[hit], lambda xy: xy - offset)
        values = self._values[hit]
        return polygons_to_mask(
            list(zip(moved, values.tolist(), strict=True)), shape=(stop - start, width),
            fill=self.fill,
        )

    def close(self) -> None:
        """Nothing to release (kept for the same use as the PNG reader)."""

    def __enter__(self) -> GeoJsonMask:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


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

    The whole mask at once; see :class:`GeoJsonMask` for the parameters and for drawing
    a band of rows at a time.

    Returns
    -------
    mask : ndarray, shape ``shape``, uint8

    Raises
    ------
    MaskImportError
    """
    placed = GeoJsonMask(
        collection, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill,
        image=image, name=name,
    )
    height, width = placed.shape
    if height == 0 or width == 0:
        return np.full((height, width), fill, np.uint8)
    return placed.read_rows(0, height)


def _place_features(
    collection: Mapping,
    *,
    shape: tuple[int, int],
    transform: Affine | None,
    crs: CRS | str | None,
    schema: ClassSchema,
    fill: int,
    image: str | None,
    name: str,
) -> tuple[np.ndarray, np.ndarray]:
    """Checked polygons in pixel coordinates (object array) and their classes (uint8)."""
    if fill != UNLABELLED and fill not in schema.indices:
        raise ValueError(
            f"fill: expected 255 (unlabelled) or a class index {schema.indices}, got {fill!r}"
        )
    height, width = shape
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
    looked: list[bool] = []
    soil = min(schema.indices)  # the background class
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
        footprint = is_footprint(props)
        value = soil if footprint else _class_of(props, schema, where)
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
        looked.append(footprint)
    if image is not None and features and not geoms and images_named and image not in images_named:
        raise ValueError(
            f"no feature belongs to image {image!r}; the file names "
            f"{', '.join(images_named[:5])}"
        )
    if not geoms:
        return np.empty(0, dtype=object), np.zeros(0, np.uint8)
    # "looked at" outlines first: their pixels are soil unless a class polygon covers them
    order = sorted(range(len(geoms)), key=lambda k: not looked[k])
    geoms = [geoms[k] for k in order]
    values = [values[k] for k in order]
    labels = [labels[k] for k in order]
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
    return arr, np.asarray(values, np.uint8)


def open_geojson_mask(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    fill: int = UNLABELLED,
    image: str | None = None,
) -> GeoJsonMask:
    """Read a GeoJSON file and place its features on the image grid; see :class:`GeoJsonMask`.

    Raises
    ------
    MaskImportError
        Naming the file: missing, not a regular file, unreadable, larger than
        :data:`MAX_GEOJSON_BYTES`, nested too deep, not JSON, not RFC 7946, wrong CRS,
        unknown class, invalid or out-of-image polygon.
    """
    p = Path(path)
    size = check_mask_path(p)
    if size > MAX_GEOJSON_BYTES:
        raise MaskImportError(
            f"{p}: a GeoJSON file of {size / 2**20:.0f} MiB is larger than the "
            f"{MAX_GEOJSON_BYTES / 2**20:.0f} MiB read at once; split it per image, or import a "
            "PNG class mask instead"
        )
    try:
        collection = read_geojson(p)
    except RecursionError:
        raise MaskImportError(
            f"{p}: not GeoJSON: its JSON is nested too deeply to read (RFC 7946 geometries "
            "nest at most four arrays deep)"
        ) from None
    except OSError as err:
        raise MaskImportError(f"{p}: cannot be read ({err.strerror or err})") from None
    except ValueError as err:
        raise MaskImportError(str(err)) from None
    return GeoJsonMask(
        collection, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill,
        image=image, name=str(p),
    )


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
    placed = open_geojson_mask(
        path, shape=shape, transform=transform, crs=crs, schema=schema, fill=fill, image=image
    )
    return placed.read_rows(0, placed.shape[0])
