"""The editor's tools, keys and mouse gestures, read by the window and the help overlay.

The keys come from the key map the queue shares (:data:`labeler.keymap.KEYMAP`): a letter
means the same in the queue and in the editor. This module turns the map's editor rows
into :data:`BINDINGS` (command per ``cv2.waitKeyEx`` code) and :data:`TOOLS`, and adds
the mouse. The README's key table is :func:`labeler.keymap.keymap_markdown`;
:func:`keys_markdown` is the editor's part of it with the mouse.

Key codes are those of ``cv2.waitKeyEx``: ASCII for printable keys, and both the ASCII
control code and the X keysym for Enter, Escape, Tab, Backspace (the Qt and GTK builds of
OpenCV report one or the other). Modifier keys alone report codes that map to nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

from labeler.classes import DEFAULT_SCHEMA, ClassSchema
from labeler.keymap import ANSWER_NO, ANSWER_YES, KEYMAP, KeyRow, class_keys

__all__ = [
    "Tool",
    "Binding",
    "TOOLS",
    "TOOL_NAMES",
    "BINDINGS",
    "MOUSE",
    "ANSWER_YES",
    "ANSWER_NO",
    "command_for",
    "class_for",
    "elsewhere_for",
    "help_rows",
    "keys_markdown",
]


@dataclass(frozen=True)
class Tool:
    """An editing tool: what the left mouse button does.

    Parameters
    ----------
    name : str
        Tool name shown in the status line.
    key : str
        The key that selects it.
    use : str
        What the left button does with it.
    """

    name: str
    key: str
    use: str


@dataclass(frozen=True)
class Binding:
    """A key (or several equivalent keys) and the command it runs.

    Parameters
    ----------
    command : str
        Command name handled by the window (``"save"``, ``"tool:brush"``, ...).
    label : str
        How the key is written in help and docs.
    codes : tuple of int
        ``cv2.waitKeyEx`` codes that run the command.
    summary : str
        One line of help.
    """

    command: str
    label: str
    codes: tuple[int, ...]
    summary: str


TOOLS: tuple[Tool, ...] = tuple(
    Tool(r.command[5:], r.key, r.editor.split(": ", 1)[1])
    for r in KEYMAP
    if r.command.startswith("tool:")
)
TOOL_NAMES: tuple[str, ...] = tuple(t.name for t in TOOLS)

BINDINGS: tuple[Binding, ...] = tuple(
    Binding(r.command, r.key, r.key_codes, r.editor) for r in KEYMAP if r.command
)

#: Mouse gestures: (gesture, effect).
MOUSE: tuple[tuple[str, str], ...] = (
    ("left button", "use the current tool"),
    ("right or middle drag", "pan the view"),
    ("wheel", "zoom in / out at the pointer"),
)

_BY_CODE: dict[int, str] = {}
for _b in BINDINGS:
    for _code in _b.codes:
        if _code in _BY_CODE:
            raise RuntimeError(f"key code {_code} is bound twice ({_BY_CODE[_code]}, {_b.command})")
        _BY_CODE[_code] = _b.command


_ELSEWHERE: dict[int, KeyRow] = {
    ord(r.key): r for r in KEYMAP if not r.command and len(r.key) == 1
}


def command_for(code: int) -> str | None:
    """The command bound to a ``cv2.waitKeyEx`` code, or None."""
    return _BY_CODE.get(int(code))


def elsewhere_for(code: int) -> KeyRow | None:
    """The key map's row of a key that works in the queue but not in the editor, or None."""
    return _ELSEWHERE.get(int(code))


def class_for(code: int, schema: ClassSchema = DEFAULT_SCHEMA) -> int | None:
    """The class index selected by a digit key (the digit is the class index), or None."""
    code = int(code)
    if ord("0") <= code <= ord("9"):
        index = code - ord("0")
        if index in schema.indices:
            return index
    return None


def help_rows(schema: ClassSchema = DEFAULT_SCHEMA) -> list[tuple[str, str]]:
    """Rows ``(key or gesture, what it does)`` of the help overlay: classes, keys, mouse."""
    rows = [("0-9", f"active class ({class_keys(schema)})")]
    rows += [(b.label, b.summary) for b in BINDINGS]
    rows += list(MOUSE)
    return rows


def keys_markdown(schema: ClassSchema = DEFAULT_SCHEMA) -> str:
    """The editor's keys and the mouse as Markdown (the README's shared table is
    :func:`labeler.keymap.keymap_markdown`)."""
    rows = ["| key | does |", "|---|---|"]
    rows.append(f"| `0`-`9` | active class: the digit is the class index ({class_keys(schema)}) |")
    for b in BINDINGS:
        label = " or ".join(f"`{part}`" for part in b.label.split(" or "))
        rows.append(f"| {label} | {b.summary} |")
    rows += ["", "| mouse | does |", "|---|---|"]
    rows += [f"| {g} | {e} |" for g, e in MOUSE]
    rows += [
        "",
        "In a question (discard unsaved work? restore a draft?) `y` answers yes and `n` or "
        "`Esc` answers no.",
        "",
        "Masks drawn in the editor are decision support only: before they drive spraying or "
        "fungicide timing, local regulations and licensed agronomic advice come first.",
    ]
    return "\n".join(rows) + "\n"
