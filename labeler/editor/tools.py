"""The editor's tools and pointer gestures: brush, erase, scribble, polygon, fill, box,
refine, and what a press, drag and release of the left button do with each.

:class:`EditingTools` is a mixin of :class:`labeler.editor.state.EditorState`; it edits the
state's layers in place and leaves counting, undo history and redrawing to the state's
bookkeeping. The pixel work itself lives in :mod:`labeler.masks.edits` (stroke, polygon and
region patches) and :mod:`labeler.masks.refine` (GrabCut, random walker).

Erase
    The erase tool puts the *model's layer* back under the stroke (the proposal, or its
    newest on-tile re-fit): it takes back hand edits locally. To mark soil, paint with
    class 0 (soil).

Fill
    A fill click takes the connected same-class region under the click on its side of the
    plant/soil split (vegetation by ExG - ExR), cut at strong colour edges; a region
    larger than ``FILL_MAX_SHARE`` (half) of the tile is refused, with a notice that names
    its size. ``fill_at(point, fill_all=True)`` takes the whole connected same-class region
    instead. The notice says what each fill took.

Relearn (learning from the marks on this tile)
    The marks are the weak label and every pixel corrected by hand (where the mask differs
    from the model's layer), with their classes. :meth:`EditingTools.relearn` hands them
    to the state's ``learner`` (in a project: the head's classifier re-fitted on this
    tile's cached features, :mod:`labeler.model.ontile`), which returns a new proposal of
    the whole tile; it becomes the model's layer, and the mask takes it wherever it was
    not corrected by hand, so hand edits are never lost. One undoable edit. With
    ``relearn_on_scribble`` each finished scribble does this as part of the same edit.

Actions
    A stroke (press, drag, release), a polygon vertex, a click that closes or fills, a box,
    and the commands refine and clear the weak label each count as one action, also when they
    change nothing.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from labeler.classes import UNLABELLED
from labeler.editor.history import Box
from labeler.masks.edits import FILL_MAX_SHARE, Patch, polygon_patch, region_at, stroke_patch
from labeler.masks.refine import grabcut_box, refine_random_walker

__all__ = ["STROKE_KINDS", "CLOSE_PX", "EditingTools"]

#: What a stroke writes: the active class into the mask, the proposal back, or marks into
#: the weak label.
STROKE_KINDS = ("brush", "erase", "scribble")
#: A polygon click this close (view pixels) to the first vertex closes the polygon.
CLOSE_PX = 8.0


@dataclass
class _Stroke:
    kind: str
    last: tuple[float, float]
    box: list[int]  # r0, r1, c0, c1 (union of touched patches)


class EditingTools:
    """Tools and gestures of the editor (a mixin of ``EditorState``).

    Notes
    -----
    The host class provides the layers ``_image`` (H, W, 3), ``_proposal``, ``_base``
    (the model's layer), ``_mask`` and ``_weak`` (H, W) uint8 and ``_shape``; the
    settings ``_tool``, ``_active``, ``_radius``, ``connectivity``, ``band_px``, ``snap``,
    ``learner``, ``relearn_on_scribble``, ``notice`` and the property
    ``has_weak_label``; the view (``transform``, ``pane_of``); and the bookkeeping
    ``note_activity()`` (active time), ``_count()`` (one action), ``_touch(box)`` (a live
    change to redraw) and ``_record(boxes)`` (one undoable history entry; True if anything
    changed). It calls :meth:`_init_tools` from its constructor.
    """

    def _init_tools(self) -> None:
        self._stroke: _Stroke | None = None
        self._polygon: list[tuple[float, float]] = []
        self._box_start: tuple[float, float] | None = None
        self._box_end: tuple[float, float] | None = None
        self._cursor: tuple[float, float] | None = None

    # ------------------------------------------------------------------ strokes
    def _apply_patch(self, patch: Patch, kind: str) -> None:
        if patch.mask.size == 0:
            return
        rs, cs = patch.slices
        sel = patch.mask
        if kind == "brush":
            self._mask[rs, cs][sel] = self._active
        elif kind == "erase":
            self._mask[rs, cs][sel] = self._base[rs, cs][sel]
        else:
            self._weak[rs, cs][sel] = self._active
        self._touch((rs.start, rs.stop, cs.start, cs.stop))

    def _grow(self, patch: Patch) -> None:
        if patch.mask.size == 0 or self._stroke is None:
            return
        rs, cs = patch.slices
        b = self._stroke.box
        b[0], b[1] = min(b[0], rs.start), max(b[1], rs.stop)
        b[2], b[3] = min(b[2], cs.start), max(b[3], cs.stop)

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
        if stroke.kind == "scribble":
            if self.relearn_on_scribble and self.learner is not None and self._learn():
                return self._record(
                    [("weak_label", (r0, r1, c0, c1)), ("mask", None), ("base", None)]
                )
            return self._record([("weak_label", (r0, r1, c0, c1))])
        return self._record([("mask", (r0, r1, c0, c1))])

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
        """One scribble stroke: marks of the active class into the weak label (for refine)."""
        return self._whole_stroke(points, "scribble")

    # ------------------------------------------------------------------ polygon, fill, box
    @property
    def polygon_vertices(self) -> list[tuple[float, float]]:
        """Vertices of the polygon being drawn (tile coordinates)."""
        return list(self._polygon)

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

    def fill_at(self, point: tuple[float, float], *, fill_all: bool = False) -> bool:
        """Give the region under a tile point the active class (one action).

        The region is the connected same-class region on the clicked side of the
        plant/soil split, cut at strong colour edges
        (:func:`labeler.masks.edits.region_at`); one larger than ``FILL_MAX_SHARE`` of
        the tile is refused with a notice. ``fill_all`` takes the whole connected
        same-class region instead, with no bound and no cap. The notice says what was done.
        """
        self._finish_gesture()
        self.note_activity()
        self._count()
        r, c = int(round(point[0])), int(round(point[1]))
        if not (0 <= r < self._shape[0] and 0 <= c < self._shape[1]):
            return False
        patch = region_at(
            self._mask, (r, c), connectivity=self.connectivity,
            image=None if fill_all else self._image,
        )
        n, total = int(patch.mask.sum()), self._shape[0] * self._shape[1]
        if not fill_all and n > FILL_MAX_SHARE * total:
            self.notice = (
                f"fill refused: the region under the click is {n} px ({n / total:.0%} of the "
                f"tile), more than the {FILL_MAX_SHARE:.0%} a fill may take; click inside one "
                "plant, or use fill all"
            )
            return False
        rs, cs = patch.slices
        self._mask[rs, cs][patch.mask] = self._active
        how = "whole same-class region" if fill_all else "bounded by the plant/soil split"
        self.notice = f"filled {n} px ({n / total:.1%} of the tile) with class {self._active}, {how}"
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
        box: Box = (r0, min(int(row1), self._shape[0]), c0, min(int(col1), self._shape[1]))
        return self._record([("mask", box)])

    # ---------------------------------------------------------------- weak label, refine
    def clear_weak_label(self) -> bool:
        """Clear the weak label (one action, undoable)."""
        self._finish_gesture()
        self.note_activity()
        self._count()
        self._weak[:] = UNLABELLED
        return self._record([("weak_label", None)])

    def refine(self, *, snap: bool | None = None) -> bool:
        """Decide the band around the weak label again by random walker (one action).

        Parameters
        ----------
        snap : bool, optional
            Snap to superpixels; default the state's ``snap`` toggle.
        """
        self._finish_gesture()
        self.note_activity()
        if not self.has_weak_label:
            self.notice = "no weak label yet: mark each class with the scribble tool"
            return False
        self._count()
        refined = refine_random_walker(
            self._image, self._mask, self._weak, band_px=self.band_px,
            snap=self.snap if snap is None else bool(snap),
        )
        self._mask[:] = refined
        return self._record([("mask", None)])

    # ------------------------------------------------------------------ learning on the tile
    @property
    def marks(self) -> np.ndarray:
        """What the annotator told the model on this tile, (H, W) uint8.

        The weak label where marked; elsewhere the mask's class where it was corrected
        by hand (differs from the model's layer); 255 everywhere else.
        """
        out = np.where(self._mask != self._base, self._mask, UNLABELLED).astype(np.uint8)
        marked = self._weak != UNLABELLED
        out[marked] = self._weak[marked]
        return out

    def _learn(self) -> bool:
        """Ask the learner for a new proposal and apply it in place; False when it gave
        none (a notice says why)."""
        if self.learner is None:
            self.notice = "no trained model for this tile yet: retrain first"
            return False
        marks = self.marks
        if (marks == UNLABELLED).all():
            self.notice = "nothing marked yet: scribble or correct a region first"
            return False
        new = self.learner(marks)
        if new is None:
            self.notice = "no trained model for this tile yet: retrain first"
            return False
        new = np.asarray(new)
        if new.shape != self._shape or new.dtype != np.uint8:
            raise ValueError(
                f"learner: expected a (H, W) uint8 proposal of the tile's shape {self._shape}, "
                f"got shape {new.shape} dtype {new.dtype}"
            )
        hand = self._mask != self._base
        self._mask[~hand] = new[~hand]
        self._base[:] = new
        return True

    def relearn(self) -> bool:
        """Re-fit the model on this tile's marks and take its new proposal (one action).

        Pixels corrected by hand keep their class; every other pixel takes the new
        proposal (see the module notes). Returns False, with a notice, without a learner
        or marks.
        """
        self._finish_gesture()
        self.note_activity()
        self._count()
        if not self._learn():
            return False
        return self._record([("mask", None), ("base", None)])

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
        tr, tc = self.transform.view_to_tile(pr, pc)
        return float(tr), float(tc)

    def press(self, view_point: tuple[float, float], *, fill_all: bool = False) -> None:
        """Left button pressed at a view point: start what the tool does (clicks outside
        the left pane do nothing); ``fill_all`` (a shift-click) makes a fill take the whole
        connected same-class region."""
        self.hover(view_point)
        p = self._tile_point(view_point)
        if p is None:
            return
        if self._tool in STROKE_KINDS:
            self.stroke_start(p, kind=self._tool)
        elif self._tool == "polygon":
            if len(self._polygon) >= 3:
                fr, fc = self.transform.tile_to_view(*self._polygon[0])
                pr, pc = self.pane_of(view_point)[1:]
                if math.hypot(pr - fr, pc - fc) <= CLOSE_PX:
                    self.polygon_close()
                    return
            self.polygon_add(p)
        elif self._tool == "fill":
            self.fill_at(p, fill_all=fill_all)
        elif self._tool == "box":
            self.note_activity()
            self._box_start = self._box_end = p

    def drag(self, view_point: tuple[float, float]) -> None:
        """Pointer moved with the left button held."""
        self.hover(view_point)
        # left-pane frame even past its edge: a drag never jumps into the other pane's copy
        tr, tc = self.transform.view_to_tile(float(view_point[0]), float(view_point[1]))
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

    def _box_marks(self) -> tuple[tuple[float, float], tuple[float, float]] | None:
        """Corners of the box being dragged, for drawing, or None."""
        if self._box_start is None or self._box_end is None:
            return None
        return self._box_start, self._box_end
