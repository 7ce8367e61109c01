"""The help screen: the key map shared by the queue and the editor, one row per key."""

from __future__ import annotations

from rich.table import Table
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Label, Static

from labeler.keymap import KEYMAP, class_keys

__all__ = ["HelpScreen", "key_table"]

_CAUTION = (
    "Masks are decision support for training models. Where a mask feeds spraying or "
    "fungicide decisions, local regulations and licensed agronomic advice come first."
)


def key_table(schema=None) -> Table:
    """The key map as a Rich table: key, what it does in the queue, in the editor.

    Parameters
    ----------
    schema : ClassSchema, optional
        The classes the editor's digit keys select (default: the default classes).

    Returns
    -------
    rich.table.Table
        One row per key of :data:`labeler.keymap.KEYMAP`, after a row for the digits;
        a key means the same wherever it works.
    """
    table = Table(box=None, pad_edge=False, show_header=True, header_style="bold")
    table.add_column("key", no_wrap=True)
    table.add_column("in the queue", ratio=1)
    table.add_column("in the editor window", ratio=1)
    digits = class_keys() if schema is None else class_keys(schema)
    table.add_row("0-9", "", f"active class ({digits})")
    for row in KEYMAP:
        table.add_row(row.key, row.queue, row.editor)
    return table


class HelpScreen(ModalScreen[None]):
    """A list of keys over the current screen; any of Esc, ? or q closes it."""

    BINDINGS = [
        Binding("escape", "close", "close"),
        Binding("question_mark", "close", "close", show=False),
        Binding("q", "close", "close", show=False),
    ]

    def compose(self) -> ComposeResult:
        with VerticalScroll(id="help-box"):
            yield Label("Keys of the labeler queue and editor (one meaning each)",
                        classes="title")
            yield Static(key_table(self.app.project.settings.classes), id="help-keys")
            yield Static(
                "Filters sit above the table: state, predicted class and person. The preview "
                "shows the selected tile with its saved mask, or else its proposal.",
                id="help-filters",
            )
            yield Static(_CAUTION, id="help-caution")
            yield Label("Esc closes this list; arrows or the wheel scroll it", id="help-close")

    def action_close(self) -> None:
        self.dismiss(None)
