"""The "looked at" layer of an export: the outline of every saved tile, with its state.

Class polygons alone cannot tell "no weed here" from "nobody looked here": a tile an
annotator saved as bare soil exports no polygon at all. So the export also writes,
for every tile whose saved mask it holds (soil-only tiles included), one Feature whose
geometry is the tile's rectangle and whose properties are::

    {"layer": "looked_at", "image": ..., "tile": ..., "state": ..., "annotator": ...}

Inside a ``looked_at`` polygon every pixel was labelled: the pixels no class polygon
covers are soil. Class features carry ``"layer": "classes"``, so a GIS can show the two
as separate layers by filtering on ``layer``. The import reads the footprints back
(:mod:`labeler.export.geojson_import`): their pixels are soil unless a class polygon
covers them, so a round trip gives back full tiles.

The rectangle's corners go through the same transform, reprojection, orientation and
rounding as the class polygons (:mod:`labeler.export.geojson`); tiles of proposals
nobody reviewed get no footprint.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import shapely
from affine import Affine
from rasterio.crs import CRS

from labeler.export.crs import (
    WGS84,
    affine_mapper,
    as_crs,
    coordinate_decimals,
    ground_sampling_distance,
    reprojector,
)
from labeler.export.geojson import TileInfo
from labeler.export.geometry import encode_geometries
from labeler.imagery.tiling import Window

__all__ = ["LAYER", "FOOTPRINT_LAYER", "CLASS_LAYER", "footprint_features", "is_footprint"]

#: Feature property naming the layer a feature belongs to.
LAYER = "layer"
#: ``layer`` of a saved tile's outline, and of a class region.
FOOTPRINT_LAYER, CLASS_LAYER = "looked_at", "classes"


def is_footprint(properties: object) -> bool:
    """Whether a feature's properties mark it as a ``looked_at`` outline."""
    return isinstance(properties, dict) and properties.get(LAYER) == FOOTPRINT_LAYER


def footprint_features(
    windows: Sequence[Window],
    tiles: Sequence[TileInfo],
    *,
    image: str,
    shape: tuple[int, int],
    transform: Affine | None = None,
    crs: CRS | str | None = None,
    pixel_coordinates: bool = False,
) -> list[dict]:
    """One ``looked_at`` Feature per tile with a saved mask (see the module docstring).

    Parameters
    ----------
    windows : sequence of Window
        The exported tiles' windows.
    tiles : sequence of TileInfo
        One per window; tiles whose ``source`` is ``"proposal"`` are skipped.
    image : str
        Image name (the ``image`` property and the feature ``id``).
    shape : (int, int)
        ``(height, width)`` of the image (for the coordinate rounding).
    transform, crs
        The image's georeferencing; unused with ``pixel_coordinates``.
    pixel_coordinates : bool
        Write pixel corners (x = column, y = row) instead of longitude/latitude.

    Returns
    -------
    list of dict
        GeoJSON Features with ``bbox``, in the order of ``tiles``.
    """
    if len(windows) != len(tiles):
        raise ValueError(
            f"tiles: expected one TileInfo per window ({len(windows)}), got {len(tiles)}"
        )
    kept = [(w, t) for w, t in zip(windows, tiles, strict=True) if t.source == "annotation"]
    if not kept:
        return []
    boxes = np.array(
        [[w.col, w.row, w.col + w.width, w.row + w.height] for w, _ in kept], np.float64
    )
    geoms = shapely.box(boxes[:, 0], boxes[:, 1], boxes[:, 2], boxes[:, 3])
    if pixel_coordinates:
        decimals = coordinate_decimals(None, pixel=True)
    else:
        if transform is None or crs is None:
            raise ValueError(
                f"image {image!r}: no georeferencing; pass pixel_coordinates=True for a "
                "pixel-coordinate file"
            )
        src = as_crs(crs)
        decimals = coordinate_decimals(ground_sampling_distance(transform, src, shape=shape))
        geoms = shapely.transform(
            shapely.transform(geoms, affine_mapper(transform)), reprojector(src, WGS84)
        )
    geometries, bbox = encode_geometries(geoms, decimals=decimals, orient=True)
    return [
        {
            "type": "Feature",
            "id": f"{image}:{FOOTPRINT_LAYER}:{t.tile_id}",
            "bbox": bbox[k].tolist(),
            "geometry": geometries[k],
            "properties": {
                LAYER: FOOTPRINT_LAYER,
                "image": image,
                "tile": t.tile_id,
                "state": t.state,
                "annotator": t.annotator,
            },
        }
        for k, (_, t) in enumerate(kept)
    ]
