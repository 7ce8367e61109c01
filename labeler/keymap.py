"""One key map for the terminal queue and the mask editor.

Every key the program binds is one row of :data:`KEYMAP`: the key, what it means, and
what it does in the queue (its screens) and in the editor window. A key means the same
thing wherever it works, because it has one row; a key that works in only one of the two
leaves the other empty, and does nothing there (the editor says which program it belongs
to). The queue's bindings and help screen (:mod:`labeler.tui.keys`,
:mod:`labeler.tui.help_screen`), the editor's bindings and help overlay
(:mod:`labeler.editor.keys`) and the README's key table (:func:`keymap_markdown`) are
all generated from this table; a test checks the README against it.

Plain data over the label schema: the queue (Textual) and the editor (OpenCV) both read
it without loading each other's toolkit.

Key codes
    ``codes`` are those ``cv2.waitKeyEx`` reports: ASCII for printable keys, and both
    the ASCII control code and the X keysym for Enter, Escape, Tab and Backspace (the Qt
    and GTK builds of OpenCV report one or the other). ``textual`` are Textual's key
    names.
"""

from __future__ import annotations

from dataclasses import dataclass

from labeler.classes import DEFAULT_SCHEMA, ClassSchema

__all__ = [
    "Place",
    "KeyRow",
    "KEYMAP",
    "ANSWER_YES",
    "ANSWER_NO",
    "row_for_key",
    "rows_for",
    "check_keymap",
    "class_keys",
    "keymap_markdown",
]

#: Screens of the queue app a key may be bound on.
SCREENS = ("app", "queue", "agreement", "models")


@dataclass(frozen=True)
class Place:
    """What a key runs on one screen of the queue app.

    Parameters
    ----------
    screen : str
        One of ``"app"`` (every screen), ``"queue"``, ``"agreement"``, ``"models"``.
    action : str
        The Textual action name (``"accept"`` runs ``action_accept``).
    label : str
        Short footer label.
    """

    screen: str
    action: str
    label: str


@dataclass(frozen=True)
class KeyRow:
    """One key of the key map.

    Parameters
    ----------
    key : str
        How the key is written in help and docs (``"a"``, ``"Enter"``, ``"?"``).
    queue : str
        What it does in the terminal queue ("" when it does nothing there).
    editor : str
        What it does in the editor window ("" when it does nothing there).
    places : tuple of Place
        Its Textual bindings, per screen (empty when not a queue key).
    command : str
        The editor's command name ("" when not an editor key).
    textual : str
        Textual's name of the key (default ``key``).
    codes : tuple of int
        ``cv2.waitKeyEx`` codes (default the character codes of ``key``).
    footer : bool
        Shown in the queue's footer.
    """

    key: str
    queue: str = ""
    editor: str = ""
    places: tuple[Place, ...] = ()
    command: str = ""
    textual: str = ""
    codes: tuple[int, ...] = ()
    footer: bool = True

    @property
    def textual_key(self) -> str:
        """Textual's name of the key."""
        return self.textual or self.key

    @property
    def key_codes(self) -> tuple[int, ...]:
        """``cv2.waitKeyEx`` codes of the key."""
        return self.codes or tuple(ord(c) for c in self.key)


_ENTER = (13, 10, 0xFF0D, 0xFF8D)
_ESCAPE = (27, 0xFF1B)
_TAB = (9, 0xFF09)
_BACKSPACE = (8, 0xFF08)


def _tool(key: str, name: str, use: str) -> KeyRow:
    return KeyRow(key, editor=f"tool {name}: {use}", command=f"tool:{name}")


#: Every key, in the order help and docs list them: the annotator's keys first.
KEYMAP: tuple[KeyRow, ...] = (
    KeyRow("e", queue="open the selected tile in the mask editor window (needs a display); "
           "on the agreement screen, open the selected contested tile to settle it",
           places=(Place("queue", "edit", "edit"), Place("agreement", "settle", "settle"))),
    KeyRow("a", queue="accept: keep the proposal shown in the preview, unchanged, as your "
           "mask, and move on to your next tile",
           places=(Place("queue", "accept", "accept"),)),
    KeyRow("p", queue="park the selected tile (set it aside), with an optional reason; on a "
           "parked tile, bring it back", places=(Place("queue", "park", "park"),)),
    KeyRow("n", queue="jump to the next tile you may take",
           places=(Place("queue", "next", "next"),)),
    KeyRow("Enter", editor="save the mask (accepted if unchanged, amended if changed; when "
           "settling, asks first)", command="save", codes=_ENTER),
    KeyRow("k", editor="keep the weak label: save it alone (state weak)",
           command="save-weak-label"),
    KeyRow("Esc", queue="go back: close the help, or return from the agreement or model "
           "screen to the queue",
           editor="close the editor; asks before dropping unsaved work",
           places=(Place("agreement", "back", "back"), Place("models", "back", "back")),
           command="leave", textual="escape", codes=_ESCAPE),
    _tool("d", "brush", "drag to paint the active class"),
    _tool("x", "erase", "drag to put the proposal back under the stroke"),
    _tool("v", "polygon", "click vertices; space, or a click on the first vertex, fills it"),
    _tool("f", "fill", "click inside a plant or a soil patch: its connected part on that "
          "side of the plant/soil split, up to colour edges, takes the class (at most half "
          "the tile); shift-click takes the whole connected same-class region"),
    _tool("o", "box", "drag a box round one plant: GrabCut finds it, in the active class"),
    _tool("s", "scribble", "drag marks of the active class into the weak label (for refine)"),
    KeyRow("r", editor="refine: weak label + mask -> mask near the marks", command="refine"),
    KeyRow("i", editor="learn from your marks on this tile: the model re-proposes the whole "
           "tile (your weak label and hand edits are kept)", command="relearn"),
    KeyRow("j", editor="refine snaps to superpixels: on / off", command="snap"),
    KeyRow("u", editor="undo the last edit", command="undo"),
    KeyRow("U", editor="redo (shift-u: undo the undo)", command="redo"),
    KeyRow("c", editor="clear the weak label", command="clear-weak-label"),
    KeyRow("space", editor="close and fill the open polygon", command="close-polygon",
           codes=(32,)),
    KeyRow("Backspace", editor="drop the last polygon vertex", command="drop-vertex",
           codes=_BACKSPACE),
    KeyRow(",", editor="smaller brush", command="radius-down"),
    KeyRow(".", editor="larger brush", command="radius-up"),
    KeyRow(";", editor="fainter overlay", command="opacity-down"),
    KeyRow("'", editor="stronger overlay", command="opacity-up"),
    KeyRow("l", editor="region outlines: on / off", command="outlines"),
    KeyRow("b", editor="bare tile: the mask overlay off / on", command="overlay"),
    KeyRow("h", editor="uncertainty heat map of the proposal: on / off", command="heat"),
    KeyRow("+ or =", queue="zoom the preview in: the part round its centre, up to full "
           "resolution and beyond (a click on the preview centres it)",
           editor="zoom in at the pointer", command="zoom-in", codes=(43, 61),
           places=(Place("queue", "zoom_in", "zoom"),), textual="plus,equals_sign",
           footer=False),
    KeyRow("-", queue="zoom the preview out", editor="zoom out at the pointer",
           command="zoom-out", places=(Place("queue", "zoom_out", "zoom out"),),
           textual="minus", footer=False),
    KeyRow("w", queue="show the whole tile in the preview",
           editor="fit the whole tile in the view", command="whole",
           places=(Place("queue", "whole", "whole tile"),), footer=False),
    KeyRow("Tab", editor="side-by-side view with the other masks: on / off", command="compare",
           codes=_TAB),
    KeyRow("/", queue="find a tile: type its id in the search box, then Enter",
           places=(Place("queue", "find", "find"),), textual="slash", footer=False),
    KeyRow("F5", queue="compute again: re-pick the queue order (in the background); on the "
           "agreement screen, the agreement figures",
           places=(Place("queue", "repick", "re-pick"), Place("agreement", "update", "update")),
           textual="f5", codes=()),
    KeyRow("t", queue="retrain the model on the saved masks (in the background), show its "
           "IoU, then renew the proposals of open tiles and re-pick",
           places=(Place("queue", "retrain", "retrain"),)),
    KeyRow("g", queue="open the agreement screen: annotator pairs, classes and contested tiles",
           places=(Place("app", "agreement", "agreement"),)),
    KeyRow("m", queue="open the model screen: every model version with its validation IoU "
           "per class", places=(Place("app", "models", "models"),)),
    KeyRow("?", queue="show the keys", editor="show the keys: on / off",
           places=(Place("app", "help", "help"),), command="help", textual="question_mark"),
    KeyRow("q", queue="leave the queue; every saved mask is already in the store",
           places=(Place("app", "quit", "quit"),)),
)

#: Answers to the editor's questions (settle? discard? restore the draft?): y and n
#: (or Esc) answer; they are bound to nothing else.
ANSWER_YES: tuple[int, ...] = (ord("y"), ord("Y"))
ANSWER_NO: tuple[int, ...] = (ord("n"), ord("N"), *_ESCAPE)


_ANSWER_LETTERS = tuple(ord(c) for c in "yYnN")


def row_for_key(key: str) -> KeyRow:
    """The row of ``key`` (as written in :attr:`KeyRow.key`).

    Raises
    ------
    KeyError
        If no row has that key (the message lists the keys).
    """
    for row in KEYMAP:
        if row.key == key:
            return row
    raise KeyError(f"key: expected one of {', '.join(r.key for r in KEYMAP)}, got {key!r}")


def rows_for(where: str) -> tuple[KeyRow, ...]:
    """The rows that do something in ``where``: ``"queue"`` or ``"editor"``.

    Raises
    ------
    ValueError
        If ``where`` is neither.
    """
    if where == "queue":
        return tuple(r for r in KEYMAP if r.queue)
    if where == "editor":
        return tuple(r for r in KEYMAP if r.editor)
    raise ValueError(f"where: expected 'queue' or 'editor', got {where!r}")


def check_keymap(rows: tuple[KeyRow, ...] = KEYMAP) -> None:
    """Raise ``ValueError`` unless every key has one row and one meaning everywhere.

    Checked: keys, editor key codes and Textual key names are unique; the answer keys
    y and n are bound to nothing; every row does something; an editor row has a command
    and a queue row a place on a known screen, and no screen binds a key twice.
    """
    problems = []
    keys = [r.key for r in rows]
    problems += [f"key {k!r} has {keys.count(k)} rows" for k in set(keys) if keys.count(k) > 1]
    seen: dict[int, str] = {}
    names: dict[str, str] = {}
    for r in rows:
        if not (r.queue or r.editor):
            problems.append(f"key {r.key!r} does nothing")
        if bool(r.editor) != bool(r.command):
            problems.append(f"key {r.key!r}: an editor text needs a command and vice versa")
        if bool(r.queue) != bool(r.places):
            problems.append(f"key {r.key!r}: a queue text needs a place and vice versa")
        if r.editor:
            for code in r.key_codes:
                if code in seen or code in _ANSWER_LETTERS:
                    problems.append(f"key code {code} of {r.key!r} is taken")
                seen[code] = r.key
        for p in r.places:
            if p.screen not in SCREENS:
                problems.append(f"key {r.key!r}: unknown screen {p.screen!r}")
        if r.places:
            if r.textual_key in names:
                problems.append(f"Textual key {r.textual_key!r} is taken by {names[r.textual_key]!r}")
            names[r.textual_key] = r.key
        screens = [p.screen for p in r.places]
        if len(set(screens)) != len(screens):
            problems.append(f"key {r.key!r} is bound twice on one screen")
    if problems:
        raise ValueError("key map: " + "; ".join(sorted(problems)))


def class_keys(schema: ClassSchema = DEFAULT_SCHEMA) -> str:
    """What the digit keys select: ``"0 soil, 1 crop, 2 weed, 3 symptom"``.

    Parameters
    ----------
    schema : ClassSchema
        The project's classes (those with an index of 9 or less have a key).

    Returns
    -------
    str
    """
    return ", ".join(f"{c.index} {c.name}" for c in schema.classes if c.index <= 9)


def _md_key(key: str) -> str:
    return " or ".join(f"`{part}`" for part in key.split(" or "))


def keymap_markdown(schema: ClassSchema = DEFAULT_SCHEMA) -> str:
    """The key map as a Markdown table (key, in the queue, in the editor), for the README.

    Parameters
    ----------
    schema : ClassSchema
        The classes the digit keys select.

    Returns
    -------
    str
        The table, then a line on the editor's questions; ends with a newline.
    """
    lines = ["| key | in the queue | in the editor |", "|---|---|---|"]
    lines.append(f"| `0`-`9` |  | active class: the digit is the class index "
                 f"({class_keys(schema)}) |")
    for r in KEYMAP:
        lines.append(f"| {_md_key(r.key)} | {r.queue} | {r.editor} |")
    lines += [
        "",
        "A key means the same wherever it works; an empty cell means the key does nothing "
        "there. In a question of the editor (settle? discard unsaved work? restore a "
        "draft?) `y` answers yes and `n` or `Esc` answers no.",
    ]
    return "\n".join(lines) + "\n"


check_keymap()
