"""Footprints of hand edits: brush strokes, polygons and connected regions (numpy, scipy).

Coordinates are ``(row, col)`` in tile pixel index units: the centre of pixel ``(i, j)`` is
the point ``(i, j)``, so the pixel covers ``[i - 0.5, i + 0.5) x [j - 0.5, j + 0.5)``.
Points may be fractional and may lie outside the tile; footprints are clipped to it.

Each footprint is returned as a :class:`Patch` (a boolean array placed at a tile offset),
so callers touch only the bounding box of an edit; ``*_mask`` helpers give full-size
boolean arrays for convenience.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from labeler.masks.colour_regions import (
    DEFAULT_EDGE_SIGMA,
    DEFAULT_EDGE_THRESHOLD,
    DEFAULT_PLANT_EDGE_THRESHOLD,
    split_regions,
)
from labeler.masks.vegetation import sharpen_split, vegetation_mask

__all__ = [
    "Patch",
    "stroke_patch",
    "stroke_mask",
    "polygon_patch",
    "polygon_mask",
    "region_at",
    "region_bounds",
    "FILL_MAX_SHARE",
]

#: Largest share of the tile a bounded fill may take; a larger region needs an explicit
#: "fill all" (common practice, no source: a click should not repaint most of a tile).
FILL_MAX_SHARE = 0.5

_ON_EDGE = 1e-9


@dataclass(frozen=True)
class Patch:
    """A boolean footprint placed in a tile.

    Parameters
    ----------
    row, col : int
        Tile position of ``mask[0, 0]``.
    mask : ndarray, shape (h, w), bool
        True where the edit applies; ``h`` or ``w`` is 0 for an empty patch.
    """

    row: int
    col: int
    mask: np.ndarray

    @property
    def slices(self) -> tuple[slice, slice]:
        """``(rows, cols)`` slices of the tile that the patch covers."""
        h, w = self.mask.shape
        return slice(self.row, self.row + h), slice(self.col, self.col + w)

    @property
    def empty(self) -> bool:
        """True when no pixel is selected."""
        return not self.mask.any()

    def full(self, shape: tuple[int, int]) -> np.ndarray:
        """The patch as a boolean array of the tile ``shape``."""
        out = np.zeros(shape, bool)
        out[self.slices] = self.mask
        return out


def _empty_patch() -> Patch:
    return Patch(0, 0, np.zeros((0, 0), bool))


def _check_shape(shape: tuple[int, int]) -> tuple[int, int]:
    if len(shape) != 2 or int(shape[0]) < 1 or int(shape[1]) < 1:
        raise ValueError(f"shape: expected (height, width) of at least 1 pixel, got {shape}")
    return int(shape[0]), int(shape[1])


def _as_points(points: Sequence[Sequence[float]] | np.ndarray, name: str) -> np.ndarray:
    p = np.asarray(points, dtype=np.float64)
    if p.ndim == 1 and p.size == 2:
        p = p[None, :]
    if p.ndim != 2 or p.shape[1] != 2 or p.shape[0] < 1:
        raise ValueError(
            f"{name}: expected (row, col) points of shape (n, 2) with n >= 1, got shape "
            f"{p.shape}; pass e.g. [(1, 1), (1, 6)]"
        )
    if not np.isfinite(p).all():
        raise ValueError(f"{name}: expected finite coordinates, got {p.tolist()}")
    return p


def _box(lo_r: float, hi_r: float, lo_c: float, hi_c: float, shape: tuple[int, int]):
    """Integer pixel box ``[r0, r1) x [c0, c1)`` covering centres in the closed float box."""
    r0 = max(int(np.ceil(lo_r - _ON_EDGE)), 0)
    r1 = min(int(np.floor(hi_r + _ON_EDGE)) + 1, shape[0])
    c0 = max(int(np.ceil(lo_c - _ON_EDGE)), 0)
    c1 = min(int(np.floor(hi_c + _ON_EDGE)) + 1, shape[1])
    return r0, r1, c0, c1


def _segment_distance(rr: np.ndarray, cc: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Euclidean distance from points ``(rr, cc)`` to the closed segment ``a``-``b``."""
    d = b - a
    length2 = float(d @ d)
    if length2 == 0.0:
        return np.hypot(rr - a[0], cc - a[1])
    t = ((rr - a[0]) * d[0] + (cc - a[1]) * d[1]) / length2
    t = np.clip(t, 0.0, 1.0)
    return np.hypot(rr - (a[0] + t * d[0]), cc - (a[1] + t * d[1]))


def stroke_patch(
    points: Sequence[Sequence[float]] | np.ndarray,
    *,
    radius: float,
    shape: tuple[int, int],
) -> Patch:
    """Pixels whose centre lies within ``radius`` of a polyline of mouse samples.

    Consecutive samples are joined by straight segments and every pixel within
    ``radius`` of a segment is taken (the union of capsules), so a fast drag whose
    samples lie far apart still leaves a continuous line: there is no gap to
    interpolate. The pixel under each sample is taken too (a dab between pixel centres
    is never empty). With ``radius >= 0.5`` the footprint of one stroke is 8-connected.

    Parameters
    ----------
    points : array_like, shape (n, 2)
        Mouse samples ``(row, col)`` in tile coordinates, ``n >= 1`` (one sample is a dab).
    radius : float
        Brush radius in tile pixels, at least 0.5.
    shape : (int, int)
        ``(height, width)`` of the tile.

    Returns
    -------
    Patch
        Footprint clipped to the tile (empty when the stroke lies wholly outside).

    Examples
    --------
    A stroke of radius 1 from (1, 1) to (1, 6) takes rows 0 and 2 at columns 1..6
    and row 1 at columns 0..7 (20 pixels).
    """
    shape = _check_shape(shape)
    p = _as_points(points, "points")
    if not np.isfinite(radius) or radius < 0.5:
        raise ValueError(f"radius: expected a brush radius of at least 0.5 px, got {radius}")
    r0, r1, c0, c1 = _box(
        p[:, 0].min() - radius, p[:, 0].max() + radius, p[:, 1].min() - radius,
        p[:, 1].max() + radius, shape,
    )
    if r0 >= r1 or c0 >= c1:
        return _empty_patch()
    out = np.zeros((r1 - r0, c1 - c0), bool)
    lim = radius + _ON_EDGE
    segments = [(p[0], p[0])] if len(p) == 1 else list(zip(p[:-1], p[1:], strict=True))
    for a, b in segments:
        # only the box of this segment is examined
        sr0, sr1, sc0, sc1 = _box(
            min(a[0], b[0]) - radius, max(a[0], b[0]) + radius,
            min(a[1], b[1]) - radius, max(a[1], b[1]) + radius, shape,
        )
        if sr0 >= sr1 or sc0 >= sc1:
            continue
        rr = np.arange(sr0, sr1, dtype=np.float64)[:, None]
        cc = np.arange(sc0, sc1, dtype=np.float64)[None, :]
        out[sr0 - r0 : sr1 - r0, sc0 - c0 : sc1 - c0] |= _segment_distance(rr, cc, a, b) <= lim
    # the pixel under each sample is always taken, so a click between centres paints
    under = np.floor(p + 0.5).astype(np.int64)
    keep = (under[:, 0] >= r0) & (under[:, 0] < r1) & (under[:, 1] >= c0) & (under[:, 1] < c1)
    out[under[keep, 0] - r0, under[keep, 1] - c0] = True
    return Patch(r0, c0, out)


def stroke_mask(
    points: Sequence[Sequence[float]] | np.ndarray,
    *,
    radius: float,
    shape: tuple[int, int],
) -> np.ndarray:
    """:func:`stroke_patch` as a full boolean array of ``shape``."""
    return stroke_patch(points, radius=radius, shape=shape).full(_check_shape(shape))


def polygon_patch(
    vertices: Sequence[Sequence[float]] | np.ndarray,
    *,
    shape: tuple[int, int],
) -> Patch:
    """Pixels whose centre lies inside or on a closed polygon.

    The polygon closes itself (last vertex back to the first). Inside is decided by the
    even-odd rule, so a self-crossing outline leaves the doubly wound parts out; centres
    exactly on an edge count as inside (so a square through pixel centres includes its
    border pixels).

    Parameters
    ----------
    vertices : array_like, shape (n, 2)
        ``(row, col)`` vertices in tile coordinates, ``n >= 3``.
    shape : (int, int)
        ``(height, width)`` of the tile.

    Returns
    -------
    Patch
        Footprint clipped to the tile.
    """
    shape = _check_shape(shape)
    v = _as_points(vertices, "vertices")
    if len(v) < 3:
        raise ValueError(
            f"vertices: expected at least 3 vertices to close a polygon, got {len(v)}; "
            "add more points"
        )
    r0, r1, c0, c1 = _box(v[:, 0].min(), v[:, 0].max(), v[:, 1].min(), v[:, 1].max(), shape)
    if r0 >= r1 or c0 >= c1:
        return _empty_patch()
    rr = np.arange(r0, r1, dtype=np.float64)[:, None]
    cc = np.arange(c0, c1, dtype=np.float64)[None, :]
    inside = np.zeros((r1 - r0, c1 - c0), bool)
    on_edge = np.zeros_like(inside)
    for a, b in zip(v, np.roll(v, -1, axis=0), strict=True):
        on_edge |= _segment_distance(rr, cc, a, b) <= _ON_EDGE
        if a[0] == b[0]:
            continue  # a horizontal edge never crosses a row ray
        # half-open rule: the edge counts for rows in [min, max) so shared vertices count once
        lo, hi = min(a[0], b[0]), max(a[0], b[0])
        spans = (rr >= lo) & (rr < hi)
        with np.errstate(over="ignore", invalid="ignore"):
            # a near-horizontal edge overflows only on rows outside its span (masked below)
            col_at = a[1] + (rr - a[0]) * (b[1] - a[1]) / (b[0] - a[0])
        inside ^= spans & (cc < col_at)
    return Patch(r0, c0, inside | on_edge)


def polygon_mask(
    vertices: Sequence[Sequence[float]] | np.ndarray,
    *,
    shape: tuple[int, int],
) -> np.ndarray:
    """:func:`polygon_patch` as a full boolean array of ``shape``."""
    return polygon_patch(vertices, shape=shape).full(_check_shape(shape))


_STRUCTURES = {
    4: ndi.generate_binary_structure(2, 1),
    8: ndi.generate_binary_structure(2, 2),
}


def region_at(
    mask: np.ndarray,
    seed: tuple[int, int],
    *,
    connectivity: int = 4,
    image: np.ndarray | None = None,
    vegetation: np.ndarray | None = None,
    edge_threshold: float = DEFAULT_EDGE_THRESHOLD,
    plant_edge_threshold: float = DEFAULT_PLANT_EDGE_THRESHOLD,
    edge_sigma: float = DEFAULT_EDGE_SIGMA,
) -> Patch:
    """The connected region of equal class values that contains ``seed``, bounded by
    the plant/soil split and the strong colour edges of ``image`` when it is given.

    Used by the fill tool: a click reclasses a proposed plant, or labels a plant that
    the mask does not have yet. Without ``image`` the region is the whole connected
    same-class region, which on an empty (all-soil) mask is the whole tile. With
    ``image`` the tile is first split into vegetation and soil (``vegetation``, by default
    ExG - ExR > 0, :func:`labeler.masks.vegetation.vegetation_mask`): a click on a
    vegetation pixel keeps to the connected vegetation under it, a click on soil to the
    connected soil; inside that side the region is cut further at strong colour edges
    (:func:`labeler.masks.colour_regions.split_regions`, the click a seed point), so two
    touching plants of different hue stay apart; pixels at the split that look like the
    other side (blended leaf edges, :func:`labeler.masks.vegetation.sharpen_split`) are
    left out. Neighbours are 4-connected by default, so
    two plants that touch only at a corner stay separate; ``connectivity=8`` joins
    diagonal neighbours too. The size cap of the fill tool (:data:`FILL_MAX_SHARE`) is
    the caller's.

    Parameters
    ----------
    mask : ndarray, shape (H, W)
        Class-index mask (any integer dtype).
    seed : (int, int)
        ``(row, col)`` of the clicked pixel, inside the mask.
    connectivity : {4, 8}
        Neighbourhood of the flood.
    image : ndarray, shape (H, W, 3), uint8, optional
        The RGB tile whose vegetation and colour edges bound the region.
    vegetation : ndarray, shape (H, W), bool, optional
        The vegetation/soil split of ``image`` (e.g. with the project's cold-start
        settings); computed with the defaults of ``vegetation_mask`` when omitted.
    edge_threshold : float
        Colour gradient (Delta E*ab per pixel) that counts as a strong edge in soil.
    plant_edge_threshold : float
        Colour gradient that counts as a strong edge inside vegetation.
    edge_sigma : float
        Gaussian smoothing before the colour gradient, pixels.

    Returns
    -------
    Patch
        The region, within its bounding box; it always holds ``seed``.
    """
    m = np.asarray(mask)
    if m.ndim != 2 or m.size == 0:
        raise ValueError(f"mask: expected a non-empty 2-D class-index array, got shape {m.shape}")
    if connectivity not in _STRUCTURES:
        raise ValueError(f"connectivity: expected 4 or 8, got {connectivity!r}")
    r, c = int(seed[0]), int(seed[1])
    if not (0 <= r < m.shape[0] and 0 <= c < m.shape[1]):
        raise ValueError(
            f"seed: expected a pixel inside the mask of shape {m.shape}, got ({r}, {c})"
        )
    same = m == m[r, c]
    if image is not None:
        img = np.asarray(image)
        if img.shape[:2] != m.shape:
            raise ValueError(
                f"image: expected the tile of the mask, shape {m.shape} (H, W) plus 3 "
                f"colours, got shape {img.shape}; pass the image of the same tile"
            )
        veg = vegetation_mask(img) if vegetation is None else np.asarray(vegetation)
        if veg.shape != m.shape or veg.dtype != bool:
            raise ValueError(
                f"vegetation: expected a bool array of shape {m.shape} like the mask, got "
                f"shape {veg.shape} dtype {veg.dtype}; pass vegetation_mask(image)"
            )
        same &= veg == veg[r, c]  # a fill never crosses the plant/soil split
    labels, _ = ndi.label(same, structure=_STRUCTURES[connectivity])
    region = labels == labels[r, c]
    rs, cs = region_bounds(region)
    if image is not None:
        # the gradient needs a few pixels of context around the region
        pad = int(np.ceil(4 * max(edge_sigma, 0.0))) + 1
        ps = slice(max(rs.start - pad, 0), min(rs.stop + pad, m.shape[0]))
        qs = slice(max(cs.start - pad, 0), min(cs.stop + pad, m.shape[1]))
        regions = split_regions(
            img[ps, qs], vegetation=veg[ps, qs], within=region[ps, qs],
            edge_threshold=edge_threshold, plant_edge_threshold=plant_edge_threshold,
            sigma=edge_sigma, connectivity=connectivity,
            seed_points=[(r - ps.start, c - qs.start)],
        )
        region = np.zeros_like(region)
        region[ps, qs] = regions == regions[r - ps.start, c - qs.start]
        # pixels blended of leaf and soil at the split go to the side they look like
        region &= sharpen_split(img, veg) == veg[r, c]
        region[r, c] = True
        rs, cs = region_bounds(region)
    return Patch(rs.start, cs.start, region[rs, cs].copy())


def region_bounds(region: np.ndarray, *, pad: int = 0) -> tuple[slice, slice]:
    """Row and column slices of a region's bounding box, grown by ``pad`` and clipped.

    Parameters
    ----------
    region : ndarray, shape (H, W), bool
        At least one pixel True.
    pad : int
        Pixels added on every side before clipping to the array.

    Returns
    -------
    rows, cols : slice
        Half-open ranges within ``0..H`` and ``0..W``.
    """
    rows = np.flatnonzero(region.any(axis=1))
    cols = np.flatnonzero(region.any(axis=0))
    h, w = region.shape
    return (
        slice(max(int(rows[0]) - pad, 0), min(int(rows[-1]) + pad + 1, h)),
        slice(max(int(cols[0]) - pad, 0), min(int(cols[-1]) + pad + 1, w)),
    )
