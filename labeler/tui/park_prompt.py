"""The small box that asks why a tile is parked (the answer is optional)."""

from __future__ import annotations

from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Input, Label

__all__ = ["ParkPrompt"]


class ParkPrompt(ModalScreen[str | None]):
    """Ask for an optional reason; Enter parks (with or without one), Esc does not park.

    Parameters
    ----------
    tile_id : int
        The tile about to be parked (named in the box).

    The screen is dismissed with the reason typed (``""`` for none), or None when the
    annotator changed their mind.
    """

    BINDINGS = [Binding("escape", "cancel", "keep it in the queue")]

    def __init__(self, tile_id: int) -> None:
        super().__init__()
        self.tile_id = tile_id

    def compose(self) -> ComposeResult:
        with Vertical(id="park-box"):
            yield Label(f"Park tile {self.tile_id}: why? (optional)", classes="title")
            yield Input(placeholder="e.g. blurred, ask the agronomist; Enter parks",
                        id="park-reason")
            yield Label("Enter parks it · Esc keeps it in the queue")

    def on_mount(self) -> None:
        self.query_one("#park-reason", Input).focus()

    @on(Input.Submitted, "#park-reason")
    def _submitted(self, event: Input.Submitted) -> None:
        self.dismiss(event.value.strip())

    def action_cancel(self) -> None:
        self.dismiss(None)
