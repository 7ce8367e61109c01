"""The editor's state, free of any window: one tile being edited and every operation on it.

:class:`EditorState` is the facade the window (and the tests) talk to. It holds the image,
the proposal, the mask and the weak label and puts together the parts that live in their
own modules:

* :mod:`labeler.editor.view` -- view geometry: tile <-> view coordinates, zoom, pan, panes;
* :mod:`labeler.editor.history` -- the undo history of compact per-edit diffs;
* :mod:`labeler.editor.tools` -- brush, erase, scribble, polygon, fill, box, refine and the
  pointer gestures (a mixin of this class);
* :mod:`labeler.editor.render` -- drawing the view, redrawing only what changed.

It never opens a window, so all of it is tested on tiny arrays.

Counters
    ``actions`` counts the gestures that edit or build an edit: a stroke (press, drag,
    release), a polygon vertex, a click that closes or fills, a box, and the commands
    refine, relearn, clear the weak label, undo, redo and restoring a draft. Selecting a class or tool,
    zooming, panning and toggling views are not counted. ``seconds`` is active time: the
    wall-clock gaps between consecutive events (:meth:`EditorState.note_activity`), where
    a gap longer than ``idle_seconds`` (60 s by default) counts as a break and is left out
    entirely.

Learning on the tile
    ``learner`` (set by whoever opens the editor; None without a trained model) maps the
    annotator's marks (:attr:`EditorState.marks`) to a new proposal of the whole tile;
    :meth:`EditorState.relearn` applies it (:mod:`labeler.editor.tools`), and with
    ``relearn_on_scribble`` every finished scribble does so too.

The state knows whether the mask differs from the proposal (``changed``) but decides
nothing about what a save means: the workflow records the annotation state of a save.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence

import numpy as np

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.editor.history import Box, EditHistory
from labeler.editor.keys import TOOL_NAMES
from labeler.editor.render import Marks, Renderer
from labeler.editor.tools import STROKE_KINDS, EditingTools
from labeler.editor.view import Viewport, ViewTransform

__all__ = ["EditorState", "RADIUS_RANGE"]

#: Smallest and largest brush radius in tile pixels.
RADIUS_RANGE = (0.5, 128.0)


class EditorState(EditingTools):
    """One tile in the editor: image, proposal, mask, weak label, tools, history, view.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        RGB tile.
    proposal : ndarray, shape (H, W), uint8
        The proposed mask the edit starts from (class indices of ``schema``; 255 allowed).
    schema : ClassSchema
        Classes and overlay colours (the default label schema unless the project has its
        own).
    mask : ndarray, shape (H, W), uint8, optional
        Starting mask (default: a copy of the proposal).
    weak_label : ndarray, shape (H, W), uint8, optional
        Starting weak label (class index where marked, 255 elsewhere; default none).
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
        Half-width of the band around the weak label that refine decides again.
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
        weak_label: np.ndarray | None = None,
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
        if weak_label is None:
            self._weak = np.full(self._shape, UNLABELLED, np.uint8)
        else:
            self._weak = self._checked(weak_label, "weak_label").copy()
        if connectivity not in (4, 8):
            raise ValueError(f"connectivity: expected 4 or 8, got {connectivity!r}")
        self.connectivity = connectivity
        if not band_px >= 0:
            raise ValueError(f"band_px: expected a width of at least 0 px, got {band_px}")
        self.band_px = float(band_px)
        self._renderer = Renderer(self._image, schema=schema, uncertainty=uncertainty)
        self.opacity = opacity
        self._viewport = Viewport(self._shape, view_shape)
        # the model's layer: the proposal, replaced by each on-tile re-fit (relearn)
        self._base = self._proposal.copy()
        self._history = EditHistory(
            {"mask": self._mask, "weak_label": self._weak, "base": self._base}
        )
        self._clock = clock
        self.idle_seconds = float(idle_seconds)
        self._last_event: float | None = None
        self._seconds = 0.0
        self._actions = 0
        self._revision = 0
        self._changed_cache: tuple[int, bool] | None = None
        self._weak_cache: tuple[int, bool] | None = None
        self._compare: tuple[np.ndarray, ...] = ()
        self._compare_labels: tuple[str, ...] = ()
        self._edit_label = "this edit"
        self._edit_label_revision: int | None = None  # "edited" is added after it
        self.notice = ""
        self.snap = False
        self.learner: Callable[[np.ndarray], np.ndarray | None] | None = None
        self.relearn_on_scribble = False
        self._init_tools()
        self.active_class = self._default_class() if active_class is None else active_class
        self.tool = tool
        self.radius = radius

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

    # ------------------------------------------------------------------ read-only data
    @property
    def shape(self) -> tuple[int, int]:
        """``(H, W)`` of the tile."""
        return self._shape

    @property
    def schema(self) -> ClassSchema:
        """Classes and overlay colours."""
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
    def base(self) -> np.ndarray:
        """A copy of the model's layer: the proposal, or the newest on-tile re-fit of it
        (:meth:`relearn`); what the erase tool brings back."""
        return self._base.copy()

    @property
    def weak_label(self) -> np.ndarray:
        """A copy of the weak label: class index where marked, 255 elsewhere."""
        return self._weak.copy()

    @property
    def has_weak_label(self) -> bool:
        """True when the weak label marks any pixel."""
        if self._weak_cache is None or self._weak_cache[0] != self._revision:
            self._weak_cache = (self._revision, bool((self._weak != UNLABELLED).any()))
        return self._weak_cache[1]

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
        """Increases with every change of the mask or the weak label."""
        return self._revision

    @property
    def actions(self) -> int:
        """Edit actions so far (see the module notes)."""
        return self._actions

    @property
    def seconds(self) -> float:
        """Active seconds so far (see the module notes)."""
        return self._seconds

    # ------------------------------------------------------------------ settings
    @property
    def active_class(self) -> int:
        """Class index the tools write."""
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
        """Name of the active class."""
        return self._schema.by_index(self._active).name

    @property
    def tool(self) -> str:
        """What the left button does; changing it drops a gesture in progress."""
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
        """Brush radius in tile pixels, kept within :data:`RADIUS_RANGE`."""
        return self._radius

    @radius.setter
    def radius(self, value: float) -> None:
        if not math.isfinite(value):
            raise ValueError(f"radius: expected a number of pixels, got {value!r}")
        self._radius = float(np.clip(value, *RADIUS_RANGE))

    @property
    def opacity(self) -> float:
        """Overlay opacity in 0..1 (values outside are clipped)."""
        return self._renderer.opacity

    @opacity.setter
    def opacity(self, value: float) -> None:
        if not math.isfinite(value):
            raise ValueError(f"opacity: expected a number in 0..1, got {value!r}")
        self._renderer.opacity = value

    @property
    def show_outlines(self) -> bool:
        """Region outlines: on / off."""
        return self._renderer.show_outlines

    @show_outlines.setter
    def show_outlines(self, value: bool) -> None:
        self._renderer.show_outlines = value

    @property
    def show_heat(self) -> bool:
        """Uncertainty heat map: on / off (stays off, with a notice, without a map)."""
        return self._renderer.show_heat

    @show_heat.setter
    def show_heat(self, value: bool) -> None:
        if value and not self._renderer.has_uncertainty:
            self.notice = "no uncertainty map for this tile"
            return
        self._renderer.show_heat = value

    def set_uncertainty(self, uncertainty: np.ndarray | None) -> None:
        """Replace the uncertainty map, (h, w) float at any resolution (None removes it)."""
        self._renderer.set_uncertainty(uncertainty)

    @property
    def show_overlay(self) -> bool:
        """Mask overlay: on / off (off shows the bare tile)."""
        return self._renderer.show_overlay

    @show_overlay.setter
    def show_overlay(self, value: bool) -> None:
        self._renderer.show_overlay = value

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
    def _touch(self, box: Box) -> None:
        """A live change of the mask or the weak label inside ``box``."""
        self._revision += 1
        self._renderer.touched(box)

    def _record(self, boxes: Sequence[tuple[str, Box | None]]) -> bool:
        """Turn live changes inside ``boxes`` into one history entry; True if any."""
        changed = self._history.record(boxes)
        for box in changed:
            self._touch(box)
        return bool(changed)

    @property
    def can_undo(self) -> bool:
        """True when there is an edit to undo."""
        return self._history.can_undo

    @property
    def can_redo(self) -> bool:
        """True when there is an undone edit to redo."""
        return self._history.can_redo

    @property
    def history_bytes(self) -> int:
        """Bytes held by the undo and redo history."""
        return self._history.nbytes

    def _step(self, forward: bool) -> bool:
        self._finish_gesture()
        self.note_activity()
        self._count()
        boxes = self._history.redo() if forward else self._history.undo()
        if boxes is None:
            self.notice = f"nothing to {'redo' if forward else 'undo'}"
            return False
        for box in boxes:
            self._touch(box)
        return True

    def undo(self) -> bool:
        """Take back the last edit (one action); False, with a notice, when there is none."""
        return self._step(False)

    def redo(self) -> bool:
        """Apply again the last undone edit (one action); False when there is none."""
        return self._step(True)

    def restore_draft(
        self, mask: np.ndarray, weak_label: np.ndarray, *, actions: int = 0, seconds: float = 0.0
    ) -> bool:
        """Load a saved draft (one undoable action); its counters are added to ours.

        Parameters
        ----------
        mask, weak_label : ndarray, shape (H, W), uint8
            The draft's layers.
        actions, seconds : int, float
            Effort already spent on the draft.

        Returns
        -------
        bool
            True when the draft differs from the current mask or weak label.
        """
        m = self._checked(mask, "mask")
        s = self._checked(weak_label, "weak_label")
        self._finish_gesture()
        self._mask[:] = m
        self._weak[:] = s
        self._actions += int(actions)
        self._seconds += float(seconds)
        self._count()
        return self._record([("mask", None), ("weak_label", None)])

    # ------------------------------------------------------------------ view
    @property
    def view_shape(self) -> tuple[int, int]:
        """``(rows, cols)`` of the rendered view."""
        return self._viewport.view_shape

    @property
    def pane_shape(self) -> tuple[int, int]:
        """Size of one pane: the whole view, or its share side by side."""
        return self._viewport.pane_shape

    @property
    def transform(self) -> ViewTransform:
        """Zoom and pan of the view (both panes)."""
        return self._viewport.transform

    @transform.setter
    def transform(self, value: ViewTransform) -> None:
        self._viewport.transform = value

    def set_view_shape(self, view_shape: tuple[int, int]) -> None:
        """Resize the view and fit the tile into it."""
        self._viewport.resize(view_shape)

    def fit_view(self) -> None:
        """Show the whole tile, centred."""
        self._viewport.fit()

    def zoom_at(self, view_point: tuple[float, float], factor: float) -> None:
        """Zoom by ``factor`` about a view point."""
        self._viewport.zoom_at(view_point, factor)

    def pan_view(self, d_rows: float, d_cols: float) -> None:
        """Move the content by view pixels."""
        self._viewport.pan(d_rows, d_cols)

    def pane_of(self, view_point: tuple[float, float]) -> tuple[int, float, float]:
        """``(pane, row, col)``: pane 0 (the edit), 1, 2, ... (compared masks) or -1
        (a gap)."""
        return self._viewport.pane_of(view_point)

    # ------------------------------------------------------------------ compare
    @property
    def comparing(self) -> bool:
        """True when the compared masks are shown beside this edit."""
        return self._viewport.split

    @property
    def compare_mask(self) -> np.ndarray | None:
        """A copy of the first compared mask, or None."""
        return self._compare[0].copy() if self._compare else None

    @property
    def compare_masks(self) -> tuple[np.ndarray, ...]:
        """Copies of every compared mask, left to right."""
        return tuple(m.copy() for m in self._compare)

    @property
    def pane_titles(self) -> tuple[str, ...]:
        """Titles of the panes, left to right: this edit's, then each compared mask's."""
        edit = self._edit_label
        if self._edit_label_revision is not None and self._revision != self._edit_label_revision:
            edit = f"{edit}, edited"
        return (edit, *self._compare_labels)

    def set_compare(self, other: np.ndarray, *, label: str = "other") -> None:
        """Show ``other`` (H, W) uint8 beside the current mask, same zoom and pan."""
        self.set_compare_all([self._checked(other, "other")], labels=[label])

    def set_compare_all(
        self,
        others: Sequence[np.ndarray],
        *,
        labels: Sequence[str],
        edit_label: str | None = None,
    ) -> None:
        """Show every mask of ``others`` beside the current mask, same zoom and pan.

        Parameters
        ----------
        others : sequence of ndarray, shape (H, W), uint8
            The masks, left to right after this edit's pane (at least one).
        labels : sequence of str
            One title per mask (e.g. who saved it).
        edit_label : str, optional
            Title of this edit's pane (default "this edit"); once the mask changes it
            reads "<edit_label>, edited".
        """
        masks = tuple(self._checked(m, f"others[{k}]").copy() for k, m in enumerate(others))
        titles = tuple(str(t) for t in labels)
        if not masks or len(titles) != len(masks):
            raise ValueError(
                f"others, labels: expected one title per mask and at least one mask, got "
                f"{len(masks)} masks and {len(titles)} titles"
            )
        self._compare, self._compare_labels = masks, titles
        if edit_label is None:
            self._edit_label, self._edit_label_revision = "this edit", None
        else:
            self._edit_label, self._edit_label_revision = str(edit_label), self._revision
        self._renderer.compare_changed()
        self._viewport.set_panes(1 + len(masks))

    def toggle_compare(self) -> bool:
        """Switch the side-by-side view on or off (when there are masks to compare)."""
        if not self._compare:
            self.notice = "no second mask to compare with"
            return False
        self._viewport.set_panes(1 if self._viewport.split else 1 + len(self._compare))
        return True

    def clear_compare(self) -> None:
        """Forget the compared masks and show one pane."""
        self._compare, self._compare_labels = (), ()
        self._edit_label, self._edit_label_revision = "this edit", None
        self._renderer.compare_changed()
        self._viewport.set_panes(1)

    # ------------------------------------------------------------------ rendering
    def render(self) -> np.ndarray:
        """The view as a BGR image of ``view_shape``: tile, overlay, outlines, weak label,
        the open polygon or box, the brush cursor; two panes when comparing.

        Returns
        -------
        frame : ndarray, shape (rows, cols, 3), uint8, BGR
            A new array the caller may draw on.
        """
        marks = Marks(
            polygon=tuple(self._polygon),
            box=self._box_marks(),
            cursor=self._cursor if self._tool in STROKE_KINDS else None,
            cursor_radius=self._radius,
            cursor_class=self._active,
        )
        return self._renderer.render(
            self._mask, self._weak, viewport=self._viewport, compare=self._compare,
            compare_label=self._compare_labels, edit_label=self.pane_titles[0], marks=marks,
        )
