"""Class masks as RFC 7946 GeoJSON FeatureCollections; writing and reading the files.

Each connected region of a class becomes one Feature. The path from a stitched image
mask to the file is:

1. outline the regions in pixel-corner coordinates (x = column, y = row), see
   :mod:`labeler.masks.polygons`;
2. map the outlines through the image's affine transform into its CRS (easting,
   northing), and take the area in square metres there (for a geographic CRS, in a
   Lambert azimuthal equal-area projection centred on the image);
3. reproject every vertex to WGS 84 longitude/latitude with rasterio (RFC 7946
   sections 3.1.1 and 4: positions are ``[longitude, latitude]``, no ``"crs"`` member).
   All vertices go through one ``rasterio.warp.transform`` call, which gives the same
   positions as ``rasterio.warp.transform_geom`` geometry by geometry. Edges are not
   densified (straight in longitude/latitude, which is exact enough at field scale)
   and features crossing the antimeridian are not split;
4. orient the rings AFTER reprojection, exterior counterclockwise and holes clockwise
   (RFC 7946 section 3.1.6; image rows point down, so the orientation in pixel space
   says nothing about the orientation on the ground);
5. round positions to as many decimals as keep every vertex within a tenth of a pixel
   (see :func:`coordinate_decimals`; RFC 7946 section 11.2: 6 decimals are about 10 cm)
   and give the collection and each feature a ``bbox`` ``[west, south, east, north]``
   (RFC 7946 section 5).

Feature properties: ``layer`` (``"classes"``; the export adds a ``"looked_at"`` layer of
saved tiles' outlines, :mod:`labeler.export.footprint`), ``class`` (name), ``class_index``, ``image``, ``tiles`` (ids of the
tiles the region's pixels come from), ``annotators``, ``states`` (tile states),
``model_version``, ``source`` (``"annotation"``, or ``"proposal"`` as soon as one of the
region's tiles holds an unreviewed proposal), ``area_m2`` and ``area_px``. The feature
``id`` is the string ``"<image>:<class>:<n>"``.

Soil (index 0) is the background and is not exported unless asked for with
``classes=``; 255 (unlabelled) is never a class.

Images without georeferencing can be written in pixel coordinates only on request
(``pixel_coordinates=True``): such a file is NOT RFC 7946 GeoJSON, a
:class:`NotRFC7946Warning` says so, and the file carries the top-level member
``"labeler:coordinates": "pixel"`` so that the import can tell. Its rings are oriented
counterclockwise in the numeric x/y frame of the pixel coordinates (which looks clockwise
on screen, where rows point down).

Caution: polygons exported here are decision support. Where they drive a field
operation (spot spraying, fungicide timing), local regulations and licensed agronomic
advice come first.
"""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import shapely
from affine import Affine
from rasterio.crs import CRS

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import InputError
from labeler.export.crs import (
    WGS84,
    affine_mapper,
    as_crs,
    coordinate_decimals,
    ground_sampling_distance,
    local_equal_area,
    reprojector,
)
from labeler.export.geometry import encode_geometries
from labeler.fileio import atomic_write_bytes
from labeler.imagery.tiling import TileLayout, Window
from labeler.masks.strip_outlines import OutlinedRegion, outline_strips
from labeler.states import STATES

__all__ = [
    "COORDINATES_MEMBER",
    "NotRFC7946Warning",
    "TileInfo",
    "FEATURE_BATCH",
    "ImageFeatures",
    "image_features",
    "image_feature_collection",
    "merge_feature_collections",
    "write_geojson",
    "read_geojson",
]

#: Top-level member that marks a file in pixel coordinates (not RFC 7946).
COORDINATES_MEMBER = "labeler:coordinates"
#: Regions turned into Feature dicts at once when features are made in batches.
FEATURE_BATCH = 10_000
_SOURCES = ("annotation", "proposal")


class NotRFC7946Warning(UserWarning):
    """A file written in pixel coordinates: valid JSON, but not RFC 7946 GeoJSON."""


@dataclass(frozen=True)
class TileInfo:
    """What the store knows about one tile, aligned with the tile windows.

    Parameters
    ----------
    tile_id : int or str
        The tile's id in the store.
    state : str
        Tile state (:data:`labeler.states.STATES`), e.g. ``"accepted"``.
    annotator : str or None
        Who saved the mask used for export; None for a proposal nobody reviewed.
    model_version : int, str or None
        Model version that proposed the tile's mask, if any.
    source : {"annotation", "proposal"}
        Whether the exported mask is a saved annotation or a model proposal.
    """

    tile_id: int | str
    state: str
    annotator: str | None = None
    model_version: int | str | None = None
    source: str = "annotation"

    def __post_init__(self) -> None:
        if self.state not in STATES:
            raise ValueError(
                f"state: expected one of {', '.join(STATES)}, got {self.state!r}"
            )
        if self.source not in _SOURCES:
            raise ValueError(f"source: expected 'annotation' or 'proposal', got {self.source!r}")


def _collection_bbox(features: Sequence[Mapping]) -> list[float] | None:
    boxes = np.asarray([f["bbox"] for f in features if "bbox" in f], np.float64)
    if len(boxes) == 0:
        return None
    return [
        float(boxes[:, 0].min()), float(boxes[:, 1].min()),
        float(boxes[:, 2].max()), float(boxes[:, 3].max()),
    ]


# -- building collections ---------------------------------------------------------------


def _distinct(values: Iterable, order: Sequence | None = None) -> list:
    seen: list = []
    for v in values:
        if v is not None and v not in seen:
            seen.append(v)
    if order is not None:
        seen.sort(key=order.index)
    else:
        seen.sort(key=lambda v: (str(type(v)), v))
    return seen


def _check_windows(
    windows: Sequence[Window] | None, tiles: Sequence[TileInfo] | None, shape: tuple[int, int]
) -> None:
    if (windows is None) != (tiles is None):
        raise ValueError(
            "windows/tiles: pass both (one TileInfo per tile window) or neither, got "
            f"windows={'None' if windows is None else len(windows)} and "
            f"tiles={'None' if tiles is None else len(tiles)}"
        )
    if windows is None or tiles is None:
        return
    if len(windows) != len(tiles):
        raise ValueError(
            f"tiles: expected one TileInfo per window ({len(windows)}), got {len(tiles)}"
        )
    for k, (w, t) in enumerate(zip(windows, tiles, strict=True)):
        if not isinstance(t, TileInfo):
            raise ValueError(f"tiles[{k}]: expected a TileInfo, got {type(t).__name__}")
        if w.row < 0 or w.col < 0 or w.row + w.height > shape[0] or w.col + w.width > shape[1]:
            raise ValueError(
                f"windows[{k}]: {w} reaches outside the {shape[0]} x {shape[1]} image mask"
            )


def _tile_properties(infos: Sequence[TileInfo], default_source: str) -> dict:
    """Feature properties that come from the tiles a region's pixels come from."""
    versions = _distinct(t.model_version for t in infos)
    if infos:
        source = "proposal" if any(t.source == "proposal" for t in infos) else "annotation"
    else:
        source = default_source
    return {
        "tiles": [t.tile_id for t in infos],
        "annotators": _distinct(t.annotator for t in infos),
        "states": _distinct((t.state for t in infos), order=STATES),
        "model_version": (
            None if not versions else versions[0] if len(versions) == 1 else list(versions)
        ),
        "source": source,
    }


@dataclass(frozen=True, eq=False)
class ImageFeatures:
    """The features of one image, made batch by batch (see :func:`image_features`).

    Attributes
    ----------
    regions : list of OutlinedRegion
        The outlined regions (pixel coordinates), one feature each, in feature order.
    pixel_coordinates : bool
        Whether the features are in pixel coordinates (not RFC 7946).
    """

    regions: list[OutlinedRegion]
    pixel_coordinates: bool
    make: Callable[[Sequence[OutlinedRegion]], list[dict]] = field(repr=False)

    def __len__(self) -> int:
        return len(self.regions)

    def batches(self, size: int = FEATURE_BATCH) -> Iterator[list[dict]]:
        """The GeoJSON Feature dicts, ``size`` regions at a time, in order."""
        for a in range(0, len(self.regions), max(1, int(size))):
            yield self.make(self.regions[a : a + size])


def image_features(
    mask,
    *,
    image: str,
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    windows: Sequence[Window] | None = None,
    tiles: Sequence[TileInfo] | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
    classes: Iterable[int] | None = None,
    source: str = "annotation",
    pixel_coordinates: bool = False,
    simplify_tolerance_px: float = 0.5,
    min_area_px: float = 8,
    connectivity: int = 8,
    smooth: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> dict:
    """One image's class mask as GeoJSON Features (see module docstring), made in batches.

    The regions are outlined here (strip by strip for a mask read by rows); each
    batch's features (reprojected, rounded, with their properties) are made only when
    :meth:`ImageFeatures.batches` reaches it, so a writer can stream them to a file.

    Parameters
    ----------
    mask : ndarray, shape (H, W), uint8, or a raster read by rows
        The stitched image mask (tile seams already merged, so a region cut by a tile
        border is one region here), as an array or as a
        :class:`labeler.imagery.tiling.StitchedMask` that is stitched strip by strip
        while it is outlined (:func:`labeler.masks.strip_outlines.outline_strips`: a big
        image is never held whole). Values are schema indices or 255.
    image : str
        Image name, stored in each feature's ``image`` property and its ``id``.
    transform : affine.Affine or None
        Pixel-corner transform of the image (``transform * (col, row)`` = map x, y).
    crs : rasterio CRS, str or None
        The image's coordinate reference system.
    windows, tiles : sequences or None
        The tile windows the mask was stitched from and one :class:`TileInfo` per window
        (same order); they give the ``tiles``, ``annotators``, ``states``,
        ``model_version`` and ``source`` properties. Without them these are empty and
        ``source`` is used.
    schema : ClassSchema
    classes : iterable of int or None
        Classes to export; default every schema class except the background 0.
    source : {"annotation", "proposal"}
        ``source`` property when no tiles are given.
    pixel_coordinates : bool
        Write pixel coordinates (x = column, y = row of pixel corners) instead of
        longitude/latitude; required when the image has no georeferencing. Emits
        :class:`NotRFC7946Warning`.
    simplify_tolerance_px, min_area_px, connectivity, smooth
        Passed to :func:`labeler.masks.polygons.mask_to_polygons` (``smooth=True`` cuts
        staircase corners before simplifying: fewer vertices, not pixel-exact).
    progress : callable(done, total) or None
        Called after each strip of the mask with the rows outlined and the height.

    Returns
    -------
    ImageFeatures
        The regions and the maker of their features.

    Raises
    ------
    labeler.errors.InputError
        The image has no georeferencing and ``pixel_coordinates`` is False.
    ValueError
        Bad mask, classes, windows or tiles.
    """
    m = mask
    if isinstance(m, np.ndarray) or not hasattr(m, "shape"):
        m = np.asarray(m)
        schema.check_mask(m, name="mask")
    shape = (int(m.shape[0]), int(m.shape[1]))
    if not isinstance(image, str) or not image:
        raise ValueError(f"image: expected a non-empty image name, got {image!r}")
    if source not in _SOURCES:
        raise ValueError(f"source: expected 'annotation' or 'proposal', got {source!r}")
    _check_windows(windows, tiles, shape)
    if classes is None:
        wanted = [c.index for c in schema.classes if c.index != 0]
    else:
        wanted = [int(c) for c in classes]
        for c in wanted:
            if c == UNLABELLED:
                raise ValueError("classes: 255 means unlabelled and is never exported as a class")
            if c not in schema.indices:
                raise ValueError(
                    f"classes: {c} is not a class index of the schema {schema.indices}"
                )
    georeferenced = transform is not None and crs is not None
    if pixel_coordinates:
        warnings.warn(
            f"image {image!r}: writing pixel coordinates (x = column, y = row); the result is "
            "not RFC 7946 GeoJSON and GIS software will not place it on a map",
            NotRFC7946Warning,
            stacklevel=2,
        )
    elif not georeferenced:
        missing = " and ".join(n for n, v in (("transform", transform), ("crs", crs)) if v is None)
        raise InputError(
            f"image {image!r}: no georeferencing ({missing} missing), so RFC 7946 GeoJSON "
            "cannot be written; add a world file or GeoTIFF tags, export PNG masks instead, "
            "or pass pixel_coordinates=True for a pixel-coordinate file (not RFC 7946)"
        )

    layout = TileLayout(windows, shape=shape) if windows else None
    regions = outline_strips(
        m,
        class_indices=wanted,
        owner=None if layout is None else layout.owner,
        simplify_tolerance_px=simplify_tolerance_px,
        min_area_px=min_area_px,
        connectivity=connectivity,
        smooth=smooth,
        check=None
        if isinstance(m, np.ndarray)
        else lambda part, w: schema.check_mask(part, name=f"mask rows {w.row}..{w.row + w.height}"),
        progress=progress,
    )

    if pixel_coordinates:
        decimals = coordinate_decimals(None, pixel=True)
        src = centre = None
    else:
        src = as_crs(crs)
        decimals = coordinate_decimals(ground_sampling_distance(transform, src, shape=shape))
        centre = None
        if not src.is_projected:  # areas in a local equal-area projection at the centre
            centre = reprojector(src, WGS84)(
                affine_mapper(transform)(np.array([[shape[1] / 2.0, shape[0] / 2.0]]))
            )[0]
    names = {c.index: c.name for c in schema.classes}
    tile_props: dict[tuple[int, ...], dict] = {}  # the same tile set recurs: build once

    def make(batch: Sequence[OutlinedRegion]) -> list[dict]:
        geoms = shapely.from_wkb(np.asarray([r.wkb for r in batch], dtype=object))
        area_m2: np.ndarray | None = None
        if src is None:
            out_geoms = geoms
        else:
            mapped = shapely.transform(geoms, affine_mapper(transform))
            out_geoms = shapely.transform(mapped, reprojector(src, WGS84))
            if centre is None:
                unit = float(src.linear_units_factor[1])
                area_m2 = shapely.area(mapped) * unit * unit
            else:
                local = shapely.transform(out_geoms, reprojector(WGS84, local_equal_area(*centre)))
                area_m2 = shapely.area(local)
        geometries, boxes = encode_geometries(out_geoms, decimals=decimals, orient=True)
        features = []
        for k, region in enumerate(batch):
            touched = tuple(i for i in region.owners if i >= 0)
            props = tile_props.get(touched)
            if props is None:
                props = tile_props[touched] = _tile_properties(
                    [tiles[i] for i in touched] if tiles is not None else [], source
                )
            name = names[region.class_index]
            features.append(
                {
                    "type": "Feature",
                    "id": f"{image}:{name}:{region.label}",
                    "bbox": boxes[k].tolist(),
                    "geometry": geometries[k],
                    "properties": {
                        "layer": "classes",
                        "class": name,
                        "class_index": region.class_index,
                        "image": image,
                        "tiles": list(props["tiles"]),
                        "annotators": list(props["annotators"]),
                        "states": list(props["states"]),
                        "model_version": (
                            list(props["model_version"])
                            if isinstance(props["model_version"], list)
                            else props["model_version"]
                        ),
                        "source": props["source"],
                        "area_m2": None if area_m2 is None else float(f"{area_m2[k]:.12g}"),
                        "area_px": region.area_px,
                    },
                }
            )
        return features

    return ImageFeatures(regions=regions, pixel_coordinates=pixel_coordinates, make=make)


def image_feature_collection(mask, **options) -> dict:
    """One image's class mask as a GeoJSON FeatureCollection (see module docstring).

    Takes the arguments of :func:`image_features` and holds every feature at once; for
    a big image write the batches of :func:`image_features` to a
    :class:`~labeler.export.geojson_stream.FeatureCollectionWriter` instead.

    Returns
    -------
    collection : dict
        A FeatureCollection with ``bbox`` (absent when there is no feature).
    """
    made = image_features(mask, **options)
    features = [f for batch in made.batches() for f in batch]
    collection: dict = {"type": "FeatureCollection"}
    if made.pixel_coordinates:
        collection[COORDINATES_MEMBER] = "pixel"
    box = _collection_bbox(features)
    if box is not None:
        collection["bbox"] = box
    collection["features"] = features
    return collection


def merge_feature_collections(collections: Iterable[Mapping]) -> dict:
    """One FeatureCollection holding the features of several (e.g. per image).

    Raises
    ------
    ValueError
        When a feature ``id`` occurs twice, or pixel-coordinate collections are mixed
        with longitude/latitude ones.
    """
    features: list = []
    modes: set[str] = set()
    seen: set = set()
    for k, col in enumerate(collections):
        if not isinstance(col, Mapping) or col.get("type") != "FeatureCollection":
            raise ValueError(f"collections[{k}]: expected a FeatureCollection dict")
        modes.add(str(col.get(COORDINATES_MEMBER, "lonlat")))
        for f in col.get("features", []):
            fid = f.get("id")
            if fid is not None:
                if fid in seen:
                    raise ValueError(
                        f"collections[{k}]: feature id {fid!r} occurs twice; give each image "
                        "a distinct name"
                    )
                seen.add(fid)
            features.append(f)
    if len(modes) > 1:
        raise ValueError(
            "collections: cannot merge pixel-coordinate collections with longitude/latitude "
            "ones; export the images without georeferencing separately"
        )
    out: dict = {"type": "FeatureCollection"}
    if modes == {"pixel"}:
        out[COORDINATES_MEMBER] = "pixel"
    box = _collection_bbox(features)
    if box is not None:
        out["bbox"] = box
    out["features"] = features
    return out


# -- files ---------------------------------------------------------------------------


def write_geojson(path: str | os.PathLike[str], collection: Mapping) -> Path:
    """Write a FeatureCollection (or Feature) as UTF-8 JSON, atomically.

    Raises
    ------
    ValueError
        When ``collection`` is not a GeoJSON object or holds NaN/infinite numbers.
    """
    if not isinstance(collection, Mapping) or collection.get("type") not in (
        "FeatureCollection", "Feature"
    ):
        raise ValueError("collection: expected a GeoJSON FeatureCollection or Feature dict")
    try:
        text = json.dumps(collection, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    except ValueError as err:
        raise ValueError(f"collection: cannot be written as JSON ({err})") from None
    return atomic_write_bytes(path, (text + "\n").encode("utf-8"))


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not a JSON number")


def read_geojson(path: str | os.PathLike[str]) -> dict:
    """Read a GeoJSON file into a dict (JSON syntax and a top-level ``type`` checked).

    Raises
    ------
    OSError
        When the file cannot be read.
    ValueError
        Naming the file: not UTF-8, not JSON, NaN/Infinity, or no GeoJSON ``type``.
    """
    p = Path(path)
    data = p.read_bytes()
    try:
        obj = json.loads(data.decode("utf-8-sig"), parse_constant=_reject_constant)
    except UnicodeDecodeError:
        raise ValueError(f"{p}: not UTF-8 text (RFC 7946 section 1: GeoJSON is UTF-8)") from None
    except ValueError as err:
        raise ValueError(f"{p}: not valid JSON ({err})") from None
    if not isinstance(obj, dict) or not isinstance(obj.get("type"), str):
        raise ValueError(f"{p}: not a GeoJSON object (no top-level 'type' member)")
    return obj
