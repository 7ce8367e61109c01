"""The help screen: every key of the queue with one sentence each."""

from __future__ import annotations

from rich.table import Table
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Label, Static

from labeler.tui.keys import AGREEMENT_KEYS, APP_KEYS, QUEUE_KEYS, SUBSCREEN_KEYS, Key

__all__ = ["HelpScreen", "key_table"]

_CAUTION = (
    "Masks are decision support for training models. Where a mask feeds spraying or "
    "fungicide decisions, local regulations and licensed agronomic advice come first."
)


def key_table() -> Table:
    """The keys as a Rich table: key, where it works, what it does.

    Returns
    -------
    rich.table.Table
        One row per key of the queue, the agreement and model screens and the app.
    """
    table = Table(box=None, pad_edge=False, show_header=True, header_style="bold")
    table.add_column("key", no_wrap=True)
    table.add_column("where", no_wrap=True)
    table.add_column("what it does")
    groups: tuple[tuple[str, tuple[Key, ...]], ...] = (
        ("queue", QUEUE_KEYS),
        ("agreement", AGREEMENT_KEYS),
        ("agreement, models", SUBSCREEN_KEYS),
        ("everywhere", APP_KEYS),
    )
    for where, keys in groups:
        for k in keys:
            table.add_row(k.shown_as, where, k.explain)
    return table


class HelpScreen(ModalScreen[None]):
    """A list of keys over the current screen; any of Esc, ? or q closes it."""

    BINDINGS = [
        Binding("escape", "close", "close"),
        Binding("question_mark", "close", "close", show=False),
        Binding("q", "close", "close", show=False),
    ]

    def compose(self) -> ComposeResult:
        with Vertical(id="help-box"):
            yield Label("Keys of the labeler queue", classes="title")
            yield Static(key_table(), id="help-keys")
            yield Static(
                "Filters sit above the table: state, predicted class and person. The preview "
                "shows the selected tile with its saved mask, or else its proposal.",
                id="help-filters",
            )
            yield Static(_CAUTION, id="help-caution")
            yield Label("Esc closes this list", id="help-close")

    def action_close(self) -> None:
        self.dismiss(None)
