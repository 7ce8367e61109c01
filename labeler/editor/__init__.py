"""The mask editor: a pure state with its parts, the loop logic, and the OpenCV shell.

* :mod:`~labeler.editor.view` -- view geometry (tile <-> view coordinates, zoom, panes);
* :mod:`~labeler.editor.history` -- undo history of compact diffs;
* :mod:`~labeler.editor.tools` -- the tools and pointer gestures;
* :mod:`~labeler.editor.render` -- drawing the view;
* :mod:`~labeler.editor.state` -- :class:`EditorState`, the facade over those four;
* :mod:`~labeler.editor.keys` -- the key and mouse table;
* :mod:`~labeler.editor.backend` -- where a session saves (interface, in-memory backend);
* :mod:`~labeler.editor.session` -- one session's logic without a window;
* :mod:`~labeler.editor.panels` -- the status strip and text panels;
* :mod:`~labeler.editor.window` -- the HighGUI window and its loop (the only module that
  opens a window);
* :mod:`~labeler.editor.opening` -- opening a project's tile (``labeler edit``); not
  imported here, as it loads the project's workflow.
"""

from labeler.editor.backend import (
    SAVE_KINDS,
    Draft,
    EditorBackend,
    MemoryBackend,
    SavedDraft,
    SavedLabel,
)
from labeler.editor.history import Change, EditHistory
from labeler.editor.keys import BINDINGS, TOOL_NAMES, TOOLS, keys_markdown
from labeler.editor.panels import STATUS_ROWS
from labeler.editor.render import Marks, Renderer
from labeler.editor.session import EditorOutcome, EditorSession
from labeler.editor.state import EditorState
from labeler.editor.tools import STROKE_KINDS, EditingTools
from labeler.editor.view import PANE_GAP, Viewport, ViewTransform, fit_view_shape
from labeler.editor.window import Gui, HighGuiWindow, require_display, run_editor

__all__ = [
    "SAVE_KINDS",
    "Draft",
    "EditorBackend",
    "MemoryBackend",
    "SavedDraft",
    "SavedLabel",
    "Change",
    "EditHistory",
    "BINDINGS",
    "TOOL_NAMES",
    "TOOLS",
    "keys_markdown",
    "STATUS_ROWS",
    "Marks",
    "Renderer",
    "EditorOutcome",
    "EditorSession",
    "EditorState",
    "STROKE_KINDS",
    "EditingTools",
    "PANE_GAP",
    "ViewTransform",
    "Viewport",
    "fit_view_shape",
    "Gui",
    "HighGuiWindow",
    "require_display",
    "run_editor",
]
