"""One editing session's logic, without a window: events in, state operations, saving,
the drawn frame out.

:class:`EditorSession` is what :func:`labeler.editor.window.run_editor` drives: it maps
key codes and mouse events (the table in :mod:`labeler.editor.keys`) to operations of
:class:`~labeler.editor.state.EditorState`, saves through an
:class:`~labeler.editor.backend.EditorBackend`, and draws the frame the window shows.
Tests drive it with a scripted stand-in for the window.

Saving
    The session sends the mask (Enter) or the weak label alone (``p``) with the effort
    counters; the backend decides and records the annotation state (in a project, the
    workflow does) and returns it, and the session reports that state, never its own.

Settling
    A session opened with ``settling`` (a reviewer deciding a contested tile) asks before
    it saves: Enter draws the question "settle this tile with this mask?" in the window,
    and only ``y`` saves; ``n`` or Esc goes back to editing.

Never losing work:
    * every ``autosave_seconds`` a draft is written through the backend when the mask or
      the weak label changed since the last draft;
    * a draft found at start is offered back (restore? y / n; n discards it);
    * Escape with unsaved work asks first (y drops the work and its draft, n goes back);
    * closing the window from its frame keeps the work as a draft;
    * a save refused as a conflict never overwrites: both masks are shown side by side,
      the work is kept as a draft and the user is told so;
    * any exception inside the loop first writes a draft (:meth:`EditorSession.rescue`).
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from dataclasses import dataclass

import cv2
import numpy as np

from labeler.editor.backend import EditorBackend
from labeler.editor.keys import (
    ANSWER_NO,
    ANSWER_YES,
    class_for,
    command_for,
    elsewhere_for,
    help_rows,
)
from labeler.editor.panels import STATUS_ROWS, panel, status_strip, table_panel
from labeler.editor.state import EditorState
from labeler.errors import ConflictError, LabelerError
from labeler.keymap import class_keys
from labeler.states import KIND_FULL, KIND_WEAK

__all__ = ["EditorOutcome", "EditorSession"]

_ZOOM_STEP = 1.25
_RADIUS_STEP = 1.25
_OPACITY_STEP = 0.1


@dataclass(frozen=True)
class EditorOutcome:
    """How an editing session ended.

    Parameters
    ----------
    reason : str
        ``"saved"`` (a label was saved), ``"discarded"`` (the user dropped the work),
        ``"left"`` (closed with nothing to save), ``"closed"`` (the window was closed from
        its frame; work kept as a draft), ``"conflict"`` (a save was refused; work kept as
        a draft).
    kind : str or None
        What was saved: ``KIND_FULL`` (the mask) or ``KIND_WEAK`` (the weak label alone).
    state : str or None
        The annotation state the backend reports it recorded for the save (in a project:
        ``accepted``, ``amended``, ``settled`` or ``weak``, as the workflow decided).
    actions : int
        Edit actions counted (a restored draft's included).
    seconds : float
        Active seconds (a restored draft's included).
    draft_kept : bool
        True when unsaved work is waiting in a draft.
    """

    reason: str
    kind: str | None = None
    state: str | None = None
    actions: int = 0
    seconds: float = 0.0
    draft_kept: bool = False

    @property
    def saved(self) -> bool:
        """True when a label was saved."""
        return self.reason == "saved"


class EditorSession:
    """The editor's loop logic: events in, state operations, saving, the drawn frame out.

    Parameters
    ----------
    state : EditorState
        The tile being edited.
    backend : EditorBackend
        Where labels and drafts go.
    title : str
        Shown in the status line.
    autosave_seconds : float
        Seconds between draft writes while there are unsaved changes (> 0).
    heartbeat_seconds : float
        Seconds between renewals of the tile's hold (the store's lease) while open (> 0).
    clock : callable
        Seconds (default ``time.monotonic``).
    settling : bool
        A reviewer settles a contested tile: a save asks for confirmation first.
    """

    def __init__(
        self,
        state: EditorState,
        *,
        backend: EditorBackend,
        title: str,
        autosave_seconds: float = 5.0,
        heartbeat_seconds: float = 60.0,
        clock: Callable[[], float] = time.monotonic,
        settling: bool = False,
    ) -> None:
        if not heartbeat_seconds > 0:
            raise ValueError(
                "heartbeat_seconds: expected a positive number of seconds, "
                f"got {heartbeat_seconds}"
            )
        if not autosave_seconds > 0:
            raise ValueError(
                f"autosave_seconds: expected a positive number of seconds, got {autosave_seconds}"
            )
        self.state = state
        self.backend = backend
        if state.learner is None and callable(getattr(backend, "relearn", None)):
            state.learner = backend.relearn
        self.title = title
        self.autosave_seconds = float(autosave_seconds)
        self._clock = clock
        self.done = False
        self.outcome: EditorOutcome | None = None
        self.settling = bool(settling)
        self.question: str | None = None  # "discard", "restore" or "settle"
        self.show_help = False
        self.message = "?: keys and mouse"
        self.blocked = False  # a save was refused as a conflict
        self._pending_draft = None
        self._left_down = False
        self._pan_last: tuple[float, float] | None = None
        self._draft_revision = state.revision
        self._draft_kept = False
        self._last_autosave = clock()
        self.heartbeat_seconds = float(heartbeat_seconds)
        self._last_heartbeat = self._last_autosave
        self._error: BaseException | None = None
        self.wheel_turned = False  # set on a wheel event; the loop tells the window

    # -------------------------------------------------------------- shape and state
    @property
    def frame_shape(self) -> tuple[int, int]:
        """``(rows, cols)`` of the window image: the view and the status strip."""
        vh, vw = self.state.view_shape
        return vh + STATUS_ROWS, vw

    @property
    def has_work(self) -> bool:
        """True when closing now would lose something (mask changed or a weak label)."""
        return self.state.changed or self.state.has_weak_label

    def start(self) -> None:
        """Look for a draft of an earlier session and offer it back."""
        self.state.note_activity()
        draft = self.backend.load_draft()
        if draft is None:
            return
        if draft.mask.shape != self.state.shape or draft.weak_label.shape != self.state.shape:
            self.message = (
                f"a draft of another size {draft.mask.shape} was found and left alone"
            )
            return
        self._pending_draft = draft
        self._draft_kept = True
        self.question = "restore"

    def _finish(self, reason: str, *, kind: str | None = None, state: str | None = None) -> None:
        self.done = True
        self.outcome = EditorOutcome(
            reason, kind, state, self.state.actions, self.state.seconds, self._draft_kept
        )

    def _write_draft(self) -> bool:
        s = self.state
        try:
            self.backend.save_draft(s.mask, s.weak_label, actions=s.actions, seconds=s.seconds)
        except (OSError, LabelerError) as exc:
            self.message = f"could not write a draft: {exc}"
            return False
        self._draft_revision = s.revision
        self._draft_kept = True
        return True

    def rescue(self) -> None:
        """Write a draft of unsaved work (called when the loop fails); never raises."""
        try:
            if self.has_work and (self.state.revision != self._draft_revision
                                  or not self._draft_kept):
                self._write_draft()
        except Exception as exc:  # noqa: BLE001 - the original error matters more
            print(f"labeler: could not write a draft while closing: {exc}", file=sys.stderr)

    def tick(self) -> None:
        """Renew the hold and autosave a draft when it is time (and something changed)."""
        now = self._clock()
        if now - self._last_heartbeat >= self.heartbeat_seconds:
            self._last_heartbeat = now
            try:
                if not self.backend.heartbeat():
                    self.message = (
                        "your hold on this tile lapsed; a save still checks for conflicts"
                    )
            except (OSError, LabelerError) as exc:
                self.message = f"could not renew the hold: {exc}"
        if now - self._last_autosave < self.autosave_seconds:
            return
        self._last_autosave = now
        if self.state.revision == self._draft_revision or self.question == "restore":
            return
        if self.has_work:
            self._write_draft()
        elif self._draft_kept:
            try:
                self.backend.discard_draft()
                self._draft_kept = False
            except (OSError, LabelerError) as exc:
                self.message = f"could not drop the old draft: {exc}"
            self._draft_revision = self.state.revision
        else:
            self._draft_revision = self.state.revision

    def raise_pending(self) -> None:
        """Re-raise an error caught inside the mouse callback."""
        if self._error is not None:
            err, self._error = self._error, None
            raise err

    # -------------------------------------------------------------- saving
    def _save(self, *, weak_label_only: bool) -> None:
        s = self.state
        if self.blocked:
            self.message = ("this tile was saved by someone else: your work is in a draft; "
                            "Esc closes, reopen the tile to go on")
            return
        if weak_label_only:
            if not s.has_weak_label:
                self.message = "no weak label to save (mark one with the scribble tool: s)"
                return
            label, kind = s.weak_label, KIND_WEAK
        else:
            label, kind = s.mask, KIND_FULL
        s.note_activity()
        try:
            state = self.backend.save(label, kind=kind, actions=s.actions, seconds=s.seconds)
        except ConflictError as exc:
            self.blocked = True
            theirs = exc.theirs
            if isinstance(theirs, np.ndarray) and theirs.shape == s.shape \
                    and theirs.dtype == np.uint8:
                s.set_compare(theirs, label="saved by someone else")
            kept = self._write_draft()
            self.message = (
                "NOT SAVED: someone saved this tile first; nothing was overwritten. "
                + ("Your work is kept as a draft. " if kept else "")
                + "Esc closes."
            )
            return
        except (OSError, LabelerError) as exc:
            kept = self._write_draft()
            self.message = (f"could not save: {exc}"
                            + ("; your work is kept as a draft" if kept else ""))
            return
        try:
            self.backend.discard_draft()
            self._draft_kept = False
        except (OSError, LabelerError) as exc:
            self.message = f"saved as {state}, but the old draft could not be dropped: {exc}"
        else:
            self.message = f"saved as {state}"
        self._finish("saved", kind=kind, state=state)

    def _refine(self) -> None:
        """The refine key: the mask follows the weak label; a message says what happened."""
        if self.state.refine():
            self.message = (f"refined from your marks (snap to superpixels "
                            f"{'on' if self.state.snap else 'off'}); u undoes it")
        elif not self.state.notice:
            self.message = "refine changed nothing: the mask already follows your marks"

    def _relearn(self) -> None:
        """The relearn key: re-fit the model on the marks; errors become a message."""
        try:
            before = self.state.mask
            if self.state.relearn():
                moved = int(np.count_nonzero(self.state.mask != before))
                self.message = (
                    "the model learnt from your marks and re-proposed the tile: "
                    f"{moved} pixel{'s' if moved != 1 else ''} changed; u undoes it"
                )
            elif not self.state.notice:
                self.message = ("the model learnt from your marks: nothing changed, the "
                                "proposal already agrees with them")
        except (OSError, LabelerError) as exc:
            self.message = f"could not learn on this tile: {exc}"

    def _leave(self) -> None:
        if self.blocked and self._draft_kept:
            self._finish("conflict")
            return
        if self.has_work:
            self.question = "discard"
            return
        if self._draft_kept:
            try:
                self.backend.discard_draft()
                self._draft_kept = False
            except (OSError, LabelerError) as exc:
                self.message = f"could not drop the old draft: {exc}"
        self._finish("left")

    def on_closed(self) -> None:
        """The window was closed from its frame: keep unsaved work as a draft."""
        if self.done:
            return
        if self.has_work:
            self.rescue()
            self._finish("conflict" if self.blocked else "closed")
        else:
            self._finish("left")

    # -------------------------------------------------------------- events
    def on_key(self, code: int) -> None:
        """Handle one ``cv2.waitKeyEx`` code (-1 = no key)."""
        if code == -1 or self.done:
            return
        s = self.state
        s.note_activity()
        if self.question is not None:
            self._answer(code)
            return
        index = class_for(code, s.schema)
        if index is not None:
            s.active_class = index
            self.message = f"class {index} {s.active_name}"
            return
        command = command_for(code)
        if command is None:
            self._unbound(code)
            return
        s.notice = ""
        self._run(command)
        if s.notice:
            self.message = s.notice

    def _unbound(self, code: int) -> None:
        """Say why a key did nothing: a digit without a class, or a key of the queue."""
        if ord("0") <= code <= ord("9"):
            self.message = (f"no class {code - ord('0')} in this project; the digits are "
                            f"{class_keys(self.state.schema)}")
            return
        row = elsewhere_for(code)
        if row is not None:
            self.message = (f"{row.key} is a key of the queue ({row.queue.split(';')[0]}); "
                            "in the editor ? lists the keys")

    def _answer(self, code: int) -> None:
        yes, no = code in ANSWER_YES, code in ANSWER_NO
        if not (yes or no):
            return
        question, self.question = self.question, None
        if question == "settle":
            if yes:
                self._save(weak_label_only=False)
            else:
                self.message = "not settled; go on editing (Enter asks again)"
        elif question == "discard":
            if yes:
                try:
                    self.backend.discard_draft()
                    self._draft_kept = False
                except (OSError, LabelerError) as exc:
                    self.message = f"could not drop the draft: {exc}"
                self._finish("discarded")
            else:
                self.message = "go on editing"
        elif question == "restore":
            draft, self._pending_draft = self._pending_draft, None
            if yes:
                self.state.restore_draft(draft.mask, draft.weak_label, actions=draft.actions,
                                         seconds=draft.seconds)
                self._draft_revision = self.state.revision
                self.message = "draft restored"
            else:
                try:
                    self.backend.discard_draft()
                    self._draft_kept = False
                except (OSError, LabelerError) as exc:
                    self.message = f"could not drop the draft: {exc}"
                else:
                    self.message = "draft dropped; starting from the proposal"

    def _run(self, command: str) -> None:
        s = self.state
        if command.startswith("tool:"):
            s.tool = command[5:]
            self.message = f"tool {s.tool}"
            return
        pointer = s.cursor or (s.view_shape[0] / 2.0, s.view_shape[1] / 2.0)
        simple: dict[str, Callable[[], object]] = {
            "refine": self._refine,
            "relearn": self._relearn,
            "undo": s.undo,
            "redo": s.redo,
            "clear-weak-label": s.clear_weak_label,
            "close-polygon": s.polygon_close,
            "drop-vertex": s.polygon_drop,
            "whole": s.fit_view,
            "compare": s.toggle_compare,
            "zoom-in": lambda: s.zoom_at(pointer, _ZOOM_STEP),
            "zoom-out": lambda: s.zoom_at(pointer, 1.0 / _ZOOM_STEP),
        }
        if command in simple:
            simple[command]()
        elif command == "save":
            if self.settling and not self.blocked:
                self.question = "settle"
                self.message = "settle? y settles, n goes back"
            else:
                self._save(weak_label_only=False)
        elif command == "save-weak-label":
            self._save(weak_label_only=True)
        elif command == "leave":
            self._leave()
        elif command == "snap":
            s.snap = not s.snap
            self.message = f"refine snaps to superpixels: {'on' if s.snap else 'off'}"
        elif command == "radius-down":
            s.radius = s.radius / _RADIUS_STEP
        elif command == "radius-up":
            s.radius = s.radius * _RADIUS_STEP
        elif command == "opacity-down":
            s.opacity = s.opacity - _OPACITY_STEP
        elif command == "opacity-up":
            s.opacity = s.opacity + _OPACITY_STEP
        elif command == "outlines":
            s.show_outlines = not s.show_outlines
            self.message = f"region outlines {'on' if s.show_outlines else 'off'}"
        elif command == "heat":
            s.show_heat = not s.show_heat
            if s.show_heat:
                self.message = ("uncertainty heat map on: dark = the model is sure, "
                                "bright yellow = least sure on this tile")
            elif not s.notice:
                self.message = "uncertainty heat map off"
        elif command == "overlay":
            s.show_overlay = not s.show_overlay
            self.message = ("mask overlay on" if s.show_overlay
                            else "bare tile: mask overlay off (b shows it again)")
        elif command == "help":
            self.show_help = not self.show_help

    def on_mouse(self, event: int, x: int, y: int, flags: int) -> None:
        """Handle one HighGUI mouse event (``x``, ``y`` in frame pixels)."""
        try:
            self._mouse(event, float(y), float(x), flags)
        except Exception as exc:  # noqa: BLE001 - re-raised by raise_pending in the loop
            self._error = exc

    def _mouse(self, event: int, row: float, col: float, flags: int) -> None:
        if self.done:
            return
        s = self.state
        in_view = row < s.view_shape[0]
        s.note_activity()
        if event == cv2.EVENT_MOUSEMOVE:
            if self._pan_last is not None:
                s.pan_view(row - self._pan_last[0], col - self._pan_last[1])
                self._pan_last = (row, col)
            elif self._left_down:
                s.drag((row, col))
            elif in_view:
                s.hover((row, col))
            else:
                s.leave_view()
        elif event in (cv2.EVENT_LBUTTONDOWN, cv2.EVENT_LBUTTONDBLCLK):
            # a quick second click arrives as a double-click instead of a press (Qt, GTK)
            if self.question is None and in_view:
                s.notice = ""
                self._left_down = True
                s.press((row, col), fill_all=bool(flags & cv2.EVENT_FLAG_SHIFTKEY))
                if s.notice:
                    self.message = s.notice
        elif event == cv2.EVENT_LBUTTONUP:
            if self._left_down:
                self._left_down = False
                s.notice = ""
                s.release((row, col))
                if s.notice:
                    self.message = s.notice
        elif event in (cv2.EVENT_RBUTTONDOWN, cv2.EVENT_MBUTTONDOWN):
            self._pan_last = (row, col)
        elif event in (cv2.EVENT_RBUTTONUP, cv2.EVENT_MBUTTONUP):
            self._pan_last = None
        elif event == cv2.EVENT_MOUSEWHEEL and in_view:
            self.wheel_turned = True
            delta = int(flags) >> 16  # what C++ getMouseWheelDelta does; signed
            if delta:
                s.zoom_at((row, col), _ZOOM_STEP if delta > 0 else 1.0 / _ZOOM_STEP)

    # -------------------------------------------------------------- drawing
    def legend(self) -> list[tuple[str, tuple[int, int, int] | None]]:
        """The class legend under the view: ``("digit name", BGR or None)`` per class with
        a digit key (None: the class has no overlay colour, e.g. soil)."""
        colours, has = self.state.schema.lut_rgb()
        return [
            (f"{c.index} {c.name}",
             tuple(int(v) for v in colours[c.index][::-1]) if has[c.index] else None)
            for c in self.state.schema.classes
            if c.index <= 9
        ]

    def status_lines(self) -> tuple[str, str, str]:
        """The three lines of the status strip."""
        s = self.state
        line1 = (f"{self.title} | class {s.active_class} {s.active_name} | tool {s.tool} | "
                 f"radius {s.radius:.1f} | zoom {s.transform.zoom:.2f}")
        work = "unsaved changes" if self.has_work else "no changes"
        enter = "Enter settle (asks first)" if self.settling else "Enter save"
        line2 = (f"{work} | actions {s.actions} | {s.seconds:.0f} s | snap "
                 f"{'on' if s.snap else 'off'} | {enter}, Esc leave, ? keys")
        return line1, line2, self.message

    def frame(self) -> np.ndarray:
        """The whole window image: the view, overlays and the status strip (BGR)."""
        s = self.state
        view = s.render()
        if self.show_help:
            table_panel(view, help_rows(s.schema), top=24, left=8)
        if self.question is not None:
            if self.question == "discard":
                lines = ["Unsaved work on this tile.", "Throw it away?  y = discard,  n = back"]
            elif self.question == "settle":
                lines = [
                    f"Settle this tile with the mask of the pane '{s.pane_titles[0]}'?",
                    "It becomes the tile's decided mask (state settled).",
                    "y = settle,  n = back to editing",
                ]
            else:
                d = self._pending_draft
                lines = [
                    "A draft of this tile from an earlier session was found",
                    f"({d.actions} actions, {d.seconds:.0f} s).",
                    "Restore it?  y = restore,  n = drop it",
                ]
            top = max(s.view_shape[0] // 2 - 30, 0)
            panel(view, lines, top=top, left=8, line_px=20, scale=0.5)
        strip = status_strip(self.status_lines(), cols=view.shape[1], legend=self.legend(),
                             heat=s.show_heat)
        return np.vstack([view, strip])

