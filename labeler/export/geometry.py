"""Polygons to GeoJSON geometry objects and back (RFC 7946 section 3.1).

Writing is vectorised over many geometries at once (:func:`encode_geometries`); reading
checks the structure the RFC asks for and names the place of the first problem.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import shapely

__all__ = ["encode_geometries", "geometry_to_geojson", "geometry_from_geojson"]


def encode_geometries(
    geoms: np.ndarray, *, decimals: int | None, orient: bool
) -> tuple[list[dict], np.ndarray]:
    """GeoJSON geometry objects and bboxes of many polygons/multipolygons at once.

    Parameters
    ----------
    geoms : ndarray of shapely.Polygon or shapely.MultiPolygon, shape (n,)
        Non-empty geometries, in the coordinates the file will hold.
    decimals : int or None
        Round positions to this many decimals (None keeps full precision).
    orient : bool
        Orient rings by RFC 7946 section 3.1.6 first (exterior counterclockwise).

    Returns
    -------
    geometries : list of dict
        ``{"type": "Polygon" | "MultiPolygon", "coordinates": [...]}`` per geometry.
    bbox : ndarray, shape (n, 4)
        ``[west, south, east, north]`` of the written (rounded) positions.
    """
    n = len(geoms)
    if n == 0:
        return [], np.zeros((0, 4))
    if orient:
        geoms = shapely.orient_polygons(geoms, exterior_cw=False)
    types = shapely.get_type_id(geoms)
    parts, part_geom = shapely.get_parts(geoms, return_index=True)
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    coords, coord_ring = shapely.get_coordinates(rings, return_index=True)
    if decimals is not None:
        coords = np.round(coords, decimals) + 0.0  # + 0.0 turns -0.0 into 0.0
    coord_geom = part_geom[ring_part[coord_ring]]
    geom_start = np.searchsorted(coord_geom, np.arange(n))
    lo = np.minimum.reduceat(coords, geom_start, axis=0)
    hi = np.maximum.reduceat(coords, geom_start, axis=0)
    bbox = np.column_stack([lo, hi])
    positions = coords.tolist()
    ring_bounds = np.searchsorted(coord_ring, np.arange(len(rings) + 1)).tolist()
    ring_lists = [positions[a:b] for a, b in zip(ring_bounds[:-1], ring_bounds[1:], strict=True)]
    part_bounds = np.searchsorted(ring_part, np.arange(len(parts) + 1)).tolist()
    part_lists = [
        ring_lists[a:b] for a, b in zip(part_bounds[:-1], part_bounds[1:], strict=True)
    ]
    geom_bounds = np.searchsorted(part_geom, np.arange(n + 1)).tolist()
    out = []
    for k in range(n):
        a, b = geom_bounds[k], geom_bounds[k + 1]
        if types[k] == 3:  # Polygon
            out.append({"type": "Polygon", "coordinates": part_lists[a]})
        else:
            out.append({"type": "MultiPolygon", "coordinates": part_lists[a:b]})
    return out, bbox


def geometry_to_geojson(
    geometry: shapely.Polygon | shapely.MultiPolygon,
    *,
    decimals: int | None = None,
    orient: bool = True,
) -> dict:
    """GeoJSON geometry object of a polygon or multipolygon.

    Parameters
    ----------
    geometry : shapely.Polygon or shapely.MultiPolygon
        Non-empty; in the coordinates the file will hold.
    decimals : int or None
        Round positions to this many decimals (None keeps full precision).
    orient : bool
        Orient rings by RFC 7946 section 3.1.6 (exterior counterclockwise, holes
        clockwise) in the given coordinates first.

    Returns
    -------
    geometry : dict
        ``{"type": "Polygon" | "MultiPolygon", "coordinates": [...]}``, closed rings.
    """
    if not isinstance(geometry, shapely.Polygon | shapely.MultiPolygon) or geometry.is_empty:
        raise ValueError(
            f"geometry: expected a non-empty Polygon or MultiPolygon, got {geometry.geom_type}"
        )
    arr = np.empty(1, dtype=object)
    arr[0] = geometry
    return encode_geometries(arr, decimals=decimals, orient=orient)[0][0]


def _ring_from_positions(positions: object, where: str) -> np.ndarray:
    if not isinstance(positions, list):
        raise ValueError(f"{where}: expected a list of positions, got {type(positions).__name__}")
    if len(positions) < 4:
        raise ValueError(
            f"{where}: a linear ring needs at least 4 positions (RFC 7946 section 3.1.6), "
            f"got {len(positions)}"
        )
    rows = []
    for k, p in enumerate(positions):
        if (
            not isinstance(p, list)
            or len(p) < 2
            or not all(isinstance(v, int | float) and not isinstance(v, bool) for v in p)
        ):
            raise ValueError(f"{where}, position {k}: expected [x, y] numbers, got {p!r}")
        rows.append((float(p[0]), float(p[1])))
    xy = np.asarray(rows, np.float64)
    if not np.isfinite(xy).all():
        raise ValueError(f"{where}: positions must be finite numbers")
    if not np.array_equal(xy[0], xy[-1]):
        raise ValueError(
            f"{where}: ring is not closed, first position {positions[0]!r} differs from the "
            f"last {positions[-1]!r} (RFC 7946 section 3.1.6)"
        )
    return xy


def _polygon_from_positions(rings: object, where: str) -> shapely.Polygon:
    if not isinstance(rings, list) or not rings:
        raise ValueError(f"{where}: expected a non-empty list of linear rings, got {rings!r}")
    parts = [_ring_from_positions(r, f"{where}, ring {k}") for k, r in enumerate(rings)]
    return shapely.Polygon(parts[0], parts[1:])


def geometry_from_geojson(geometry: object, *, where: str = "geometry") -> shapely.Geometry:
    """Shapely Polygon or MultiPolygon from a GeoJSON geometry object.

    Checks the structure of RFC 7946 section 3.1: a ``type`` of Polygon or MultiPolygon,
    closed rings of at least 4 positions, numeric positions (a third coordinate is
    dropped). Ring orientation is not checked (section 3.1.6: parsers should not reject
    the other order). Validity in the OGC sense is left to the caller
    (:func:`shapely.is_valid_reason`).

    Raises
    ------
    ValueError
        Naming ``where`` and the problem.
    """
    if not isinstance(geometry, Mapping):
        raise ValueError(f"{where}: expected a GeoJSON geometry object, got {geometry!r}")
    kind = geometry.get("type")
    coords = geometry.get("coordinates")
    if kind == "Polygon":
        return _polygon_from_positions(coords, where)
    if kind == "MultiPolygon":
        if not isinstance(coords, list) or not coords:
            raise ValueError(f"{where}: MultiPolygon needs a non-empty list of polygons")
        return shapely.MultiPolygon(
            [_polygon_from_positions(p, f"{where}, polygon {k}") for k, p in enumerate(coords)]
        )
    raise ValueError(
        f"{where}: expected geometry type Polygon or MultiPolygon, got {kind!r}; "
        "masks are areas, so points and lines cannot be read"
    )
