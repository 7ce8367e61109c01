"""The OpenCV HighGUI shell of the mask editor.

:func:`run_editor` opens one window for one tile and runs the loop: it shows the frame
that :class:`~labeler.editor.session.EditorSession` draws, waits for a key, and hands keys
and mouse events to the session until it is done. This is the only module of the project
that calls ``cv2.namedWindow``, ``cv2.imshow``, ``cv2.waitKeyEx`` and
``cv2.setMouseCallback``; everything else of the editor works without a window.

Mouse: the left button uses the current tool; a right (or middle) button drag pans; the
wheel zooms about the pointer.

Caution: a mask made here may end up driving a field operation (spot spraying, fungicide
timing). Masks are decision support only; local regulations and licensed agronomic advice
come first.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable
from typing import Protocol

import cv2
import numpy as np

from labeler.classes import ClassSchema
from labeler.editor.backend import EditorBackend
from labeler.editor.session import EditorOutcome, EditorSession
from labeler.editor.state import EditorState
from labeler.errors import LabelerError

__all__ = ["Gui", "HighGuiWindow", "run_editor", "require_display"]


class Gui(Protocol):
    """The window the loop talks to (HighGUI in use, a script in tests)."""

    def open(self, frame_shape: tuple[int, int],
             on_mouse: Callable[[int, int, int, int], None]) -> None:
        """Open the window for frames of ``(rows, cols)``; mouse events go to
        ``on_mouse(event, x, y, flags)`` (HighGUI event codes, frame pixels)."""
        ...

    def show(self, frame: np.ndarray) -> None:
        """Show a (rows, cols, 3) uint8 BGR frame."""
        ...

    def wait(self, ms: int) -> int:
        """Handle window events for up to ``ms`` milliseconds; the key code, or -1."""
        ...

    def after_wheel(self) -> None:
        """Called after a wheel event was handled (optional; see HighGuiWindow)."""
        ...

    def closed(self) -> bool:
        """True once the user closed the window from its frame."""
        ...

    def close(self) -> None:
        """Close the window (no error when it is already closed)."""
        ...


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
        """Open the window and route its mouse events to ``on_mouse`` (see :class:`Gui`)."""
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
        """Show a BGR frame."""
        cv2.imshow(self.title, frame)

    def wait(self, ms: int) -> int:
        """``cv2.waitKeyEx`` for at least 1 ms: the key code, or -1."""
        return int(cv2.waitKeyEx(max(int(ms), 1)))

    def closed(self) -> bool:
        """True once the window was closed from its frame."""
        try:
            return cv2.getWindowProperty(self.title, cv2.WND_PROP_VISIBLE) < 1
        except cv2.error:
            return True

    def close(self) -> None:
        """Close the window (no error when it is already gone)."""
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


def run_editor(
    state: EditorState,
    *,
    backend: EditorBackend,
    schema: ClassSchema | None = None,
    title: str = "labeler edit",
    autosave_seconds: float = 5.0,
    heartbeat_seconds: float = 60.0,
    poll_ms: int = 15,
    gui: Gui | None = None,
    clock: Callable[[], float] = time.monotonic,
    settling: bool = False,
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
    heartbeat_seconds : float
        Seconds between renewals of the tile's hold while the window is open.
    poll_ms : int
        Milliseconds ``cv2.waitKeyEx`` waits per frame.
    gui : Gui, optional
        Window to use; default an OpenCV HighGUI window (needs a display).
    clock : callable
        Seconds for autosave timing.
    settling : bool
        A reviewer settles a contested tile: Enter asks before it saves
        (:class:`~labeler.editor.session.EditorSession`).

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
                            autosave_seconds=autosave_seconds,
                            heartbeat_seconds=heartbeat_seconds, clock=clock,
                            settling=settling)
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
