"""Class masks to polygons and polygons back to class masks (pure: arrays in, arrays out).

Coordinates
-----------
Polygons live in continuous pixel space with ``x = column`` and ``y = row`` of pixel
CORNERS: pixel ``(r, c)`` is the unit square ``[c, c + 1] x [r, r + 1]``. This is the
pixel-corner convention of rasterio and GDAL, so an ``affine.Affine`` image transform maps
these coordinates straight to map coordinates. Inside this module everything else is in
row/column order.

Outlines are exact
------------------
:func:`mask_to_polygons` traces the pixel-edge outline of each connected region, so
before simplification the polygon area equals the region's pixel count exactly and
:func:`polygons_to_mask` gives the region back pixel for pixel. The tracing runs OpenCV's
border following on a doubled grid: grid point ``(2r + 2, 2c + 2)`` is the centre of pixel
``(r, c)``, odd grid points are pixel corners, and each region pixel sets its closed 3 x 3
block. The border of that grid set runs through pixel corners and edge midpoints only;
the one place where the 8-connected border following cuts a corner (a concave corner,
one diagonal grid step) is put back by inserting the corner point, then only the corner
points where the outline turns are kept.

Connectivity and validity
-------------------------
``connectivity=8`` (default) joins pixels that touch only at a corner into one region;
where its pixels meet only at a corner, the region is a :class:`shapely.MultiPolygon` of
its 4-connected parts, which touch at those corner points (valid by the OGC
simple-features rules: parts of a multipolygon may touch at finitely many points). With
``connectivity=4`` such pixels are separate regions, each its own polygon. In both cases
a hole may touch its shell, or another hole, at a single corner point, which is also
valid. An 8-connected region whose traced outline is not a valid polygon (a ring through
a corner twice, or holes whose corner contacts cut the interior apart) is outlined part
by part: the outline of a 4-connected set of pixels has simple rings touching only at
corners and a connected interior, so each part is a valid polygon
(:func:`shapely.make_valid` is only a last resort, keeping the polygonal parts).

Simplification
--------------
Outlines are simplified with the topology-preserving Douglas-Peucker algorithm
(:func:`shapely.simplify` with ``preserve_topology=True``) at ``simplify_tolerance_px``.
A region's area may change by at most ``max_change`` (2 %) of its pixel count; a region
that would change more is retried at half and a quarter of the tolerance and finally kept
exact. Simplification is per region: neighbouring regions of different classes may then
overlap or leave slivers narrower than the tolerance between them.

Douglas-Peucker keeps a subset of the pixel corners. At 0.5 px it removes corners that
lie almost on a straight edge but keeps most of a staircase (the inner corners of a
regular staircase lie at least 0.7 px from the line through its outer corners), so the
outline still covers the same pixel centres in practice: the default is faithful, not
smooth (about 20 % fewer vertices than the exact outline on plant-like blobs).

``smooth=True`` first cuts every corner by half a pixel along both of its edges. The cut
triangles hold no pixel centre, so the cut outline still covers exactly the region's
pixel centres, and staircases become straight lines through edge midpoints that
Douglas-Peucker can then drop. Every pixel centre lies at least ``sqrt(2) / 4`` (0.354)
px from the cut outline, so with a tolerance below that the outline stays pixel-exact in
practice; at 0.5 px it has about a third of the vertices of the exact outline and may move
a pixel here and there (intersection over union about 0.99 for plants of a few hundred
pixels). Pass ``simplify_tolerance_px=0`` for the exact, lossless outline.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import cv2
import numpy as np
import shapely
from rasterio.features import rasterize

from labeler.imagery.tiling import Window

__all__ = ["Region", "mask_to_polygons", "polygons_to_mask", "outline_region"]

Geometry = shapely.Polygon | shapely.MultiPolygon

_BLOCK = np.ones((3, 3), np.uint8)


@dataclass(frozen=True, eq=False)
class Region:
    """One connected region of one class and its outline.

    Attributes
    ----------
    geometry : shapely.Polygon or shapely.MultiPolygon
        Outline in pixel-corner coordinates (x = column, y = row); a MultiPolygon only
        for an 8-connected region whose pixels touch at corners.
    class_index : int
        Mask value of the region.
    label : int
        Region number within its class: 1..n over the regions kept (specks dropped), in
        raster-scan order of each region's first pixel (top row, then leftmost).
    area_px : int
        Number of pixels of the region (the exact, unsimplified area).
    window : Window
        Bounding box of the region in row/column order.
    pixels : ndarray, shape (window.height, window.width), bool
        The region's pixels inside ``window``.
    """

    geometry: Geometry
    class_index: int
    label: int
    area_px: int
    window: Window
    pixels: np.ndarray


def _check_mask(mask: np.ndarray, name: str = "mask") -> np.ndarray:
    m = np.asarray(mask)
    if m.ndim != 2 or m.dtype != np.uint8:
        raise ValueError(
            f"{name}: expected a 2-D uint8 class-index array (H, W), got shape {m.shape} "
            f"dtype {m.dtype}; convert with mask.astype(np.uint8)"
        )
    return m


def _grid_contours(pixels: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
    """OpenCV border following of one region on the doubled grid (see module docstring).

    Returns the contours (each (n, 2) int32 grid x, y) and the parent of each contour
    (-1 for an outer border, else the index of the outer border a hole belongs to).
    """
    h, w = pixels.shape
    grid = np.zeros((2 * h + 3, 2 * w + 3), np.uint8)
    grid[2 : 2 * h + 2 : 2, 2 : 2 * w + 2 : 2] = pixels
    grid = cv2.dilate(grid, _BLOCK)
    contours, hierarchy = cv2.findContours(grid, cv2.RETR_CCOMP, cv2.CHAIN_APPROX_NONE)
    return list(contours), hierarchy.reshape(-1, 4)[:, 3]


def _rings_from_contours(
    points: np.ndarray, ring_of_point: np.ndarray, n_rings: int
) -> tuple[np.ndarray, np.ndarray]:
    """Turn traced grid borders into pixel-corner rings, for all rings at once.

    Parameters
    ----------
    points : ndarray, shape (N, 2), int64
        Grid points (x, y) of all contours, one contour after the other; consecutive
        points of a contour are 4- or 8-neighbours, the last joins the first.
    ring_of_point : ndarray, shape (N,), int64
        Contour number of each point, non-decreasing, every number in 0..n_rings-1 used.

    Returns
    -------
    corners : ndarray, shape (M, 2), int64
        Grid points (both coordinates odd) where the outline turns, ring after ring.
    ring_of_corner : ndarray, shape (M,), int64
    """
    n = len(points)
    starts = np.searchsorted(ring_of_point, np.arange(n_rings))
    ends = np.append(starts[1:], n)
    nxt_index = np.arange(1, n + 1)
    nxt_index[ends - 1] = starts
    nxt = points[nxt_index]
    step = nxt - points
    diagonal = (step[:, 0] != 0) & (step[:, 1] != 0)
    if diagonal.any():
        # a diagonal step cuts a concave corner: put back the corner (both coords odd)
        cand_a = np.column_stack([nxt[:, 0], points[:, 1]])
        cand_b = np.column_stack([points[:, 0], nxt[:, 1]])
        use_a = ((cand_a[:, 0] & 1) & (cand_a[:, 1] & 1)).astype(bool)
        inserted = np.where(use_a[:, None], cand_a, cand_b)[diagonal]
        shift = np.concatenate([[0], np.cumsum(diagonal)[:-1]])
        pos = np.arange(n) + shift
        full = np.empty((n + len(inserted), 2), np.int64)
        rings = np.empty(n + len(inserted), np.int64)
        full[pos] = points
        rings[pos] = ring_of_point
        full[pos[diagonal] + 1] = inserted
        rings[pos[diagonal] + 1] = ring_of_point[diagonal]
        points, ring_of_point = full, rings
    corner = ((points[:, 0] & 1) & (points[:, 1] & 1)).astype(bool)
    points, ring_of_point = points[corner], ring_of_point[corner]
    m = len(points)
    starts = np.searchsorted(ring_of_point, np.arange(n_rings))
    ends = np.append(starts[1:], m)
    nxt_index = np.arange(1, m + 1)
    nxt_index[ends - 1] = starts
    prev_index = np.arange(-1, m - 1)
    prev_index[starts] = ends - 1
    d_in = points - points[prev_index]
    d_out = points[nxt_index] - points
    turn = d_in[:, 0] * d_out[:, 1] - d_in[:, 1] * d_out[:, 0] != 0
    return points[turn], ring_of_point[turn]


def _corner_cuts(coords: np.ndarray, ring_of_corner: np.ndarray, n_rings: int) -> np.ndarray:
    """Cut every corner of rectilinear rings by half a pixel along both of its edges.

    Each corner ``v`` (previous corner ``p``, next ``n``) becomes the two points
    ``v + 0.5 * unit(p - v)`` and ``v + 0.5 * unit(n - v)``. The cut triangles (legs of
    0.5 px) hold no pixel centre, so the cut outline covers exactly the same pixel
    centres as the pixel-edge outline; staircases become lines through edge midpoints.
    """
    m = len(coords)
    starts = np.searchsorted(ring_of_corner, np.arange(n_rings))
    ends = np.append(starts[1:], m)
    nxt = np.arange(1, m + 1)
    nxt[ends - 1] = starts
    prv = np.arange(-1, m - 1)
    prv[starts] = ends - 1
    before = coords + 0.5 * np.sign(coords[prv] - coords)
    after = coords + 0.5 * np.sign(coords[nxt] - coords)
    out = np.empty((2 * m, 2), np.float64)
    out[0::2] = before
    out[1::2] = after
    return out


def _assemble(polys: np.ndarray, polygon_region: np.ndarray, n_regions: int) -> np.ndarray:
    """One geometry per region from polygons listed region by region."""
    out = np.empty(n_regions, dtype=object)
    per_region = np.bincount(polygon_region, minlength=n_regions)
    first = np.searchsorted(polygon_region, np.arange(n_regions))
    single = per_region == 1
    out[single] = polys[first[single]]
    for j in np.flatnonzero(~single):
        out[j] = shapely.MultiPolygon(list(polys[first[j] : first[j] + per_region[j]]))
    return out


def _split_at_corners(r0: int, c0: int, pixels: np.ndarray) -> Geometry:
    """Outline of a region whose pixels meet at corners, as its 4-connected parts.

    The outline of a 4-connected set traced on the doubled grid has simple rings that
    touch one another at corner points only, and a connected interior: a valid polygon.
    The parts of an 8-connected region touch at corner points: a valid multipolygon.
    """
    n, labels, stats, _ = cv2.connectedComponentsWithStats(
        pixels.astype(np.uint8), connectivity=4, ltype=cv2.CV_32S
    )
    parts = []
    for k in range(1, n):
        c, r, w, h = (int(v) for v in stats[k, :4])
        parts.append((r0 + r, c0 + c, labels[r : r + h, c : c + w] == k))
    geoms, _ = _trace_regions(parts, split=False)
    polys: list[shapely.Polygon] = []
    for g in geoms:
        polys.extend(shapely.get_parts(g))
    return polys[0] if len(polys) == 1 else shapely.MultiPolygon(polys)


def _trace_regions(
    crops: Sequence[tuple[int, int, np.ndarray]], *, cut: bool = False, split: bool = True
) -> tuple[np.ndarray, np.ndarray | None]:
    """Outlines of regions given as ``(row0, col0, pixels)`` crops.

    Returns
    -------
    exact : object ndarray of Polygon/MultiPolygon, one per crop
        Pixel-edge outlines in image pixel-corner coordinates (area = pixel count).
    cut : object ndarray or None
        With ``cut``, the half-pixel corner-cut outlines (:func:`_corner_cuts`), the
        starting point of simplification; None entries where the cut outline is invalid.
    """
    n_regions = len(crops)
    if not crops:
        empty = np.empty(0, dtype=object)
        return empty, (empty.copy() if cut else None)
    pts: list[np.ndarray] = []
    ring_len: list[int] = []
    ring_offset: list[tuple[int, int]] = []
    ring_polygon: list[int] = []
    polygon_region: list[int] = []
    for j, (r0, c0, crop) in enumerate(crops):
        contours, parent = _grid_contours(crop)
        if len(contours) == 1:  # the common case: one outline, no hole
            polygon_region.append(j)
            pts.append(contours[0].reshape(-1, 2))
            ring_len.append(len(contours[0]))
            ring_offset.append((c0, r0))
            ring_polygon.append(len(polygon_region) - 1)
            continue
        for k in np.flatnonzero(parent < 0):
            poly = len(polygon_region)
            polygon_region.append(j)
            for q in (k, *np.flatnonzero(parent == k)):
                c = contours[q]
                pts.append(c.reshape(-1, 2))
                ring_len.append(len(c))
                ring_offset.append((c0, r0))
                ring_polygon.append(poly)
    n_rings = len(ring_len)
    ring_polygon_arr = np.asarray(ring_polygon)
    polygon_region_arr = np.asarray(polygon_region)
    points = np.concatenate(pts).astype(np.int64)
    ring_of_point = np.repeat(np.arange(n_rings), ring_len)
    corners, ring_of_corner = _rings_from_contours(points, ring_of_point, n_rings)
    offsets = np.asarray(ring_offset, np.float64)[ring_of_corner]
    coords = (corners - 1) / 2.0 + offsets
    polys = shapely.polygons(
        shapely.linearrings(coords, indices=ring_of_corner), indices=ring_polygon_arr
    )
    # Rings that meet at a corner (pixels touching only at a corner) may make an invalid
    # polygon: a ring visiting a vertex twice, or holes whose corner contacts cut off part
    # of the interior. Only polygons with a vertex used twice are checked.
    poly_of_corner = ring_polygon_arr[ring_of_corner]
    span_x = int(corners[:, 0].max()) + 1
    span_y = int(corners[:, 1].max()) + 1
    if len(polys) * span_x * span_y < 2**62:
        key = (poly_of_corner * span_y + corners[:, 1]) * span_x + corners[:, 0]
        uniq, counts = np.unique(key, return_counts=True)
        suspects = np.unique(uniq[counts > 1] // (span_x * span_y))
    else:  # huge crops and many polygons: slower row-wise unique
        rows = np.column_stack([poly_of_corner, corners])
        uniq, counts = np.unique(rows, axis=0, return_counts=True)
        suspects = np.unique(uniq[counts > 1, 0])
    bad = suspects[~shapely.is_valid(polys[suspects])]
    exact = _assemble(polys, polygon_region_arr, n_regions)
    for j in np.unique(polygon_region_arr[bad]):
        r0, c0, crop = crops[j]
        exact[j] = _split_at_corners(r0, c0, crop) if split else _polygonal(
            shapely.make_valid(exact[j])
        )
    if not cut:
        return exact, None
    cut_polys = shapely.polygons(
        shapely.linearrings(
            _corner_cuts(coords, ring_of_corner, n_rings), indices=np.repeat(ring_of_corner, 2)
        ),
        indices=ring_polygon_arr,
    )
    # cutting separates corner contacts; check the polygons that had them
    cut_bad = suspects[~shapely.is_valid(cut_polys[suspects])]
    cut_geoms = _assemble(cut_polys, polygon_region_arr, n_regions)
    cut_geoms[np.unique(polygon_region_arr[cut_bad])] = None
    return exact, cut_geoms


def outline_region(pixels: np.ndarray) -> Geometry:
    """Exact pixel-edge outline of one connected set of pixels.

    Parameters
    ----------
    pixels : ndarray, shape (h, w), bool
        The pixels of ONE region (8- or 4-connected), e.g. a bounding-box crop.

    Returns
    -------
    geometry : shapely.Polygon or shapely.MultiPolygon
        In pixel-corner coordinates of the crop (x = column, y = row); its area is
        ``pixels.sum()``. Empty polygon when ``pixels`` has no True value.
    """
    p = np.asarray(pixels)
    if p.ndim != 2:
        raise ValueError(f"pixels: expected a 2-D boolean array, got shape {p.shape}")
    p = p.astype(bool)
    if not p.any():
        return shapely.Polygon()
    return _trace_regions([(0, 0, p)])[0][0]


def _polygonal(geom: shapely.Geometry) -> Geometry:
    """The polygonal parts of a geometry (make_valid may add lines or points)."""
    if isinstance(geom, shapely.Polygon | shapely.MultiPolygon):
        return geom
    parts = [
        g for g in shapely.get_parts(geom) if isinstance(g, shapely.Polygon | shapely.MultiPolygon)
    ]
    polys: list[shapely.Polygon] = []
    for g in parts:
        polys.extend(shapely.get_parts(g) if isinstance(g, shapely.MultiPolygon) else [g])
    if not polys:
        return shapely.Polygon()
    return polys[0] if len(polys) == 1 else shapely.MultiPolygon(polys)


#: Multipolygons with more parts are simplified part by part (joint topology-preserving
#: simplification grows faster than linearly with the number of parts).
_JOINT_PARTS = 8


def _simplify_geometries(geoms: np.ndarray, tolerance: float) -> np.ndarray:
    """Topology-preserving Douglas-Peucker; many-part multipolygons part by part.

    A multipolygon simplified part by part is kept only if the parts still form a valid
    multipolygon; otherwise it is returned unchanged.
    """
    many = shapely.get_num_geometries(geoms) > _JOINT_PARTS
    out = np.empty(len(geoms), dtype=object)
    out[~many] = shapely.simplify(geoms[~many], tolerance, preserve_topology=True)
    for j in np.flatnonzero(many):
        parts = shapely.simplify(shapely.get_parts(geoms[j]), tolerance, preserve_topology=True)
        joined = shapely.MultiPolygon(list(parts))
        out[j] = joined if shapely.is_valid(joined) else geoms[j]
    return out


def _simplify(
    exact: np.ndarray,
    base: np.ndarray,
    areas: np.ndarray,
    *,
    tolerance: float,
    max_change: float,
) -> np.ndarray:
    """Topology-preserving Douglas-Peucker of ``base`` outlines within the area budget.

    ``base`` is ``exact`` or the corner-cut outlines (None where unusable); regions that
    fail the budget at every tolerance keep their ``exact`` outline.
    """
    out = exact.copy()
    todo = np.flatnonzero(np.asarray([g is not None for g in base], bool))
    for tol in (tolerance, tolerance / 2.0, tolerance / 4.0):
        if len(todo) == 0:
            break
        simple = _simplify_geometries(base[todo], tol)
        change = np.abs(shapely.area(simple) - areas[todo])
        ok = (change <= max_change * areas[todo]) & ~shapely.is_empty(simple)
        out[todo[ok]] = simple[ok]
        todo = todo[~ok]
    return out  # regions still in ``todo`` keep their exact outline


def mask_to_polygons(
    mask: np.ndarray,
    *,
    class_index: int,
    simplify_tolerance_px: float = 0.5,
    min_area_px: float = 8,
    connectivity: int = 8,
    max_change: float = 0.02,
    smooth: bool = False,
) -> list[Region]:
    """Outline every connected region of one class.

    Parameters
    ----------
    mask : ndarray, shape (H, W), uint8
        Class-index mask (255 = unlabelled is just another value here).
    class_index : int
        The class to outline, 0..255.
    simplify_tolerance_px : float
        Douglas-Peucker tolerance in pixels; 0 keeps the exact pixel-edge outline.
    min_area_px : float
        Regions with fewer pixels are dropped (specks).
    connectivity : {8, 4}
        Pixel neighbourhood that makes a region (see module docstring).
    max_change : float
        Largest relative change of a region's area that simplification may cause
        (0.02 = 2 %).
    smooth : bool
        Cut every outline corner by half a pixel before simplifying (see the module
        docstring): far fewer vertices, no longer pixel-exact above 0.35 px.

    Returns
    -------
    regions : list of Region
        In label order (raster scan of each region's first pixel). Empty when the class
        is absent or every region is a speck.
    """
    m = _check_mask(mask)
    if not isinstance(class_index, int | np.integer) or not 0 <= int(class_index) <= 255:
        raise ValueError(f"class_index: expected an integer 0..255, got {class_index!r}")
    if connectivity not in (4, 8):
        raise ValueError(f"connectivity: expected 4 or 8, got {connectivity!r}")
    if simplify_tolerance_px < 0:
        raise ValueError(
            f"simplify_tolerance_px: expected >= 0 pixels, got {simplify_tolerance_px}; "
            "use 0 for exact outlines"
        )
    if not 0 <= max_change <= 1:
        raise ValueError(f"max_change: expected a share in [0, 1], got {max_change}")
    if m.size == 0:
        return []
    binary = (m == class_index).astype(np.uint8)
    if not binary.any():
        return []
    n, labels, stats, _ = cv2.connectedComponentsWithStats(
        binary, connectivity=connectivity, ltype=cv2.CV_32S
    )
    keep = np.flatnonzero(stats[1:, cv2.CC_STAT_AREA] >= min_area_px) + 1
    windows: list[Window] = []
    crops: list[np.ndarray] = []
    first_pixel: list[int] = []
    for k in keep:
        c0, r0, w, h = (int(v) for v in stats[k, :4])
        crop = labels[r0 : r0 + h, c0 : c0 + w] == k
        crops.append(crop)
        windows.append(Window(r0, c0, h, w))
        first_pixel.append(r0 * m.shape[1] + c0 + int(np.argmax(crop[0])))
    # number the regions in raster-scan order of their first pixel (the labelling's own
    # numbers depend on its algorithm)
    order = np.argsort(np.asarray(first_pixel, np.int64), kind="stable")
    keep = keep[order]
    crops = [crops[j] for j in order]
    windows = [windows[j] for j in order]
    tol = float(simplify_tolerance_px)
    exact, cut = _trace_regions(
        [(w.row, w.col, c) for w, c in zip(windows, crops, strict=True)], cut=smooth and tol > 0
    )
    areas = stats[keep, cv2.CC_STAT_AREA].astype(np.float64)
    if tol > 0:
        base = cut if cut is not None else exact
        final = _simplify(exact, base, areas, tolerance=tol, max_change=max_change)
    else:
        final = exact
    return [
        Region(final[j], int(class_index), j + 1, int(areas[j]), windows[j], crops[j])
        for j in range(len(keep))
    ]


def polygons_to_mask(
    polygons_with_classes: Iterable[tuple[Geometry, int] | Region],
    *,
    shape: tuple[int, int],
    fill: int = 255,
) -> np.ndarray:
    """Rasterise polygons into a class-index mask by pixel centres.

    Pixel ``(r, c)`` takes a polygon's class when its centre ``(x, y) = (c + 0.5, r + 0.5)``
    lies inside the polygon (holes excluded). Polygons are drawn in the given order, so a
    later polygon overwrites an earlier one where they overlap. A centre exactly on an
    edge is decided by GDAL's scan-line rule (``rasterio.features.rasterize``); exact
    outlines from :func:`mask_to_polygons` never pass through pixel centres.

    Parameters
    ----------
    polygons_with_classes : iterable of (geometry, class_index) or Region
        Polygons or multipolygons in pixel-corner coordinates (x = column, y = row) and
        their mask value 0..255. Empty geometries are skipped.
    shape : (int, int)
        ``(height, width)`` of the mask.
    fill : int
        Value of pixels no polygon covers: 255 (unlabelled) for a weak label, 0 (soil)
        when the polygons cover everything that is not background.

    Returns
    -------
    mask : ndarray, shape ``shape``, uint8
    """
    if (
        len(shape) != 2
        or not all(isinstance(s, int | np.integer) and s >= 0 for s in shape)
    ):
        raise ValueError(f"shape: expected (height, width) of non-negative ints, got {shape!r}")
    if not isinstance(fill, int | np.integer) or not 0 <= int(fill) <= 255:
        raise ValueError(f"fill: expected an integer 0..255 (255 = unlabelled), got {fill!r}")
    height, width = int(shape[0]), int(shape[1])
    items: list[tuple[Geometry, int]] = []
    for k, item in enumerate(polygons_with_classes):
        geom, value = (item.geometry, item.class_index) if isinstance(item, Region) else item
        if not isinstance(geom, shapely.Polygon | shapely.MultiPolygon):
            raise ValueError(
                f"polygons_with_classes[{k}]: expected a shapely Polygon or MultiPolygon, "
                f"got {type(geom).__name__}"
            )
        if not isinstance(value, int | np.integer) or not 0 <= int(value) <= 255:
            raise ValueError(
                f"polygons_with_classes[{k}]: class index must be an integer 0..255, "
                f"got {value!r}"
            )
        if not geom.is_empty:
            items.append((geom, int(value)))
    out = np.full((height, width), int(fill), np.uint8)
    if not items or height == 0 or width == 0:
        return out
    return rasterize(items, out=out, all_touched=False)
