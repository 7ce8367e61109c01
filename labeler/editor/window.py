"""The OpenCV HighGUI shell of the mask editor.

:func:`run_editor` opens one window for one tile and maps mouse and keys (the table in
:mod:`labeler.editor.keys`) to operations of :class:`~labeler.editor.state.EditorState`.
This is the only module of the project that calls ``cv2.namedWindow``, ``cv2.imshow``,
``cv2.waitKeyEx`` and ``cv2.setMouseCallback``; everything it shows is drawn by
:class:`EditorSession`, which holds the loop's logic without a window (tests drive it with
a scripted stand-in for the window).

Mouse: the left button uses the current tool; a right (or middle) button drag pans; the
wheel zooms about the pointer.

Never losing work:
    * every ``autosave_seconds`` a draft is written through the backend when the mask or
      the scribbles changed since the last draft;
    * a draft found at start is offered back (restore? y / n; n discards it);
    * Escape with unsaved work asks first (y drops the work and its draft, n goes back);
    * closing the window from its frame keeps the work as a draft;
    * a save refused as a conflict never overwrites: both masks are shown side by side,
      the work is kept as a draft and the user is told so;
    * any exception inside the loop first writes a draft, then propagates.

Caution: a mask made here may end up driving a field operation (spot spraying, fungicide
timing). Masks are decision support only; local regulations and licensed agronomic advice
come first.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol

import cv2
import numpy as np

from labeler.editor.backend import EditorBackend
from labeler.editor.keys import ANSWER_NO, ANSWER_YES, class_for, command_for, help_rows
from labeler.editor.state import EditorState
from labeler.errors import ConflictError, LabelerError

__all__ = [
    "EditorOutcome",
    "EditorSession",
    "Gui",
    "HighGuiWindow",
    "run_editor",
    "require_display",
    "STATUS_ROWS",
    "OUTCOME_REASONS",
]

#: Height in pixels of the status strip under the view.
STATUS_ROWS = 58
#: Why the editor closed.
OUTCOME_REASONS = ("saved", "discarded", "left", "closed", "conflict")

_FONT = cv2.FONT_HERSHEY_SIMPLEX
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
    kind, state : str or None
        What was saved (``"full"`` / ``"scribble"``, ``"accepted"`` / ``"amended"``).
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
        return self.reason == "saved"


class Gui(Protocol):
    """The window the loop talks to (HighGUI in use, a script in tests)."""

    def open(self, frame_shape: tuple[int, int],
             on_mouse: Callable[[int, int, int, int], None]) -> None: ...

    def show(self, frame: np.ndarray) -> None: ...

    def wait(self, ms: int) -> int: ...

    def after_wheel(self) -> None: ...

    def closed(self) -> bool: ...

    def close(self) -> None: ...


def _highgui_is_qt() -> bool:
    for line in cv2.getBuildInformation().splitlines():
        if line.strip().startswith("GUI:"):
            return "QT" in line.upper()
    return False


class HighGuiWindow:
    """An OpenCV HighGUI window without toolbar, one image pixel per screen pixel.

    Parameters
    ----------
    title : str
        Window name and title (``xdotool search --name`` finds it by this).

    Notes
    -----
    The Qt build of HighGUI zooms its own view on every wheel notch up (by 1.1, on top of
    the editor's zoom) and then pans that view on left-button drags, which would fight the
    brush. Nothing in OpenCV's Python API resets that view, so after a wheel event
    :meth:`after_wheel` opens the window afresh at the same place (one flicker per notch);
    the editor's own zoom is unaffected. Other builds need no such step.
    """

    def __init__(self, title: str) -> None:
        self.title = title
        self._open = False
        self._qt = _highgui_is_qt()
        self._on_mouse: Callable[[int, int, int, int], None] | None = None
        self._shape: tuple[int, int] | None = None

    def open(self, frame_shape: tuple[int, int],
             on_mouse: Callable[[int, int, int, int], None]) -> None:
        # GUI_NORMAL: no toolbar on the Qt build, so window and image pixels coincide
        cv2.namedWindow(self.title, cv2.WINDOW_AUTOSIZE | cv2.WINDOW_GUI_NORMAL)
        cv2.setMouseCallback(self.title, lambda ev, x, y, flags, _p: on_mouse(ev, x, y, flags))
        self._open = True
        self._on_mouse = on_mouse
        self._shape = frame_shape

    def after_wheel(self) -> None:
        """Undo the Qt build's own wheel zoom by opening the window afresh (see Notes)."""
        if not (self._qt and self._open and self._on_mouse is not None):
            return
        try:
            x, y, _w, _h = cv2.getWindowImageRect(self.title)
        except cv2.error:
            x = y = None
        cv2.destroyWindow(self.title)
        cv2.waitKey(1)
        self.open(self._shape, self._on_mouse)
        if x is not None and x >= 0 and y >= 0:
            cv2.moveWindow(self.title, int(x), int(y))

    def show(self, frame: np.ndarray) -> None:
        cv2.imshow(self.title, frame)

    def wait(self, ms: int) -> int:
        return int(cv2.waitKeyEx(max(int(ms), 1)))

    def closed(self) -> bool:
        try:
            return cv2.getWindowProperty(self.title, cv2.WND_PROP_VISIBLE) < 1
        except cv2.error:
            return True

    def close(self) -> None:
        if self._open:
            self._open = False
            try:
                cv2.destroyWindow(self.title)
                cv2.waitKey(1)
            except cv2.error:
                pass


def require_display() -> None:
    """Raise :class:`LabelerError` when no graphical display can be opened."""
    if sys.platform.startswith("linux") and not os.environ.get("DISPLAY"):
        raise LabelerError(
            "no display: the mask editor opens a window, but the DISPLAY environment "
            "variable is not set. Accept, park or review the tile from the terminal queue's "
            "preview instead, or run `labeler edit` on a machine with a display "
            "(or over ssh -X)."
        )


def _text(img: np.ndarray, text: str, org: tuple[int, int], *, scale: float = 0.45,
          colour: tuple[int, int, int] = (235, 235, 235)) -> None:
    # drawn on dark panels only: no outline (a thicker glyph run is wider in OpenCV 5)
    cv2.putText(img, text, org, _FONT, scale, colour, 1, cv2.LINE_AA)


def _panel(img: np.ndarray, lines: list[str], *, top: int, left: int, line_px: int = 17,
           scale: float = 0.42) -> None:
    """Dark translucent panel with lines of text, in columns when they do not fit."""
    h, w = img.shape[:2]
    rows_fit = max((h - top - 8) // line_px, 1)
    columns = [lines[i : i + rows_fit] for i in range(0, len(lines), rows_fit)]
    col_w = max((w - left - 8) // max(len(columns), 1), 1)
    height = min(len(columns[0]) * line_px + 10, h - top)
    region = img[top : top + height, left : w - 4]
    region[:] = (region * 0.25).astype(np.uint8)
    for k, col in enumerate(columns):
        for i, line in enumerate(col):
            _text(img, line, (left + 6 + k * col_w, top + 14 + i * line_px), scale=scale)


def _table_panel(img: np.ndarray, rows: list[tuple[str, str]], *, top: int, left: int) -> None:
    """Dark panel with a two-field table (key, meaning), in as many columns as it needs,
    shrinking the text until it fits."""
    h, w = img.shape[:2]
    scale = 0.42
    while True:
        line_px = int(round(40 * scale))
        per_col = max((h - top - 12) // line_px, 1)
        cols = [rows[i : i + per_col] for i in range(0, len(rows), per_col)]
        widths = []
        for col in cols:
            kw = max(cv2.getTextSize(k, _FONT, scale, 1)[0][0] for k, _ in col)
            vw = max(cv2.getTextSize(v, _FONT, scale, 1)[0][0] for _, v in col)
            widths.append((kw, vw))
        total = sum(kw + vw + 28 for kw, vw in widths)
        if total <= w - left - 8 or scale <= 0.26:
            break
        scale *= 0.9
    height = min(len(cols[0]) * line_px + 12, h - top)
    region = img[top : top + height, left : w - 4]
    region[:] = (region * 0.2).astype(np.uint8)
    x = left + 6
    for col, (kw, vw) in zip(cols, widths, strict=True):
        for i, (k, v) in enumerate(col):
            y = top + line_px + i * line_px - 2
            _text(img, k, (x, y), scale=scale, colour=(120, 200, 255))
            _text(img, v, (x + kw + 10, y), scale=scale)
        x += kw + vw + 28


class EditorSession:
    """The editor's loop logic: events in, state operations, saving, the drawn frame out.

    Parameters
    ----------
    state : EditorState
    backend : EditorBackend
    title : str
        Shown in the status line.
    autosave_seconds : float
        Seconds between draft writes while there are unsaved changes (> 0).
    clock : callable
        Seconds (default ``time.monotonic``).
    """

    def __init__(
        self,
        state: EditorState,
        *,
        backend: EditorBackend,
        title: str,
        autosave_seconds: float = 5.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if not autosave_seconds > 0:
            raise ValueError(
                f"autosave_seconds: expected a positive number of seconds, got {autosave_seconds}"
            )
        self.state = state
        self.backend = backend
        self.title = title
        self.autosave_seconds = float(autosave_seconds)
        self._clock = clock
        self.done = False
        self.outcome: EditorOutcome | None = None
        self.question: str | None = None  # "discard" or "restore"
        self.show_help = False
        self.message = "h: keys and mouse"
        self.blocked = False  # a save was refused as a conflict
        self._pending_draft = None
        self._left_down = False
        self._pan_last: tuple[float, float] | None = None
        self._draft_revision = state.revision
        self._draft_kept = False
        self._last_autosave = clock()
        self._error: BaseException | None = None
        self.wheel_turned = False  # set on a wheel event; the loop tells the window

    # -------------------------------------------------------------- shape and state
    @property
    def frame_shape(self) -> tuple[int, int]:
        vh, vw = self.state.view_shape
        return vh + STATUS_ROWS, vw

    @property
    def has_work(self) -> bool:
        """True when closing now would lose something (mask changed or scribbles)."""
        return self.state.changed or self.state.has_scribbles

    def start(self) -> None:
        """Look for a draft of an earlier session and offer it back."""
        self.state.note_activity()
        draft = self.backend.load_draft()
        if draft is None:
            return
        if draft.mask.shape != self.state.shape or draft.scribbles.shape != self.state.shape:
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
            self.backend.save_draft(s.mask, s.scribbles, actions=s.actions, seconds=s.seconds)
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
        """Autosave a draft when it is time and something changed."""
        now = self._clock()
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
    def _save(self, *, scribbles_only: bool) -> None:
        s = self.state
        if self.blocked:
            self.message = ("this tile was saved by someone else: your work is in a draft; "
                            "Esc closes, reopen the tile to go on")
            return
        if scribbles_only:
            if not s.has_scribbles:
                self.message = "no scribbles to save (scribble tool: s)"
                return
            label, kind, state = s.scribbles, "scribble", "amended"
        else:
            label, kind = s.mask, "full"
            state = "amended" if s.changed else "accepted"
        s.note_activity()
        try:
            self.backend.save(label, kind=kind, state=state, actions=s.actions, seconds=s.seconds)
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
            self.message = f"saved, but the old draft could not be dropped: {exc}"
        self._finish("saved", kind=kind, state=state)

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
            return
        s.notice = ""
        self._run(command)
        if s.notice:
            self.message = s.notice

    def _answer(self, code: int) -> None:
        yes, no = code in ANSWER_YES, code in ANSWER_NO
        if not (yes or no):
            return
        question, self.question = self.question, None
        if question == "discard":
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
                self.state.restore_draft(draft.mask, draft.scribbles, actions=draft.actions,
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
            "refine": s.refine,
            "undo": s.undo,
            "redo": s.redo,
            "clear-scribbles": s.clear_scribbles,
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
            self._save(scribbles_only=False)
        elif command == "save-scribbles":
            self._save(scribbles_only=True)
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
        elif command == "heat":
            s.show_heat = not s.show_heat
        elif command == "overlay":
            s.show_overlay = not s.show_overlay
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
                s.press((row, col))
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
    def status_lines(self) -> tuple[str, str, str]:
        """The three lines of the status strip."""
        s = self.state
        line1 = (f"{self.title} | class {s.active_class} {s.active_name} | tool {s.tool} | "
                 f"radius {s.radius:.1f} | zoom {s.transform.zoom:.2f}")
        work = "unsaved changes" if self.has_work else "no changes"
        line2 = (f"{work} | actions {s.actions} | {s.seconds:.0f} s | snap "
                 f"{'on' if s.snap else 'off'} | Enter save, Esc leave, h keys")
        return line1, line2, self.message

    def frame(self) -> np.ndarray:
        """The whole window image: the view, overlays and the status strip (BGR)."""
        s = self.state
        view = s.render()
        if self.show_help:
            _table_panel(view, help_rows(s.schema), top=24, left=8)
        if self.question is not None:
            if self.question == "discard":
                lines = ["Unsaved work on this tile.", "Throw it away?  y = discard,  n = back"]
            else:
                d = self._pending_draft
                lines = [
                    "A draft of this tile from an earlier session was found",
                    f"({d.actions} actions, {d.seconds:.0f} s).",
                    "Restore it?  y = restore,  n = drop it",
                ]
            top = max(s.view_shape[0] // 2 - 30, 0)
            _panel(view, lines, top=top, left=8, line_px=20, scale=0.5)
        strip = np.full((STATUS_ROWS, view.shape[1], 3), 24, np.uint8)
        for i, line in enumerate(self.status_lines()):
            colour = (120, 200, 255) if i == 2 else (235, 235, 235)
            _text(strip, line, (6, 16 + 18 * i), scale=0.42, colour=colour)
        return np.vstack([view, strip])


def run_editor(
    state: EditorState,
    *,
    backend: EditorBackend,
    schema=None,
    title: str = "labeler edit",
    autosave_seconds: float = 5.0,
    poll_ms: int = 15,
    gui: Gui | None = None,
    clock: Callable[[], float] = time.monotonic,
) -> EditorOutcome:
    """Open the editor window for one tile and return when it closes.

    Parameters
    ----------
    state : EditorState
        The tile (its ``view_shape`` sets the window size, plus the status strip).
    backend : EditorBackend
        Where labels and drafts go.
    schema : ClassSchema, optional
        Must equal ``state.schema`` when given.
    title : str
        Window title; keep it unique (tests find the window by it).
    autosave_seconds : float
        Seconds between draft writes while there is unsaved work.
    poll_ms : int
        Milliseconds ``cv2.waitKeyEx`` waits per frame.
    gui : Gui, optional
        Window to use; default an OpenCV HighGUI window (needs a display).
    clock : callable
        Seconds for autosave timing.

    Returns
    -------
    EditorOutcome

    Raises
    ------
    labeler.errors.LabelerError
        When there is no display (Linux without ``DISPLAY``).
    """
    if schema is not None and schema != state.schema:
        raise ValueError(
            f"schema: expected the state's schema {state.schema!r}, got {schema!r}; build the "
            "EditorState with the project's schema"
        )
    if gui is None:
        require_display()
        gui = HighGuiWindow(title)
    session = EditorSession(state, backend=backend, title=title,
                            autosave_seconds=autosave_seconds, clock=clock)
    try:
        gui.open(session.frame_shape, session.on_mouse)
        session.start()
        while not session.done:
            gui.show(session.frame())
            code = gui.wait(poll_ms)
            session.raise_pending()
            if session.wheel_turned:
                session.wheel_turned = False
                getattr(gui, "after_wheel", lambda: None)()
            session.on_key(code)
            if not session.done and gui.closed():
                session.on_closed()
                break
            session.tick()
    except BaseException:
        session.rescue()
        raise
    finally:
        gui.close()
    assert session.outcome is not None
    return session.outcome
