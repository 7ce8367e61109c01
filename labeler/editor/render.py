"""Rendering of the editor's view: tile, class overlay, outlines, weak label, marks.

:class:`Renderer` draws the view of one tile as a BGR array; it never opens a window
(OpenCV is used only to draw onto arrays). It keeps a composite of the whole tile (image,
overlay, outlines, weak label) and the view sampled from it, and redraws only the boxes the
caller reports as touched (:meth:`Renderer.touched`), so a brush segment costs time in
proportion to the segment, not the tile.

Overlay
    A class pixel of a class with an overlay colour is blended by
    :func:`labeler.masks.overlay.blend_palette`, the one rule of every picture the program
    draws: ``round_half_up((1 - opacity) * base + opacity * colour)``, the opacity taken
    to the nearest thousandth. On the region outline (a 4-neighbour holds another value)
    it takes the class colour itself. Pixels of the weak label show their class
    colour (light grey for a class without overlay, e.g. soil).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import cv2
import numpy as np

from labeler.classes import UNLABELLED, ClassSchema
from labeler.editor.history import Box
from labeler.editor.view import PANE_GAP, Viewport
from labeler.masks.overlay import blend_palette

__all__ = ["Marks", "Renderer", "check_uncertainty", "pane_title", "TITLE_ROWS"]

_BACKDROP = (38, 38, 38)  # BGR of view pixels outside the tile
_GAP_COLOUR = (200, 200, 200)  # BGR of the gap between the two panes
_WEAK_NO_COLOUR = (225, 225, 225)  # weak label of a class without overlay (soil)
_WHITE = (255, 255, 255)


#: Height in view pixels of the dark box behind a pane's title.
TITLE_ROWS = 20
_TITLE_SCALE = 0.45


def pane_title(frame: np.ndarray, text: str, *, left: int, width: int) -> None:
    """Write a pane's title at the pane's top-left corner on a dark box, in place.

    Parameters
    ----------
    frame : ndarray, shape (rows, cols, 3), uint8, BGR
        The view.
    text : str
        The title; cut with "..." when it is wider than the pane.
    left : int
        First view column of the pane.
    width : int
        Width of the pane in view pixels.
    """
    font = cv2.FONT_HERSHEY_SIMPLEX
    shown = text
    while shown and cv2.getTextSize(shown, font, _TITLE_SCALE, 1)[0][0] > width - 12:
        shown = shown[:-4] + "..." if len(shown) > 4 else ""
    if shown:
        tw = cv2.getTextSize(shown, font, _TITLE_SCALE, 1)[0][0]
        frame[:TITLE_ROWS, left : left + min(tw + 12, width)] = (24, 24, 24)
        cv2.putText(frame, shown, (left + 6, TITLE_ROWS - 6), font, _TITLE_SCALE, _WHITE, 1,
                    cv2.LINE_AA)


def _as_panes(compare, compare_label) -> tuple[tuple[np.ndarray, ...], tuple[str, ...]]:
    """``compare`` and its titles as two tuples (one mask or several)."""
    if compare is None:
        return (), ()
    if isinstance(compare, np.ndarray) and compare.ndim == 2:
        others: tuple[np.ndarray, ...] = (compare,)
    else:
        others = tuple(compare)
    labels = (compare_label,) if isinstance(compare_label, str) else tuple(compare_label)
    if len(labels) != len(others):
        raise ValueError(
            f"compare_label: expected one title per compared mask ({len(others)}), "
            f"got {len(labels)}"
        )
    return others, labels


@dataclass(frozen=True)
class Marks:
    """What is drawn over the view for the gesture in progress.

    Parameters
    ----------
    polygon : sequence of (float, float)
        Vertices of the open polygon, tile ``(row, col)``.
    box : ((float, float), (float, float)) or None
        Corners of the box being dragged, tile ``(row, col)``.
    cursor : (float, float) or None
        Brush cursor centre, view ``(row, col)``; None hides it.
    cursor_radius : float
        Brush radius in tile pixels.
    cursor_class : int
        Class whose weak-label colour rings the cursor.
    """

    polygon: Sequence[tuple[float, float]] = ()
    box: tuple[tuple[float, float], tuple[float, float]] | None = None
    cursor: tuple[float, float] | None = None
    cursor_radius: float = 1.0
    cursor_class: int = 0


def check_uncertainty(uncertainty: np.ndarray) -> np.ndarray:
    """An uncertainty map as float64, or ``ValueError`` when it is not finite and 2-D.

    Parameters
    ----------
    uncertainty : ndarray, shape (h, w)
        At any resolution; it is stretched over the tile for the heat map.

    Returns
    -------
    ndarray, shape (h, w), float64
    """
    u = np.asarray(uncertainty, np.float64)
    if u.ndim != 2 or u.size == 0 or not np.isfinite(u).all():
        raise ValueError(f"uncertainty: expected a finite 2-D (h, w) map, got shape {u.shape}")
    return u


class Renderer:
    """Draws the view of one tile and keeps what it drew for the next frame.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        RGB tile.
    schema : ClassSchema
        Classes and overlay colours.
    opacity : float
        Overlay opacity, clipped to 0..1.
    uncertainty : ndarray, shape (h, w), float, optional
        Per-pixel uncertainty for the heat map.
    """

    def __init__(
        self,
        image: np.ndarray,
        *,
        schema: ClassSchema,
        opacity: float = 0.45,
        uncertainty: np.ndarray | None = None,
    ) -> None:
        self._image = image
        self._shape = (int(image.shape[0]), int(image.shape[1]))
        colours_rgb, self._has_overlay = schema.lut_rgb()
        self._lut_bgr = np.ascontiguousarray(colours_rgb[:, ::-1])
        self._weak_bgr = self._lut_bgr.copy()
        self._weak_bgr[~self._has_overlay] = _WEAK_NO_COLOUR
        self._uncertainty = None if uncertainty is None else check_uncertainty(uncertainty)
        self._opacity = float(np.clip(opacity, 0.0, 1.0))
        self._show_outlines = True
        self._show_heat = False
        self._show_overlay = True
        self._base: np.ndarray | None = None  # image or heat blend, BGR, tile size
        self._comp: np.ndarray | None = None  # composite of this edit, tile size
        self._comp_other: list[np.ndarray] | None = None  # composites of compared masks
        self._view: np.ndarray | None = None
        self._maps: tuple[np.ndarray, np.ndarray] | None = None
        self._drawn: tuple | None = None  # (transform, view_shape, split) of _view
        self._dirty: list[Box] = []

    # -------------------------------------------------------------- display settings
    def _restyle(self) -> None:
        self._base = None

    @property
    def opacity(self) -> float:
        """Overlay opacity in 0..1."""
        return self._opacity

    @opacity.setter
    def opacity(self, value: float) -> None:
        self._opacity = float(np.clip(value, 0.0, 1.0))
        self._restyle()

    @property
    def show_outlines(self) -> bool:
        """Region outlines drawn in the class colour."""
        return self._show_outlines

    @show_outlines.setter
    def show_outlines(self, value: bool) -> None:
        self._show_outlines = bool(value)
        self._restyle()

    @property
    def show_overlay(self) -> bool:
        """Mask overlay and weak label drawn (off: the bare tile)."""
        return self._show_overlay

    @show_overlay.setter
    def show_overlay(self, value: bool) -> None:
        self._show_overlay = bool(value)
        self._restyle()

    @property
    def show_heat(self) -> bool:
        """Uncertainty heat map blended under the overlay (never on without a map)."""
        return self._show_heat

    @show_heat.setter
    def show_heat(self, value: bool) -> None:
        self._show_heat = bool(value) and self._uncertainty is not None
        self._restyle()

    @property
    def has_uncertainty(self) -> bool:
        """True when an uncertainty map is set."""
        return self._uncertainty is not None

    def set_uncertainty(self, uncertainty: np.ndarray | None) -> None:
        """Replace the uncertainty map, (h, w) float at any resolution (None removes it
        and turns the heat map off)."""
        if uncertainty is None:
            self._uncertainty = None
            self._show_heat = False
        else:
            self._uncertainty = check_uncertainty(uncertainty)
        self._restyle()

    @property
    def weak_label_colours(self) -> np.ndarray:
        """BGR colour of the weak label per class value, shape (n_values, 3), uint8."""
        return self._weak_bgr

    # -------------------------------------------------------------- what changed
    def touched(self, box: Box) -> None:
        """The mask or the weak label changed inside ``box``: redraw it next frame."""
        self._dirty.append(box)

    def compare_changed(self) -> None:
        """The compared masks were set or removed: compose them afresh next frame."""
        self._comp_other = None

    # -------------------------------------------------------------- composing
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

    def _compose(self, mask: np.ndarray, weak: np.ndarray | None, out: np.ndarray,
                 r0: int, r1: int, c0: int, c1: int) -> None:
        """Write the composite of rows r0:r1, cols c0:c1 into ``out``."""
        base = self._base[r0:r1, c0:c1]
        if not self._show_overlay:
            out[r0:r1, c0:c1] = base
            return
        m = mask[r0:r1, c0:c1]
        res = blend_palette(
            base, m, colours=self._lut_bgr, has_colour=self._has_overlay, opacity=self._opacity
        )
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
            edge = edge[r0 - e0 : r0 - e0 + (r1 - r0), c0 - f0 : c0 - f0 + (c1 - c0)]
            edge &= self._has_overlay[m]
            res[edge] = self._lut_bgr[m[edge]]
        if weak is not None:
            s = weak[r0:r1, c0:c1]
            on = s != UNLABELLED
            if on.any():
                res[on] = self._weak_bgr[s[on]]
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

    def _refresh(self, mask: np.ndarray, weak: np.ndarray, viewport: Viewport,
                 compare: Sequence[np.ndarray]) -> None:
        h, w = self._shape
        drawn = (viewport.transform, viewport.view_shape, viewport.panes)
        full_view = self._base is None or self._view is None or drawn != self._drawn
        if self._base is None:
            self._base = self._build_base()
            self._comp = np.empty_like(self._base)
            self._compose(mask, weak, self._comp, 0, h, 0, w)
            self._comp_other = None
            self._dirty.clear()
        if compare and self._comp_other is None:
            self._comp_other = []
            for other in compare:
                comp = np.empty_like(self._base)
                self._compose(other, None, comp, 0, h, 0, w)
                self._comp_other.append(comp)
            full_view = True
        dirty, self._dirty = self._dirty, []
        for r0, r1, c0, c1 in dirty:
            e0, e1 = max(r0 - 1, 0), min(r1 + 1, h)
            f0, f1 = max(c0 - 1, 0), min(c1 + 1, w)
            self._compose(mask, weak, self._comp, e0, e1, f0, f1)
            if not full_view:
                self._gather(self._comp, self._view, 0, e0, e1, f0, f1)
        if full_view:
            ph, pw = viewport.pane_shape
            self._maps = (
                viewport.transform.index_map(ph, h, axis=0),
                viewport.transform.index_map(pw, w, axis=1),
            )
            vh, vw = viewport.view_shape
            self._view = np.empty((vh, vw, 3), np.uint8)
            self._view[:] = _BACKDROP
            offsets = viewport.pane_offsets
            self._gather(self._comp, self._view, 0, 0, h, 0, w)
            for off, comp in zip(offsets[1:], self._comp_other or (), strict=False):
                self._gather(comp, self._view, off, 0, h, 0, w)
            self._drawn = drawn

    # -------------------------------------------------------------- the frame
    def render(
        self,
        mask: np.ndarray,
        weak_label: np.ndarray,
        *,
        viewport: Viewport,
        compare: np.ndarray | Sequence[np.ndarray] | None = None,
        compare_label: str | Sequence[str] = "",
        edit_label: str = "this edit",
        marks: Marks | None = None,
    ) -> np.ndarray:
        """The view as a BGR image: tile, overlay, outlines, weak label, then the marks.

        Parameters
        ----------
        mask : ndarray, shape (H, W), uint8
            The mask being edited (every change since the last frame reported through
            :meth:`touched`).
        weak_label : ndarray, shape (H, W), uint8
            Class index where marked, 255 elsewhere.
        viewport : Viewport
            View size, transform and split.
        compare : ndarray, shape (H, W), uint8, or sequence of them, optional
            The masks of the panes right of the edit, left to right; shown when
            ``viewport.split`` (the viewport has ``1 + len(compare)`` panes then).
        compare_label : str or sequence of str
            Title of each of those panes (one string for one mask).
        edit_label : str
            Title of the edit's pane when the view is split.
        marks : Marks, optional
            Polygon, box and brush cursor of the gesture in progress (default none).

        Returns
        -------
        frame : ndarray, shape (rows, cols, 3), uint8, BGR
            A new array of ``viewport.view_shape`` the caller may draw on.
        """
        others, labels = _as_panes(compare, compare_label)
        self._refresh(mask, weak_label, viewport, others if viewport.split else ())
        frame = self._view.copy()
        marks = Marks() if marks is None else marks
        t = viewport.transform
        if viewport.split:
            pw = viewport.pane_shape[1]
            offsets = viewport.pane_offsets
            for off in offsets[1:]:
                frame[:, off - PANE_GAP : off] = _GAP_COLOUR
            for off, text in zip(offsets, (edit_label, *labels), strict=False):
                pane_title(frame, text, left=off, width=pw)
        if len(marks.polygon):
            vr, vc = t.tile_to_view(*np.asarray(marks.polygon).T)
            pts = np.stack([vc, vr], axis=1).round().astype(np.int32)  # OpenCV draws x, y
            cv2.polylines(frame, [pts], False, _WHITE, 1, cv2.LINE_AA)
            for x, y in pts:
                cv2.circle(frame, (int(x), int(y)), 3, _WHITE, -1)
        if marks.box is not None:
            (ar, ac), (br, bc) = marks.box
            va = t.tile_to_view(ar, ac)
            vb = t.tile_to_view(br, bc)
            cv2.rectangle(frame, (int(round(va[1])), int(round(va[0]))),
                          (int(round(vb[1])), int(round(vb[0]))), _WHITE, 1)
        if marks.cursor is not None:
            cy, cx = marks.cursor
            rad = max(int(round(marks.cursor_radius * t.zoom)), 1)
            colour = tuple(int(v) for v in self._weak_bgr[marks.cursor_class])
            centre = (int(round(cx)), int(round(cy)))
            cv2.circle(frame, centre, rad, (0, 0, 0), 3)
            cv2.circle(frame, centre, rad, colour, 1)
        return frame
