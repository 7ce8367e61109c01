"""The editor's state, free of any window: masks, tools, undo history, counters, rendering.

:class:`EditorState` holds one tile being edited and every operation the window maps mouse
and keys to; it never opens a window, so all of it is tested on tiny arrays. OpenCV is used
here only for drawing onto arrays and for the GrabCut maths (through
:mod:`labeler.masks.refine`).

Coordinates
    Tile points are ``(row, col)`` in tile pixel index units (pixel ``(i, j)`` has its
    centre at ``(i, j)``; see :mod:`labeler.masks.edits`). View points are ``(row, col)``
    of the rendered view, in view pixels. :class:`ViewTransform` converts between them.

Erase
    The erase tool puts the *proposal* back under the stroke: it takes back hand edits
    locally. To mark soil, paint with class 0 (soil).

Undo
    Every edit is one entry of an unlimited history holding a compact diff: the bounding box
    of the changed pixels with their values before and after, per layer (mask, scribbles).
    Undo and redo copy those boxes back, so they cost time and memory in proportion to the
    edit, not the tile.

Counters
    ``actions`` counts the gestures that edit or build an edit: a stroke (press, drag,
    release), a polygon vertex, a click that closes or fills, a box, and the commands
    refine, clear scribbles, undo, redo and restoring a draft. Selecting a class or tool,
    zooming, panning and toggling views are not counted. ``seconds`` is active time: the
    wall-clock gaps between consecutive events (:meth:`EditorState.note_activity`), where
    a gap longer than ``idle_seconds`` (60 s by default) counts as a break and is left out
    entirely.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import cv2
import numpy as np

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.editor.keys import TOOL_NAMES
from labeler.masks.edits import Patch, polygon_patch, region_at, stroke_patch
from labeler.masks.refine import grabcut_box, refine_random_walker

__all__ = ["ViewTransform", "EditorState", "fit_view_shape", "STROKE_KINDS", "PANE_GAP"]

#: What a stroke writes: the active class into the mask, the proposal back, or a scribble.
STROKE_KINDS = ("brush", "erase", "scribble")
#: View pixels between the two panes of the side-by-side view.
PANE_GAP = 4

_BACKDROP = (38, 38, 38)  # BGR of view pixels outside the tile
_SCRIBBLE_NO_COLOUR = (225, 225, 225)  # scribbles of a class without overlay (soil)
_ZOOM_MIN, _ZOOM_MAX = 1.0 / 16.0, 64.0
_RADIUS_MIN, _RADIUS_MAX = 0.5, 128.0
_CLOSE_PX = 8.0  # a polygon click this close (view px) to the first vertex closes it


@dataclass(frozen=True)
class ViewTransform:
    """Maps view pixels to tile pixels: a zoom and the tile position of the view's corner.

    Parameters
    ----------
    zoom : float
        View pixels per tile pixel (> 0).
    origin_row, origin_col : float
        Tile position (in pixel-corner units: pixel ``i`` spans ``[i, i + 1)``) of the
        top-left corner of the view.

    Notes
    -----
    The centre of view pixel ``v`` sits at corner coordinate ``v + 0.5`` of the view, that
    is tile corner coordinate ``origin + (v + 0.5) / zoom``; view pixel ``v`` shows tile
    pixel ``floor(origin + (v + 0.5) / zoom)``, and its centre in tile index units (centre
    of pixel ``i`` at ``i``) is ``origin + (v + 0.5) / zoom - 0.5``.
    """

    zoom: float = 1.0
    origin_row: float = 0.0
    origin_col: float = 0.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.zoom) and self.zoom > 0):
            raise ValueError(f"zoom: expected a positive number, got {self.zoom}")

    @classmethod
    def fit(cls, tile_shape: tuple[int, int], view_shape: tuple[int, int]) -> ViewTransform:
        """The largest zoom showing the whole tile, centred in the view."""
        th, tw = int(tile_shape[0]), int(tile_shape[1])
        vh, vw = int(view_shape[0]), int(view_shape[1])
        if min(th, tw, vh, vw) < 1:
            raise ValueError(
                f"tile_shape, view_shape: expected sizes of at least 1 px, got {tile_shape} "
                f"and {view_shape}"
            )
        zoom = min(vh / th, vw / tw)
        return cls(zoom, (th - vh / zoom) / 2.0, (tw - vw / zoom) / 2.0)

    def view_to_tile(self, view_row, view_col):
        """Tile index coordinates (floats) of view pixel centres (scalars or arrays)."""
        return (
            self.origin_row + (np.asarray(view_row, np.float64) + 0.5) / self.zoom - 0.5,
            self.origin_col + (np.asarray(view_col, np.float64) + 0.5) / self.zoom - 0.5,
        )

    def tile_to_view(self, tile_row, tile_col):
        """View coordinates (floats) of tile index coordinates; inverse of view_to_tile."""
        return (
            (np.asarray(tile_row, np.float64) + 0.5 - self.origin_row) * self.zoom - 0.5,
            (np.asarray(tile_col, np.float64) + 0.5 - self.origin_col) * self.zoom - 0.5,
        )

    def pixel_at(self, view_row, view_col) -> tuple[int, int]:
        """The tile pixel ``(row, col)`` that view pixel ``(view_row, view_col)`` shows
        (may lie outside the tile)."""
        return (
            int(math.floor(self.origin_row + (view_row + 0.5) / self.zoom)),
            int(math.floor(self.origin_col + (view_col + 0.5) / self.zoom)),
        )

    def index_map(self, n_view: int, n_tile: int, *, axis: int) -> np.ndarray:
        """Tile index shown by each view pixel along ``axis`` (0 rows, 1 cols), -1 outside.

        Returns
        -------
        index : ndarray, shape (n_view,), int64
        """
        origin = self.origin_row if axis == 0 else self.origin_col
        idx = np.floor(origin + (np.arange(n_view) + 0.5) / self.zoom).astype(np.int64)
        idx[(idx < 0) | (idx >= n_tile)] = -1
        return idx

    def zoomed(self, factor: float, *, at: tuple[float, float]) -> ViewTransform:
        """Zoom by ``factor`` keeping the tile point under view point ``at`` in place."""
        zoom = float(np.clip(self.zoom * factor, _ZOOM_MIN, _ZOOM_MAX))
        vr, vc = at
        ur = self.origin_row + (vr + 0.5) / self.zoom
        uc = self.origin_col + (vc + 0.5) / self.zoom
        return ViewTransform(zoom, ur - (vr + 0.5) / zoom, uc - (vc + 0.5) / zoom)

    def panned(self, d_rows: float, d_cols: float) -> ViewTransform:
        """Move the content by ``(d_rows, d_cols)`` view pixels (as a drag does)."""
        return ViewTransform(
            self.zoom, self.origin_row - d_rows / self.zoom, self.origin_col - d_cols / self.zoom
        )


def fit_view_shape(
    tile_shape: tuple[int, int],
    *,
    max_shape: tuple[int, int] = (900, 1200),
    max_zoom: int = 8,
) -> tuple[int, int]:
    """A view size for a tile: the largest whole zoom (1..``max_zoom``) that fits in
    ``max_shape``, or the tile scaled down to fit when it is larger than that.

    Parameters
    ----------
    tile_shape : (int, int)
        ``(H, W)`` of the tile.
    max_shape : (int, int)
        Largest ``(rows, cols)`` of the view (leave room for the status strip).
    max_zoom : int
        Largest whole zoom.

    Returns
    -------
    (rows, cols) : (int, int)
        At least 8 x 8.
    """
    h, w = int(tile_shape[0]), int(tile_shape[1])
    mr, mc = int(max_shape[0]), int(max_shape[1])
    if min(h, w, mr, mc) < 1 or max_zoom < 1:
        raise ValueError(
            f"tile_shape, max_shape, max_zoom: expected positive sizes, got {tile_shape}, "
            f"{max_shape}, {max_zoom}"
        )
    scale = min(mr / h, mc / w)
    if scale >= 1:
        scale = float(min(int(scale), int(max_zoom)))
    return max(int(h * scale), 8), max(int(w * scale), 8)


@dataclass(frozen=True)
class _Change:
    layer: str  # "mask" or "scribbles"
    row: int
    col: int
    before: np.ndarray
    after: np.ndarray

    @property
    def slices(self) -> tuple[slice, slice]:
        h, w = self.before.shape
        return slice(self.row, self.row + h), slice(self.col, self.col + w)

    @property
    def nbytes(self) -> int:
        return self.before.nbytes + self.after.nbytes


@dataclass
class _Stroke:
    kind: str
    last: tuple[float, float]
    box: list[int]  # r0, r1, c0, c1 (union of touched patches)


class EditorState:
    """One tile in the editor: image, proposal, mask, scribbles, tools, history, view.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        RGB tile.
    proposal : ndarray, shape (H, W), uint8
        The proposed mask the edit starts from (class indices of ``schema``; 255 allowed).
    schema : ClassSchema
        Classes and overlay colours (DESIGN section 2 by default).
    mask : ndarray, shape (H, W), uint8, optional
        Starting mask (default: a copy of the proposal).
    scribbles : ndarray, shape (H, W), uint8, optional
        Starting scribbles (class index where scribbled, 255 elsewhere; default none).
    uncertainty : ndarray, shape (h, w), float, optional
        Per-pixel uncertainty at any resolution, upsampled for the heat map.
    active_class : int, optional
        Default: the first class after the background.
    tool : str
        One of :data:`labeler.editor.keys.TOOL_NAMES`.
    radius : float
        Brush radius in tile pixels.
    opacity : float
        Overlay opacity in 0..1.
    connectivity : {4, 8}
        Neighbourhood of the fill tool.
    band_px : float
        Half-width of the band around scribbles that refine decides again.
    view_shape : (int, int)
        ``(rows, cols)`` of the rendered view.
    idle_seconds : float
        Gaps between events longer than this are not counted as active time.
    clock : callable
        Returns seconds (default ``time.monotonic``); tests pass a fake.
    """

    def __init__(
        self,
        image: np.ndarray,
        proposal: np.ndarray,
        *,
        schema: ClassSchema = DEFAULT_SCHEMA,
        mask: np.ndarray | None = None,
        scribbles: np.ndarray | None = None,
        uncertainty: np.ndarray | None = None,
        active_class: int | None = None,
        tool: str = "brush",
        radius: float = 4.0,
        opacity: float = 0.45,
        connectivity: int = 4,
        band_px: float = 24.0,
        view_shape: tuple[int, int] = (768, 768),
        idle_seconds: float = 60.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        img = np.asarray(image)
        if img.ndim != 3 or img.shape[2] != 3 or img.dtype != np.uint8 or img.size == 0:
            raise ValueError(
                f"image: expected a (H, W, 3) uint8 RGB tile, got shape {img.shape} "
                f"dtype {img.dtype}"
            )
        self._shape = (int(img.shape[0]), int(img.shape[1]))
        self._schema = schema
        self._image = np.ascontiguousarray(img).copy()
        self._image.setflags(write=False)
        self._proposal = self._checked(proposal, "proposal").copy()
        self._proposal.setflags(write=False)
        self._mask = (self._proposal if mask is None else self._checked(mask, "mask")).copy()
        if scribbles is None:
            self._scrib = np.full(self._shape, UNLABELLED, np.uint8)
        else:
            self._scrib = self._checked(scribbles, "scribbles").copy()
        self._committed = {"mask": self._mask.copy(), "scribbles": self._scrib.copy()}
        self._uncertainty = None
        if uncertainty is not None:
            u = np.asarray(uncertainty, np.float64)
            if u.ndim != 2 or u.size == 0 or not np.isfinite(u).all():
                raise ValueError(
                    f"uncertainty: expected a finite 2-D (h, w) map, got shape {u.shape}"
                )
            self._uncertainty = u
        if connectivity not in (4, 8):
            raise ValueError(f"connectivity: expected 4 or 8, got {connectivity!r}")
        self.connectivity = connectivity
        if not band_px >= 0:
            raise ValueError(f"band_px: expected a width of at least 0 px, got {band_px}")
        self.band_px = float(band_px)
        self._clock = clock
        self.idle_seconds = float(idle_seconds)
        self._last_event: float | None = None
        self._seconds = 0.0
        self._actions = 0
        self._undo: list[tuple[_Change, ...]] = []
        self._redo: list[tuple[_Change, ...]] = []
        self._revision = 0
        self._stroke: _Stroke | None = None
        self._polygon: list[tuple[float, float]] = []
        self._box_start: tuple[float, float] | None = None
        self._box_end: tuple[float, float] | None = None
        self.notice = ""
        self.snap = False
        # display
        self._colours_rgb, self._has_overlay = schema.lut_rgb()
        self._lut_bgr = np.ascontiguousarray(self._colours_rgb[:, ::-1])
        self._scrib_bgr = self._lut_bgr.copy()
        self._scrib_bgr[~self._has_overlay] = _SCRIBBLE_NO_COLOUR
        self._opacity = 0.45
        self.opacity = opacity
        self._show_outlines = True
        self._show_heat = False
        self._show_overlay = True
        self._compare: np.ndarray | None = None
        self._compare_label = ""
        self._compare_on = False
        self._cursor: tuple[float, float] | None = None
        self._view_shape = self._check_view_shape(view_shape)
        self._transform = ViewTransform.fit(self._shape, self.pane_shape)
        self._base: np.ndarray | None = None
        self._comp: np.ndarray | None = None
        self._comp_other: np.ndarray | None = None
        self._view: np.ndarray | None = None
        self._maps: tuple[np.ndarray, np.ndarray] | None = None
        self._dirty: list[tuple[int, int, int, int]] = []
        self._base_dirty = True
        self._view_dirty = True
        self._changed_cache: tuple[int, bool] | None = None
        self._scrib_cache: tuple[int, bool] | None = None
        self.active_class = self._default_class() if active_class is None else active_class
        self.tool = tool
        self.radius = radius

    # ------------------------------------------------------------------ validation
    def _checked(self, arr: np.ndarray, name: str) -> np.ndarray:
        a = np.asarray(arr)
        if a.shape != self._shape or a.dtype != np.uint8:
            raise ValueError(
                f"{name}: expected a uint8 array of shape {self._shape} like the image, got "
                f"shape {a.shape} dtype {a.dtype}; pass the {name} of the same tile"
            )
        return a

    def _default_class(self) -> int:
        idx = [i for i in self._schema.indices if i != 0]
        return idx[0] if idx else 0

    @staticmethod
    def _check_view_shape(view_shape: tuple[int, int]) -> tuple[int, int]:
        if len(view_shape) != 2 or int(view_shape[0]) < 8 or int(view_shape[1]) < 8:
            raise ValueError(
                f"view_shape: expected (rows, cols) of at least 8 px each, got {view_shape}"
            )
        return int(view_shape[0]), int(view_shape[1])

    # ------------------------------------------------------------------ read-only data
    @property
    def shape(self) -> tuple[int, int]:
        """``(H, W)`` of the tile."""
        return self._shape

    @property
    def schema(self) -> ClassSchema:
        return self._schema

    @property
    def image(self) -> np.ndarray:
        """The RGB tile (read-only)."""
        return self._image

    @property
    def proposal(self) -> np.ndarray:
        """The proposal the edit started from (read-only)."""
        return self._proposal

    @property
    def mask(self) -> np.ndarray:
        """A copy of the current mask, (H, W) uint8."""
        return self._mask.copy()

    @property
    def scribbles(self) -> np.ndarray:
        """A copy of the scribble mask: class index where scribbled, 255 elsewhere."""
        return self._scrib.copy()

    @property
    def has_scribbles(self) -> bool:
        """True when any pixel is scribbled."""
        if self._scrib_cache is None or self._scrib_cache[0] != self._revision:
            self._scrib_cache = (self._revision, bool((self._scrib != UNLABELLED).any()))
        return self._scrib_cache[1]

    @property
    def changed(self) -> bool:
        """True when the mask differs from the proposal."""
        if self._changed_cache is None or self._changed_cache[0] != self._revision:
            self._changed_cache = (
                self._revision, not np.array_equal(self._mask, self._proposal)
            )
        return self._changed_cache[1]

    @property
    def revision(self) -> int:
        """Increases with every change of the mask or the scribbles."""
        return self._revision

    @property
    def actions(self) -> int:
        return self._actions

    @property
    def seconds(self) -> float:
        """Active seconds so far (see the module notes)."""
        return self._seconds

    @property
    def can_undo(self) -> bool:
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        return bool(self._redo)

    @property
    def history_bytes(self) -> int:
        """Bytes held by the undo and redo history."""
        return sum(c.nbytes for a in (*self._undo, *self._redo) for c in a)

    @property
    def polygon_vertices(self) -> list[tuple[float, float]]:
        """Vertices of the polygon being drawn (tile coordinates)."""
        return list(self._polygon)

    # ------------------------------------------------------------------ settings
    @property
    def active_class(self) -> int:
        return self._active

    @active_class.setter
    def active_class(self, value: int) -> None:
        if int(value) not in self._schema.indices:
            raise ValueError(
                f"active_class: expected one of the class indices {self._schema.indices}, "
                f"got {value!r}"
            )
        self._active = int(value)

    @property
    def active_name(self) -> str:
        return self._schema.by_index(self._active).name

    @property
    def tool(self) -> str:
        return self._tool

    @tool.setter
    def tool(self, value: str) -> None:
        if value not in TOOL_NAMES:
            raise ValueError(f"tool: expected one of {', '.join(TOOL_NAMES)}, got {value!r}")
        if getattr(self, "_tool", value) != value:
            self._finish_gesture()
            self._polygon = []
        self._tool = value

    @property
    def radius(self) -> float:
        return self._radius

    @radius.setter
    def radius(self, value: float) -> None:
        if not math.isfinite(value):
            raise ValueError(f"radius: expected a number of pixels, got {value!r}")
        self._radius = float(np.clip(value, _RADIUS_MIN, _RADIUS_MAX))

    @property
    def opacity(self) -> float:
        return self._opacity

    @opacity.setter
    def opacity(self, value: float) -> None:
        if not math.isfinite(value):
            raise ValueError(f"opacity: expected a number in 0..1, got {value!r}")
        self._opacity = float(np.clip(value, 0.0, 1.0))
        self._base_dirty = True

    @property
    def show_outlines(self) -> bool:
        return self._show_outlines

    @show_outlines.setter
    def show_outlines(self, value: bool) -> None:
        self._show_outlines = bool(value)
        self._base_dirty = True

    @property
    def show_heat(self) -> bool:
        return self._show_heat

    @show_heat.setter
    def show_heat(self, value: bool) -> None:
        if value and self._uncertainty is None:
            self.notice = "no uncertainty map for this tile"
            return
        self._show_heat = bool(value)
        self._base_dirty = True

    def set_uncertainty(self, uncertainty: np.ndarray | None) -> None:
        """Replace the uncertainty map, (h, w) float at any resolution (None removes it)."""
        if uncertainty is None:
            self._uncertainty = None
            self._show_heat = False
        else:
            u = np.asarray(uncertainty, np.float64)
            if u.ndim != 2 or u.size == 0 or not np.isfinite(u).all():
                raise ValueError(
                    f"uncertainty: expected a finite 2-D (h, w) map, got shape {u.shape}"
                )
            self._uncertainty = u
        self._base_dirty = True

    @property
    def show_overlay(self) -> bool:
        return self._show_overlay

    @show_overlay.setter
    def show_overlay(self, value: bool) -> None:
        self._show_overlay = bool(value)
        self._base_dirty = True

    # ------------------------------------------------------------------ time and counters
    def note_activity(self, now: float | None = None) -> None:
        """Count the time since the previous event as active unless it was a break."""
        t = self._clock() if now is None else float(now)
        if self._last_event is not None:
            gap = t - self._last_event
            if 0.0 <= gap <= self.idle_seconds:
                self._seconds += gap
        self._last_event = t

    def _count(self) -> None:
        self._actions += 1

    # ------------------------------------------------------------------ history
    def _layer(self, name: str) -> np.ndarray:
        return self._mask if name == "mask" else self._scrib

    def _touch(self, r0: int, r1: int, c0: int, c1: int) -> None:
        self._revision += 1
        self._dirty.append((r0, r1, c0, c1))

    def _record(self, boxes: Sequence[tuple[str, tuple[int, int, int, int] | None]]) -> bool:
        """Turn live changes inside ``boxes`` into one history entry; True if any."""
        changes = []
        for layer, box in boxes:
            live, base = self._layer(layer), self._committed[layer]
            r0, r1, c0, c1 = box if box is not None else (0, self._shape[0], 0, self._shape[1])
            diff = live[r0:r1, c0:c1] != base[r0:r1, c0:c1]
            if not diff.any():
                continue
            rows = np.flatnonzero(diff.any(axis=1))
            cols = np.flatnonzero(diff.any(axis=0))
            a0, a1 = r0 + int(rows[0]), r0 + int(rows[-1]) + 1
            b0, b1 = c0 + int(cols[0]), c0 + int(cols[-1]) + 1
            before = base[a0:a1, b0:b1].copy()
            after = live[a0:a1, b0:b1].copy()
            base[a0:a1, b0:b1] = after
            changes.append(_Change(layer, a0, b0, before, after))
            self._touch(a0, a1, b0, b1)
        if changes:
            self._undo.append(tuple(changes))
            self._redo.clear()
        return bool(changes)

    def _apply(self, action: tuple[_Change, ...], *, forward: bool) -> None:
        for ch in action:
            values = ch.after if forward else ch.before
            self._layer(ch.layer)[ch.slices] = values
            self._committed[ch.layer][ch.slices] = values
            rs, cs = ch.slices
            self._touch(rs.start, rs.stop, cs.start, cs.stop)

    def undo(self) -> bool:
        """Take back the last edit; False (and a notice) when there is none."""
        self._finish_gesture()
        self.note_activity()
        self._count()
        if not self._undo:
            self.notice = "nothing to undo"
            return False
        action = self._undo.pop()
        self._apply(action, forward=False)
        self._redo.append(action)
        return True

    def redo(self) -> bool:
        """Apply again the last undone edit; False when there is none."""
        self._finish_gesture()
        self.note_activity()
        self._count()
        if not self._redo:
            self.notice = "nothing to redo"
            return False
        action = self._redo.pop()
        self._apply(action, forward=True)
        self._undo.append(action)
        return True

    # ------------------------------------------------------------------ strokes
    def _apply_patch(self, patch: Patch, kind: str) -> None:
        if patch.mask.size == 0:
            return
        rs, cs = patch.slices
        sel = patch.mask
        if kind == "brush":
            self._mask[rs, cs][sel] = self._active
        elif kind == "erase":
            self._mask[rs, cs][sel] = self._proposal[rs, cs][sel]
        else:
            self._scrib[rs, cs][sel] = self._active
        self._touch(rs.start, rs.stop, cs.start, cs.stop)

    def stroke_start(self, point: tuple[float, float], *, kind: str = "brush") -> None:
        """Begin a stroke at tile point ``point``; ``kind`` is brush, erase or scribble."""
        if kind not in STROKE_KINDS:
            raise ValueError(f"kind: expected one of {', '.join(STROKE_KINDS)}, got {kind!r}")
        self._finish_gesture()
        self.note_activity()
        p = (float(point[0]), float(point[1]))
        patch = stroke_patch([p], radius=self._radius, shape=self._shape)
        self._stroke = _Stroke(kind, p, [self._shape[0], 0, self._shape[1], 0])
        self._grow(patch)
        self._apply_patch(patch, kind)

    def _grow(self, patch: Patch) -> None:
        if patch.mask.size == 0 or self._stroke is None:
            return
        rs, cs = patch.slices
        b = self._stroke.box
        b[0], b[1] = min(b[0], rs.start), max(b[1], rs.stop)
        b[2], b[3] = min(b[2], cs.start), max(b[3], cs.stop)

    def stroke_to(self, point: tuple[float, float]) -> None:
        """Extend the stroke to ``point``; the segment from the last sample is filled."""
        if self._stroke is None:
            return
        p = (float(point[0]), float(point[1]))
        patch = stroke_patch([self._stroke.last, p], radius=self._radius, shape=self._shape)
        self._grow(patch)
        self._apply_patch(patch, self._stroke.kind)
        self._stroke.last = p

    def stroke_end(self) -> bool:
        """Finish the stroke: one action, one history entry. True if anything changed."""
        if self._stroke is None:
            return False
        stroke, self._stroke = self._stroke, None
        self.note_activity()
        self._count()
        r0, r1, c0, c1 = stroke.box
        if r0 >= r1 or c0 >= c1:
            return False
        layer = "scribbles" if stroke.kind == "scribble" else "mask"
        return self._record([(layer, (r0, r1, c0, c1))])

    def _whole_stroke(self, points: Sequence[tuple[float, float]], kind: str) -> bool:
        pts = [(float(p[0]), float(p[1])) for p in points]
        if not pts:
            raise ValueError("points: expected at least one (row, col) sample, got none")
        self.stroke_start(pts[0], kind=kind)
        for p in pts[1:]:
            self.stroke_to(p)
        return self.stroke_end()

    def paint(self, points: Sequence[tuple[float, float]]) -> bool:
        """One brush stroke through tile points: the active class under it."""
        return self._whole_stroke(points, "brush")

    def erase(self, points: Sequence[tuple[float, float]]) -> bool:
        """One erase stroke: the proposal comes back under it."""
        return self._whole_stroke(points, "erase")

    def scribble(self, points: Sequence[tuple[float, float]]) -> bool:
        """One scribble stroke of the active class (weak label, for refine)."""
        return self._whole_stroke(points, "scribble")

    # ------------------------------------------------------------------ polygon, fill, box
    def polygon_add(self, point: tuple[float, float]) -> None:
        """Add a polygon vertex at a tile point (one action)."""
        self._finish_stroke_only()
        self.note_activity()
        self._count()
        self._polygon.append((float(point[0]), float(point[1])))

    def polygon_drop(self) -> bool:
        """Remove the last vertex of the open polygon."""
        self.note_activity()
        if not self._polygon:
            return False
        self._polygon.pop()
        return True

    def polygon_cancel(self) -> None:
        """Forget the open polygon."""
        self._polygon = []

    def polygon_close(self) -> bool:
        """Close the open polygon and fill it with the active class (one action).

        Returns False, with a notice, when it has fewer than 3 vertices.
        """
        self.note_activity()
        if len(self._polygon) < 3:
            self.notice = f"a polygon needs 3 vertices, it has {len(self._polygon)}"
            return False
        self._count()
        patch = polygon_patch(self._polygon, shape=self._shape)
        self._polygon = []
        if patch.mask.size == 0:
            return False
        rs, cs = patch.slices
        self._mask[rs, cs][patch.mask] = self._active
        return self._record([("mask", (rs.start, rs.stop, cs.start, cs.stop))])

    def fill_at(self, point: tuple[float, float]) -> bool:
        """Give the whole connected region under a tile point the active class."""
        self._finish_gesture()
        self.note_activity()
        self._count()
        r, c = int(round(point[0])), int(round(point[1]))
        if not (0 <= r < self._shape[0] and 0 <= c < self._shape[1]):
            return False
        patch = region_at(self._mask, (r, c), connectivity=self.connectivity)
        rs, cs = patch.slices
        self._mask[rs, cs][patch.mask] = self._active
        return self._record([("mask", (rs.start, rs.stop, cs.start, cs.stop))])

    def box(self, row0: int, col0: int, row1: int, col1: int, *, iterations: int = 5) -> bool:
        """GrabCut inside the half-open pixel box: its foreground takes the active class.

        Pixels GrabCut leaves as background keep their value. Returns False, with a
        notice, when the box is too small or covers the whole tile.
        """
        self._finish_gesture()
        self.note_activity()
        self._count()
        try:
            fg = grabcut_box(self._image, (row0, col0, row1, col1), iterations=iterations)
        except ValueError as exc:
            self.notice = str(exc)
            return False
        if not fg.any():
            self.notice = "GrabCut found nothing in the box"
            return False
        self._mask[fg] = self._active
        r0, c0 = max(int(row0), 0), max(int(col0), 0)
        return self._record([("mask", (r0, min(int(row1), self._shape[0]), c0,
                                       min(int(col1), self._shape[1])))])

    # ------------------------------------------------------------------ scribbles, refine
    def clear_scribbles(self) -> bool:
        """Remove every scribble (one action, undoable)."""
        self._finish_gesture()
        self.note_activity()
        self._count()
        self._scrib[:] = UNLABELLED
        return self._record([("scribbles", None)])

    def refine(self, *, snap: bool | None = None) -> bool:
        """Decide the band around the scribbles again by random walker (one action).

        Parameters
        ----------
        snap : bool, optional
            Snap to superpixels; default the state's ``snap`` toggle.
        """
        self._finish_gesture()
        self.note_activity()
        if not self.has_scribbles:
            self.notice = "no scribbles yet: pick the scribble tool and mark each class"
            return False
        self._count()
        refined = refine_random_walker(
            self._image, self._mask, self._scrib, band_px=self.band_px,
            snap=self.snap if snap is None else bool(snap),
        )
        self._mask[:] = refined
        return self._record([("mask", None)])

    def restore_draft(
        self, mask: np.ndarray, scribbles: np.ndarray, *, actions: int = 0, seconds: float = 0.0
    ) -> bool:
        """Load a saved draft (one undoable action); its counters are added to ours."""
        m = self._checked(mask, "mask")
        s = self._checked(scribbles, "scribbles")
        self._finish_gesture()
        self._mask[:] = m
        self._scrib[:] = s
        self._actions += int(actions)
        self._seconds += float(seconds)
        self._count()
        return self._record([("mask", None), ("scribbles", None)])

    # ------------------------------------------------------------------ gestures
    def _finish_stroke_only(self) -> None:
        if self._stroke is not None:
            self.stroke_end()

    def _finish_gesture(self) -> None:
        self._finish_stroke_only()
        self._box_start = self._box_end = None

    def _tile_point(self, view_point: tuple[float, float]) -> tuple[float, float] | None:
        pane, pr, pc = self.pane_of(view_point)
        if pane != 0:
            return None
        tr, tc = self._transform.view_to_tile(pr, pc)
        return float(tr), float(tc)

    def press(self, view_point: tuple[float, float]) -> None:
        """Left button pressed at a view point: start what the tool does."""
        self.hover(view_point)
        p = self._tile_point(view_point)
        if p is None:
            return
        if self._tool in STROKE_KINDS:
            self.stroke_start(p, kind=self._tool)
        elif self._tool == "polygon":
            if len(self._polygon) >= 3:
                fr, fc = self._transform.tile_to_view(*self._polygon[0])
                pr, pc = self.pane_of(view_point)[1:]
                if math.hypot(pr - fr, pc - fc) <= _CLOSE_PX:
                    self.polygon_close()
                    return
            self.polygon_add(p)
        elif self._tool == "fill":
            self.fill_at(p)
        elif self._tool == "box":
            self.note_activity()
            self._box_start = self._box_end = p

    def drag(self, view_point: tuple[float, float]) -> None:
        """Pointer moved with the left button held."""
        self.hover(view_point)
        # left-pane frame even past its edge: a drag never jumps into the other pane's copy
        tr, tc = self._transform.view_to_tile(float(view_point[0]), float(view_point[1]))
        p = (float(tr), float(tc))
        if self._stroke is not None:
            self.stroke_to(p)
        elif self._box_start is not None:
            self._box_end = p

    def release(self, view_point: tuple[float, float]) -> None:
        """Left button released: finish the stroke or run the box."""
        self.drag(view_point)
        if self._stroke is not None:
            self.stroke_end()
        elif self._box_start is not None:
            (ar, ac), (br, bc) = self._box_start, self._box_end or self._box_start
            self._box_start = self._box_end = None
            r0, r1 = sorted((int(round(ar)), int(round(br))))
            c0, c1 = sorted((int(round(ac)), int(round(bc))))
            self.box(r0, c0, r1 + 1, c1 + 1)

    def hover(self, view_point: tuple[float, float]) -> None:
        """Pointer at a view point (for the brush cursor)."""
        self._cursor = (float(view_point[0]), float(view_point[1]))

    @property
    def cursor(self) -> tuple[float, float] | None:
        """Last pointer position in view coordinates, or None when outside the view."""
        return self._cursor

    def leave_view(self) -> None:
        """Pointer left the view: hide the cursor."""
        self._cursor = None

    # ------------------------------------------------------------------ view
    @property
    def view_shape(self) -> tuple[int, int]:
        return self._view_shape

    @property
    def pane_shape(self) -> tuple[int, int]:
        """Size of one pane: the whole view, or half of it side by side."""
        vh, vw = self._view_shape
        if self.comparing:
            return vh, max((vw - PANE_GAP) // 2, 1)
        return vh, vw

    @property
    def transform(self) -> ViewTransform:
        return self._transform

    @transform.setter
    def transform(self, value: ViewTransform) -> None:
        self._transform = value
        self._view_dirty = True

    def set_view_shape(self, view_shape: tuple[int, int]) -> None:
        """Resize the view and fit the tile into it."""
        self._view_shape = self._check_view_shape(view_shape)
        self.fit_view()

    def fit_view(self) -> None:
        """Show the whole tile, centred."""
        self.transform = ViewTransform.fit(self._shape, self.pane_shape)

    def zoom_at(self, view_point: tuple[float, float], factor: float) -> None:
        """Zoom by ``factor`` about a view point."""
        pane, pr, pc = self.pane_of(view_point)
        self.transform = self._transform.zoomed(factor, at=(pr, pc))

    def pan_view(self, d_rows: float, d_cols: float) -> None:
        """Move the content by view pixels."""
        self.transform = self._transform.panned(d_rows, d_cols)

    def pane_of(self, view_point: tuple[float, float]) -> tuple[int, float, float]:
        """``(pane, row, col)``: pane 0 (left or only), 1 (right) or -1 (the gap)."""
        vr, vc = float(view_point[0]), float(view_point[1])
        if not self.comparing:
            return 0, vr, vc
        pw = self.pane_shape[1]
        if vc < pw:
            return 0, vr, vc
        if vc >= pw + PANE_GAP:
            return 1, vr, vc - pw - PANE_GAP
        return -1, vr, vc

    # ------------------------------------------------------------------ compare
    @property
    def comparing(self) -> bool:
        return self._compare is not None and self._compare_on

    @property
    def compare_mask(self) -> np.ndarray | None:
        return None if self._compare is None else self._compare.copy()

    def set_compare(self, other: np.ndarray, *, label: str = "other") -> None:
        """Show ``other`` (H, W) uint8 beside the current mask, same zoom and pan."""
        self._compare = self._checked(other, "other").copy()
        self._compare_label = str(label)
        self._compare_on = True
        self._comp_other = None
        self.fit_view()

    def toggle_compare(self) -> bool:
        """Switch the side-by-side view on or off (when there is a second mask)."""
        if self._compare is None:
            self.notice = "no second mask to compare with"
            return False
        self._compare_on = not self._compare_on
        self.fit_view()
        return True

    def clear_compare(self) -> None:
        self._compare = None
        self._compare_on = False
        self._comp_other = None
        self.fit_view()

    # ------------------------------------------------------------------ rendering
    def _build_base(self) -> np.ndarray:
        bgr = np.ascontiguousarray(self._image[:, :, ::-1])
        if self._show_heat and self._uncertainty is not None:
            u = self._uncertainty
            lo, hi = float(u.min()), float(u.max())
            scaled = np.zeros_like(u) if hi <= lo else (u - lo) / (hi - lo)
            grey = np.round(scaled * 255).astype(np.uint8)
            grey = cv2.resize(grey, (self._shape[1], self._shape[0]),
                              interpolation=cv2.INTER_LINEAR)
            heat = cv2.applyColorMap(grey, cv2.COLORMAP_INFERNO)
            bgr = cv2.addWeighted(bgr, 0.5, heat, 0.5, 0.0)
        return bgr

    def _compose(self, mask: np.ndarray, scrib: np.ndarray | None, out: np.ndarray,
                 r0: int, r1: int, c0: int, c1: int) -> None:
        """Write the composite of rows r0:r1, cols c0:c1 into ``out``."""
        base = self._base[r0:r1, c0:c1]
        if not self._show_overlay:
            out[r0:r1, c0:c1] = base
            return
        m = mask[r0:r1, c0:c1]
        has = self._has_overlay[m]
        a = int(round(self._opacity * 256))
        col = self._lut_bgr[m]
        blend = ((base.astype(np.uint16) * (256 - a) + col.astype(np.uint16) * a) >> 8)
        res = np.where(has[:, :, None], blend.astype(np.uint8), base)
        if self._show_outlines:
            # a class pixel is on the outline when a 4-neighbour holds another value
            h, w = self._shape
            e0, e1, f0, f1 = max(r0 - 1, 0), min(r1 + 1, h), max(c0 - 1, 0), min(c1 + 1, w)
            ext = mask[e0:e1, f0:f1]
            edge = np.zeros(ext.shape, bool)
            edge[1:, :] |= ext[1:, :] != ext[:-1, :]
            edge[:-1, :] |= ext[:-1, :] != ext[1:, :]
            edge[:, 1:] |= ext[:, 1:] != ext[:, :-1]
            edge[:, :-1] |= ext[:, :-1] != ext[:, 1:]
            edge = edge[r0 - e0 : r0 - e0 + (r1 - r0), c0 - f0 : c0 - f0 + (c1 - c0)] & has
            res[edge] = col[edge]
        if scrib is not None:
            s = scrib[r0:r1, c0:c1]
            on = s != UNLABELLED
            if on.any():
                res[on] = self._scrib_bgr[s[on]]
        out[r0:r1, c0:c1] = res

    def _gather(self, comp: np.ndarray, view: np.ndarray, col_off: int,
                r0: int, r1: int, c0: int, c1: int) -> None:
        """Copy tile rows r0:r1, cols c0:c1 of ``comp`` into the pane at ``col_off``."""
        ri, ci = self._maps
        rv = np.flatnonzero(ri >= 0)
        cv = np.flatnonzero(ci >= 0)
        if rv.size == 0 or cv.size == 0:
            return
        rvals, cvals = ri[rv], ci[cv]
        a0, a1 = np.searchsorted(rvals, r0), np.searchsorted(rvals, r1)
        b0, b1 = np.searchsorted(cvals, c0), np.searchsorted(cvals, c1)
        if a0 >= a1 or b0 >= b1:
            return
        vr = rv[a0:a1]
        vc = cv[b0:b1]
        block = comp[ri[vr]][:, ci[vc]]
        view[vr[0] : vr[-1] + 1, col_off + vc[0] : col_off + vc[-1] + 1] = block

    def _pane_offsets(self) -> list[int]:
        if self.comparing:
            return [0, self.pane_shape[1] + PANE_GAP]
        return [0]

    def _refresh(self) -> None:
        h, w = self._shape
        full_view = self._view_dirty or self._base_dirty or self._view is None
        if self._base_dirty or self._base is None:
            self._base = self._build_base()
            self._comp = np.empty_like(self._base)
            self._compose(self._mask, self._scrib, self._comp, 0, h, 0, w)
            self._comp_other = None
            self._dirty.clear()
            self._base_dirty = False
        if self.comparing and self._comp_other is None:
            self._comp_other = np.empty_like(self._base)
            self._compose(self._compare, None, self._comp_other, 0, h, 0, w)
            full_view = True
        dirty, self._dirty = self._dirty, []
        for r0, r1, c0, c1 in dirty:
            e0, e1 = max(r0 - 1, 0), min(r1 + 1, h)
            f0, f1 = max(c0 - 1, 0), min(c1 + 1, w)
            self._compose(self._mask, self._scrib, self._comp, e0, e1, f0, f1)
            if not full_view:
                self._gather(self._comp, self._view, 0, e0, e1, f0, f1)
        if full_view:
            ph, pw = self.pane_shape
            self._maps = (
                self._transform.index_map(ph, h, axis=0),
                self._transform.index_map(pw, w, axis=1),
            )
            vh, vw = self._view_shape
            self._view = np.empty((vh, vw, 3), np.uint8)
            self._view[:] = _BACKDROP
            self._gather(self._comp, self._view, 0, 0, h, 0, w)
            if self.comparing:
                self._gather(self._comp_other, self._view, pw + PANE_GAP, 0, h, 0, w)
            self._view_dirty = False

    def render(self) -> np.ndarray:
        """The view as a BGR image of ``view_shape``: tile, overlay, outlines, scribbles,
        the open polygon or box, the brush cursor; two panes when comparing.

        Returns
        -------
        frame : ndarray, shape (rows, cols, 3), uint8, BGR
            A new array the caller may draw on.
        """
        self._refresh()
        frame = self._view.copy()
        z = self._transform.zoom
        if self.comparing:
            pw = self.pane_shape[1]
            frame[:, pw : pw + PANE_GAP] = (200, 200, 200)
            for off, text in ((0, "this edit"), (pw + PANE_GAP, self._compare_label)):
                (tw, th), _ = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, 0.45, 1)
                cv2.rectangle(frame, (off, 0), (off + tw + 12, th + 10), (24, 24, 24), -1)
                cv2.putText(frame, text, (off + 6, th + 4), cv2.FONT_HERSHEY_SIMPLEX, 0.45,
                            (255, 255, 255), 1, cv2.LINE_AA)
        if self._polygon:
            vr, vc = self._transform.tile_to_view(*np.asarray(self._polygon).T)
            pts = np.stack([vc, vr], axis=1).round().astype(np.int32)  # OpenCV draws x, y
            cv2.polylines(frame, [pts], False, (255, 255, 255), 1, cv2.LINE_AA)
            for x, y in pts:
                cv2.circle(frame, (int(x), int(y)), 3, (255, 255, 255), -1)
        if self._box_start is not None and self._box_end is not None:
            (ar, ac), (br, bc) = self._box_start, self._box_end
            va = self._transform.tile_to_view(ar, ac)
            vb = self._transform.tile_to_view(br, bc)
            cv2.rectangle(frame, (int(round(va[1])), int(round(va[0]))),
                          (int(round(vb[1])), int(round(vb[0]))), (255, 255, 255), 1)
        if self._cursor is not None and self._tool in STROKE_KINDS:
            cy, cx = self._cursor
            rad = max(int(round(self._radius * z)), 1)
            colour = tuple(int(v) for v in self._scrib_bgr[self._active])
            cv2.circle(frame, (int(round(cx)), int(round(cy))), rad, (0, 0, 0), 3)
            cv2.circle(frame, (int(round(cx)), int(round(cy))), rad, colour, 1)
        return frame
