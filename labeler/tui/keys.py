"""The keys of the terminal queue, in one table: footer bindings and the help screen."""

from __future__ import annotations

from dataclasses import dataclass

from textual.binding import Binding

__all__ = [
    "HEADER_ICON",
    "Key",
    "APP_KEYS",
    "QUEUE_KEYS",
    "AGREEMENT_KEYS",
    "SUBSCREEN_KEYS",
    "bindings",
]

#: The character at the left of every screen's header (a chequered plot).
HEADER_ICON = "\u259a"


@dataclass(frozen=True)
class Key:
    """One key: what it runs, its short footer label and the sentence the help shows."""

    key: str
    action: str
    label: str
    explain: str
    shown: bool = True
    display: str = ""

    @property
    def shown_as(self) -> str:
        """How the help screen writes the key."""
        return self.display or self.key


#: Keys that work on every screen.
APP_KEYS: tuple[Key, ...] = (
    Key("g", "agreement", "agreement",
        "open the agreement screen: annotator pairs, classes and contested tiles"),
    Key("m", "models", "models",
        "open the model screen: every model version with its validation IoU per class"),
    Key("question_mark", "help", "help", "show this list of keys", display="?"),
    Key("q", "quit", "quit", "leave the queue; every saved mask is already in the store"),
)

#: Keys of the queue screen.
QUEUE_KEYS: tuple[Key, ...] = (
    Key("e", "edit", "edit",
        "open the selected tile in the mask editor window (needs a display)"),
    Key("a", "accept", "accept",
        "keep the proposal shown in the preview, unchanged, as your mask, and move on"),
    Key("p", "park", "park",
        "set the selected tile aside, with an optional reason; on a parked tile, bring it back"),
    Key("n", "next", "next", "jump to the next tile you may take"),
    Key("r", "repick", "re-pick", "ask the picker for a new queue order (runs in the background)"),
    Key("t", "retrain", "retrain",
        "train the model on the saved masks (runs in the background), then show its IoU"),
    Key("slash", "find", "find", "type a tile id in the search box and press Enter",
        shown=False, display="/"),
)

#: Keys of the agreement screen.
AGREEMENT_KEYS: tuple[Key, ...] = (
    Key("s", "settle", "settle",
        "open the selected contested tile in the editor with both masks, to decide it"),
    Key("u", "update", "update", "compute the figures again from the store"),
)

#: Keys of the agreement and model screens.
SUBSCREEN_KEYS: tuple[Key, ...] = (
    Key("escape", "back", "back", "return to the queue", display="Esc"),
)


def bindings(keys: tuple[Key, ...]) -> list[Binding]:
    """Textual bindings of ``keys`` (footer label = ``Key.label``).

    Parameters
    ----------
    keys : tuple of Key
        A screen's keys.

    Returns
    -------
    list of textual.binding.Binding
        One binding per key, shown in the footer when ``Key.shown``.
    """
    return [Binding(k.key, k.action, k.label, show=k.shown) for k in keys]
