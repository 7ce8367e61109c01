"""The keys of the terminal queue: footer bindings and the help screen.

Generated from the key map the editor shares (:data:`labeler.keymap.KEYMAP`), so a
letter means the same in the queue and in the editor window.
"""

from __future__ import annotations

from dataclasses import dataclass

from textual.binding import Binding

from labeler.keymap import KEYMAP

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


def _keys(screen: str) -> tuple[Key, ...]:
    """The keys of one screen, from the shared key map."""
    return tuple(
        Key(row.textual_key, p.action, p.label, row.queue, shown=row.footer,
            display=row.key if row.key != row.textual_key else "")
        for row in KEYMAP
        for p in row.places
        if p.screen == screen
    )


#: Keys that work on every screen.
APP_KEYS: tuple[Key, ...] = _keys("app")

#: Keys of the queue screen.
QUEUE_KEYS: tuple[Key, ...] = _keys("queue")

#: Keys of the agreement screen (besides the way back).
AGREEMENT_KEYS: tuple[Key, ...] = tuple(k for k in _keys("agreement") if k.action != "back")

#: Keys of the agreement and model screens.
SUBSCREEN_KEYS: tuple[Key, ...] = tuple(k for k in _keys("models") if k.action == "back")


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
