"""Outlines of the regions of a big class mask, read strip by strip.

:func:`labeler.masks.polygons.mask_to_polygons` labels a whole mask at once, which
takes about 5 bytes per pixel plus a crop of each region: too much for a 20000 x 20000
orthomosaic. :func:`outline_strips` reads the mask in full-width strips of bounded size
(a numpy array, or a lazily stitched mask read by ``mask[r0:r1]``), labels the
connected pixels of each class within the strip, and joins the pieces of a region
across the strip edges with a union-find over the two rows that meet there (the same
4- or 8-neighbourhood as within a strip). A region is outlined once no piece of it
touches the last row read, so memory holds one strip plus the regions still open.

A region whose bounding box stays within ``crop_budget_px`` keeps its pixels until it is
complete and is then outlined from the assembled crop exactly as
:func:`~labeler.masks.polygons.mask_to_polygons` would: same outline, same simplified
outline, same number. A region larger than that (a canopy that closed over the whole
field, crop rows joined by weeds) is outlined piece by piece, exactly, as soon as its
pieces are read, and the pieces' outlines are joined with :func:`shapely.union_all`:
the same area and the same point set (``shapely.equals``), though the rings may start
at another vertex, so the topology-preserving simplification can pick other vertices;
the area budget ``max_change`` holds all the same. Such regions are not smoothed
(``smooth`` applies to regions outlined from a crop). Open regions whose pixels
together would hold more than ``held_bytes`` are moved to the piece-by-piece form,
largest first, so memory stays bounded however the regions interleave.

Region numbers are given in raster-scan order of each region's first pixel, per class,
as :func:`~labeler.masks.polygons.mask_to_polygons` does.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import cv2
import numpy as np
import shapely

from labeler.imagery.tiling import Window, row_strips
from labeler.masks.polygons import Geometry, _simplify, _trace_regions

__all__ = ["CROP_BUDGET_PX", "HELD_BYTES", "OutlinedRegion", "outline_strips"]

#: Largest bounding box (pixels) of a region outlined from one assembled crop.
CROP_BUDGET_PX = 1 << 24
#: Pixels of open regions held at most (bytes of their crops), over all classes.
HELD_BYTES = 1 << 27


@dataclass(slots=True, eq=False)
class OutlinedRegion:
    """One connected region of one class of a mask read strip by strip.

    The outline is kept as well-known binary (a few hundred bytes for a plant, about a
    third of a live geometry), so the regions of a whole orthomosaic fit in memory;
    :attr:`geometry` decodes it (:func:`shapely.from_wkb` does many at once).

    Attributes
    ----------
    wkb : bytes
        Outline in pixel-corner coordinates of the whole mask (x = column, y = row), a
        Polygon or MultiPolygon as WKB.
    class_index : int
        Mask value of the region.
    label : int
        Region number within its class, 1..n in raster-scan order of first pixels.
    area_px : int
        Number of pixels of the region.
    window : Window
        Bounding box of the region in row/column order.
    owners : tuple of int
        Sorted distinct values of the ``owner`` raster over the region's pixels (e.g.
        the tiles its pixels come from); empty without an owner raster.
    """

    wkb: bytes
    class_index: int
    label: int
    area_px: int
    window: Window
    owners: tuple[int, ...]

    @property
    def geometry(self) -> Geometry:
        """The outline, a shapely Polygon or MultiPolygon."""
        return shapely.from_wkb(self.wkb)


@dataclass(eq=False)
class _Open:
    """A region being read: its pieces, bounding box and what is known so far."""

    r0: int
    c0: int
    r1: int
    c1: int
    area: int
    first: int
    crops: list[tuple[int, int, np.ndarray]] = field(default_factory=list)
    geoms: list = field(default_factory=list)
    owners: list[np.ndarray] = field(default_factory=list)
    whole: bool = True  # pixels kept for one crop (else outlined piece by piece)
    into: _Open | None = None

    def find(self) -> _Open:
        root = self
        while root.into is not None:
            root = root.into
        node = self
        while node.into is not None and node.into is not root:
            node.into, node = root, node.into
        return root

    @property
    def box_px(self) -> int:
        return (self.r1 - self.r0) * (self.c1 - self.c0)

    @property
    def held(self) -> int:
        return sum(c.nbytes for _, _, c in self.crops)

    def to_pieces(self) -> None:
        """Outline the kept pixels piece by piece and drop them."""
        if self.crops:
            exact, _ = _trace_regions(self.crops, cut=False)
            self.geoms.extend(exact)
        self.crops = []
        self.whole = False


def _union(a: _Open, b: _Open) -> _Open:
    a, b = a.find(), b.find()
    if a is b:
        return a
    if len(a.crops) + len(a.geoms) < len(b.crops) + len(b.geoms):
        a, b = b, a
    b.into = a
    a.r0, a.c0 = min(a.r0, b.r0), min(a.c0, b.c0)
    a.r1, a.c1 = max(a.r1, b.r1), max(a.c1, b.c1)
    a.area += b.area
    a.first = min(a.first, b.first)
    a.owners.extend(b.owners)
    if a.whole and b.whole:
        a.crops.extend(b.crops)
    else:
        a.to_pieces()
        b.to_pieces()
        a.geoms.extend(b.geoms)
    b.crops, b.geoms, b.owners = [], [], []
    return a


@dataclass
class _ClassState:
    """What one class carries from one strip to the next."""

    bottom: np.ndarray | None = None  # component numbers of the last row read
    regions: list[_Open] = field(default_factory=list)  # component number -> region
    open: set = field(default_factory=set)  # regions touching the last row read
    done: list[tuple[int, OutlinedRegion]] = field(default_factory=list)  # (first pixel, region)


def _pieces(
    binary: np.ndarray,
    top: int,
    width: int,
    connectivity: int,
    owner: np.ndarray | None,
) -> tuple[np.ndarray, list[_Open]]:
    """Label one strip of one class; a new region per connected piece."""
    n, labels, stats, _ = cv2.connectedComponentsWithStats(
        binary, connectivity=connectivity, ltype=cv2.CV_32S
    )
    regions: list[_Open] = [None]  # type: ignore[list-item]  # component 0 is background
    for k in range(1, n):
        c0, r0, w, h, area = (int(v) for v in stats[k, :5])
        crop = labels[r0 : r0 + h, c0 : c0 + w] == k
        first = (top + r0) * width + c0 + int(np.argmax(crop[0]))
        regions.append(
            _Open(top + r0, c0, top + r0 + h, c0 + w, area, first, [(top + r0, c0, crop)])
        )
    if owner is not None and n > 1:
        sel = labels > 0
        span = int(owner.max()) + 2
        keys = np.unique(labels[sel].astype(np.int64) * span + (owner[sel].astype(np.int64) + 1))
        comp, value = keys // span, keys % span - 1
        bounds = np.searchsorted(comp, np.arange(1, n + 1))
        for k in range(1, n):
            regions[k].owners.append(value[bounds[k - 1] : bounds[k]])
    return labels, regions


def _join_seam(
    above: np.ndarray,
    above_regions: list[_Open],
    below: np.ndarray,
    below_regions: list[_Open],
    connectivity: int,
) -> None:
    """Join the regions of two rows that meet (row ``above`` directly over ``below``)."""
    width = len(above)
    pairs = []
    for d in (-1, 0, 1) if connectivity == 8 else (0,):
        lo, hi = max(0, -d), min(width, width - d)
        a = above[lo:hi]
        b = below[lo + d : hi + d]
        hit = (a > 0) & (b > 0)
        if hit.any():
            pairs.append(np.stack([a[hit], b[hit]], axis=1))
    if not pairs:
        return
    for p, q in np.unique(np.concatenate(pairs), axis=0):
        _union(above_regions[int(p)], below_regions[int(q)])


def _finish(
    regions: Sequence[_Open],
    class_index: int,
    *,
    tolerance: float,
    max_change: float,
    smooth: bool,
) -> list[tuple[_Open, Geometry]]:
    """Outline complete regions (specks already dropped)."""
    whole = [r for r in regions if r.whole]
    parts = [r for r in regions if not r.whole]
    out: list[tuple[_Open, Geometry]] = []
    if whole:
        crops = []
        for r in whole:
            crop = np.zeros((r.r1 - r.r0, r.c1 - r.c0), bool)
            for pr, pc, piece in r.crops:
                h, w = piece.shape
                crop[pr - r.r0 : pr - r.r0 + h, pc - r.c0 : pc - r.c0 + w] |= piece
            crops.append((r.r0, r.c0, crop))
            r.crops = []
        exact, cut = _trace_regions(crops, cut=smooth and tolerance > 0)
        del crops
        areas = np.array([r.area for r in whole], np.float64)
        final = exact
        if tolerance > 0:
            base = cut if cut is not None else exact
            final = _simplify(exact, base, areas, tolerance=tolerance, max_change=max_change)
        out.extend(zip(whole, final, strict=True))
    if parts:
        exact = np.empty(len(parts), dtype=object)
        for j, r in enumerate(parts):
            r.to_pieces()
            joined = shapely.union_all(np.asarray(r.geoms, dtype=object))
            # drop the vertices the join leaves on straight edges where strips met
            exact[j] = shapely.simplify(joined, 0.0, preserve_topology=True)
            r.geoms = []
        areas = np.array([r.area for r in parts], np.float64)
        final = exact
        if tolerance > 0:
            final = _simplify(exact, exact, areas, tolerance=tolerance, max_change=max_change)
        out.extend(zip(parts, final, strict=True))
    return out


def outline_strips(
    mask,
    *,
    class_indices: Sequence[int],
    owner: Callable[[Window], np.ndarray] | None = None,
    simplify_tolerance_px: float = 0.5,
    min_area_px: float = 8,
    connectivity: int = 8,
    max_change: float = 0.02,
    smooth: bool = False,
    strip_px: int | None = None,
    crop_budget_px: int = CROP_BUDGET_PX,
    held_bytes: int = HELD_BYTES,
    check: Callable[[np.ndarray, Window], None] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> list[OutlinedRegion]:
    """Outline every connected region of the given classes, reading strip by strip.

    Parameters
    ----------
    mask : ndarray, shape (H, W), uint8, or a raster read by rows
        The class mask, or any object with ``shape`` (H, W) whose ``mask[r0:r1]``
        returns those rows as a uint8 array (e.g.
        :class:`labeler.imagery.tiling.StitchedMask`).
    class_indices : sequence of int
        Classes to outline, in the order of the result.
    owner : callable(Window) -> ndarray, optional
        An int raster over the mask (e.g. the tile each pixel comes from,
        :meth:`labeler.imagery.tiling.TileLayout.owner`), read for the same strips;
        gives :attr:`OutlinedRegion.owners`. Values below 0 are kept like any other.
    simplify_tolerance_px, min_area_px, connectivity, max_change, smooth
        As for :func:`labeler.masks.polygons.mask_to_polygons`.
    strip_px : int, optional
        Pixels read at once (default :data:`labeler.imagery.tiling.STRIP_PX`; a strip
        has at least one row).
    crop_budget_px : int
        Largest bounding box of a region outlined from one crop (module docstring).
    held_bytes : int
        Largest total of pixels kept for open regions.
    check : callable(strip, Window), optional
        Called with every strip as it is read (e.g. to check its values).
    progress : callable(done, total), optional
        Called after each strip, with the rows read and the mask height.

    Returns
    -------
    list of OutlinedRegion
        Class by class in the order of ``class_indices``, each in region-number order.
    """
    height, width = (int(v) for v in mask.shape[:2])
    if connectivity not in (4, 8):
        raise ValueError(f"connectivity: expected 4 or 8, got {connectivity!r}")
    if simplify_tolerance_px < 0:
        raise ValueError(
            f"simplify_tolerance_px: expected >= 0 pixels, got {simplify_tolerance_px}; "
            "use 0 for exact outlines"
        )
    if not 0 <= max_change <= 1:
        raise ValueError(f"max_change: expected a share in [0, 1], got {max_change}")
    classes = [int(c) for c in class_indices]
    for c in classes:
        if not 0 <= c <= 255:
            raise ValueError(f"class_indices: expected integers 0..255, got {c!r}")
    tol = float(simplify_tolerance_px)
    states = {c: _ClassState() for c in classes}

    def close(state: _ClassState, regions: Sequence[_Open], c: int) -> None:
        kept = [r for r in regions if r.area >= min_area_px]
        for r in regions:
            if r.area < min_area_px:
                r.crops, r.geoms = [], []
            elif r.whole and r.box_px > crop_budget_px:
                r.to_pieces()
        finished = _finish(kept, c, tolerance=tol, max_change=max_change, smooth=smooth)
        if not finished:
            return
        wkbs = shapely.to_wkb(np.asarray([g for _, g in finished], dtype=object))
        for (r, _), wkb in zip(finished, wkbs, strict=True):
            owners = np.unique(np.concatenate(r.owners)).tolist() if r.owners else ()
            window = Window(r.r0, r.c0, r.r1 - r.r0, r.c1 - r.c0)
            state.done.append(
                (r.first, OutlinedRegion(wkb, c, 0, int(r.area), window, tuple(owners)))
            )

    for window in row_strips(height, width, max_px=strip_px):
        strip = np.asarray(mask[window.row : window.row + window.height])
        if strip.shape != (window.height, width):
            raise ValueError(
                f"mask: rows {window.row}..{window.row + window.height} read as shape "
                f"{strip.shape}, expected {(window.height, width)}"
            )
        if check is not None:
            check(strip, window)
        own = None if owner is None else np.asarray(owner(window))
        for c in classes:
            state = states[c]
            binary = (strip == c).view(np.uint8)
            if not binary.any():
                close(state, list(state.open), c)
                state.bottom, state.regions, state.open = None, [], set()
                continue
            labels, regions = _pieces(binary, window.row, width, connectivity, own)
            if state.bottom is not None:
                _join_seam(state.bottom, state.regions, labels[0], regions, connectivity)
            roots = {r.find() for r in regions[1:]}
            before = {r.find() for r in state.open}
            bottom = labels[-1]
            touching = {regions[int(k)].find() for k in np.unique(bottom[bottom > 0])}
            if window.row + window.height == height:
                touching = set()
            close(state, [r for r in before | roots if r not in touching], c)
            for r in touching:
                if r.whole and r.box_px > crop_budget_px:
                    r.to_pieces()
            state.bottom = bottom.copy() if touching else None
            state.regions = regions if touching else []
            state.open = touching
            del labels
        held = [r for s in states.values() for r in s.open if r.whole and r.crops]
        total = sum(r.held for r in held)
        if total > held_bytes:  # largest first, down to half the budget
            for r in sorted(held, key=lambda r: r.held, reverse=True):
                if total <= held_bytes // 2:
                    break
                total -= r.held
                r.to_pieces()
        if progress is not None:
            progress(window.row + window.height, height)
    out: list[OutlinedRegion] = []
    for c in classes:
        state = states[c]
        close(state, list(state.open), c)
        state.done.sort(key=lambda item: item[0])
        for label, (_, region) in enumerate(state.done, start=1):
            region.label = label
            out.append(region)
        state.done = []
    return out
