"""The editor's tools, keys and mouse gestures: one table, read by the window, the help
overlay and the README (:func:`keys_markdown`).

Key codes are those of ``cv2.waitKeyEx``: ASCII for printable keys, and both the ASCII
control code and the X keysym for Enter, Escape, Tab, Backspace (the Qt and GTK builds of
OpenCV report one or the other). Modifier keys alone report codes that map to nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

from labeler.classes import DEFAULT_SCHEMA, ClassSchema

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


TOOLS: tuple[Tool, ...] = (
    Tool("brush", "d", "drag to paint the active class"),
    Tool("erase", "x", "drag to put the proposal back under the stroke"),
    Tool("polygon", "v", "click vertices; space, or a click on the first vertex, fills it"),
    Tool("fill", "f", "click a region: its 4-connected part up to colour edges takes the class"),
    Tool("box", "o", "drag a box round one plant: GrabCut finds it, in the active class"),
    Tool("scribble", "s", "drag marks of the active class into the weak label (for refine)"),
)
TOOL_NAMES: tuple[str, ...] = tuple(t.name for t in TOOLS)

_ENTER = (13, 10, 0xFF0D, 0xFF8D)
_ESCAPE = (27, 0xFF1B)
_TAB = (9, 0xFF09)
_BACKSPACE = (8, 0xFF08)


def _k(ch: str) -> tuple[int, ...]:
    return tuple(ord(c) for c in ch)


BINDINGS: tuple[Binding, ...] = (
    *(Binding(f"tool:{t.name}", t.key, _k(t.key), f"tool {t.name}: {t.use}") for t in TOOLS),
    Binding("save", "Enter", _ENTER, "save the mask (accepted if unchanged, amended if changed)"),
    Binding("save-weak-label", "p", _k("p"), "save the weak label alone"),
    Binding("leave", "Esc", _ESCAPE, "close the editor; asks before dropping unsaved work"),
    Binding("refine", "r", _k("r"), "refine: weak label + mask -> mask near the marks"),
    Binding("relearn", "i", _k("i"),
            "learn from your marks on this tile: the model re-proposes the whole tile "
            "(your weak label and hand edits are kept)"),
    Binding("snap", "n", _k("n"), "refine snaps to superpixels: on / off"),
    Binding("undo", "u", _k("u"), "undo the last edit"),
    Binding("redo", "a", _k("a"), "redo (again)"),
    Binding("clear-weak-label", "c", _k("c"), "clear the weak label"),
    Binding("close-polygon", "space", _k(" "), "close and fill the open polygon"),
    Binding("drop-vertex", "Backspace", _BACKSPACE, "drop the last polygon vertex"),
    Binding("radius-down", ",", _k(","), "smaller brush"),
    Binding("radius-up", ".", _k("."), "larger brush"),
    Binding("opacity-down", ";", _k(";"), "fainter overlay"),
    Binding("opacity-up", "'", _k("'"), "stronger overlay"),
    Binding("outlines", "l", _k("l"), "region outlines: on / off"),
    Binding("heat", "m", _k("m"), "uncertainty heat map: on / off"),
    Binding("overlay", "t", _k("t"), "mask overlay: on / off (see the bare tile)"),
    Binding("zoom-in", "+ or =", _k("+="), "zoom in at the pointer"),
    Binding("zoom-out", "-", _k("-"), "zoom out at the pointer"),
    Binding("whole", "w", _k("w"), "fit the whole tile in the view"),
    Binding("compare", "Tab", _TAB, "side-by-side view with the other mask: on / off"),
    Binding("help", "h", _k("h"), "this help: on / off"),
)

#: Mouse gestures: (gesture, effect).
MOUSE: tuple[tuple[str, str], ...] = (
    ("left button", "use the current tool"),
    ("right or middle drag", "pan the view"),
    ("wheel", "zoom in / out at the pointer"),
)

#: Answers to the editor's questions (discard? restore the draft?).
ANSWER_YES = _k("yY")
ANSWER_NO = _k("nN") + _ESCAPE

_BY_CODE: dict[int, str] = {}
for _b in BINDINGS:
    for _code in _b.codes:
        if _code in _BY_CODE:
            raise RuntimeError(f"key code {_code} is bound twice ({_BY_CODE[_code]}, {_b.command})")
        _BY_CODE[_code] = _b.command


def command_for(code: int) -> str | None:
    """The command bound to a ``cv2.waitKeyEx`` code, or None."""
    return _BY_CODE.get(int(code))


def class_for(code: int, schema: ClassSchema = DEFAULT_SCHEMA) -> int | None:
    """The class index selected by a digit key (the digit is the class index), or None."""
    code = int(code)
    if ord("0") <= code <= ord("9"):
        index = code - ord("0")
        if index in schema.indices:
            return index
    return None


def _class_line(schema: ClassSchema) -> str:
    return ", ".join(f"{c.index} {c.name}" for c in schema.classes if c.index <= 9)


def help_rows(schema: ClassSchema = DEFAULT_SCHEMA) -> list[tuple[str, str]]:
    """Rows ``(key or gesture, what it does)`` of the help overlay: classes, keys, mouse."""
    rows = [("0-9", f"active class ({_class_line(schema)})")]
    rows += [(b.label, b.summary) for b in BINDINGS]
    rows += list(MOUSE)
    return rows


def keys_markdown(schema: ClassSchema = DEFAULT_SCHEMA) -> str:
    """The key table as Markdown, for the README."""
    rows = ["| key | does |", "|---|---|"]
    rows.append(f"| `0`-`9` | active class: the digit is the class index ({_class_line(schema)}) |")
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
