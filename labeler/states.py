"""Tile life cycle: the state names and the allowed moves between them.

``unseen`` (no proposal) -> ``proposed`` (a model version proposed a mask) -> ``held``
(an annotator has it open) -> ``accepted`` (proposal kept unchanged) or ``amended``
(corrected) or ``imported`` (a mask brought in from elsewhere by ``labeler import``) ->
optionally ``contested`` (annotators disagree beyond the project's threshold) ->
``settled`` (a reviewer decided). ``parked`` = set aside by an annotator.

The allowed moves are the table ``_MOVES`` below; :func:`check_move` is the one
life-cycle check, applied by the store to every change of a tile's state (see
:func:`labeler.store.holds.checked_move`). A full mask brought in by ``labeler import``
is recorded as an ``imported`` annotation and leaves its tile ``imported`` (a saved
state like ``accepted`` and ``amended``); ``weak`` (a weak-label save) leaves the
tile's state as it is. A ``contested`` tile takes no import (a reviewer settles it
first); a ``settled`` one may be moved to ``imported`` (the workflow does so only when
the import is asked to replace reviewed work).

Annotations also carry codes of their own, stored in the database as written here:
their state (the tile states above that a save records, plus :data:`WEAK`) and their
kind (:data:`KIND_FULL`, a whole mask, or :data:`KIND_WEAK`, a weak label: a class index
where marked, 255 elsewhere). Code uses these constants, never the string codes.
"""

from __future__ import annotations

__all__ = [
    "UNSEEN",
    "PROPOSED",
    "HELD",
    "ACCEPTED",
    "AMENDED",
    "IMPORTED",
    "CONTESTED",
    "SETTLED",
    "PARKED",
    "WEAK",
    "KIND_FULL",
    "KIND_WEAK",
    "STATES",
    "SAVED_STATES",
    "ANNOTATION_STATES",
    "ANNOTATION_KINDS",
    "can_move",
    "check_move",
]

UNSEEN = "unseen"
PROPOSED = "proposed"
HELD = "held"
ACCEPTED = "accepted"
AMENDED = "amended"
IMPORTED = "imported"
CONTESTED = "contested"
SETTLED = "settled"
PARKED = "parked"

#: Every tile state, in life-cycle order.
STATES = (UNSEEN, PROPOSED, HELD, ACCEPTED, AMENDED, IMPORTED, CONTESTED, SETTLED, PARKED)
#: States of a tile that has a saved full mask.
SAVED_STATES = (ACCEPTED, AMENDED, IMPORTED, CONTESTED, SETTLED)

#: Annotation state of a weak label (a save of a weak label, or an import with unlabelled
#: pixels).
WEAK = "weak"
#: States an annotation row records (``imported`` = read from a file by ``labeler import``).
ANNOTATION_STATES = (ACCEPTED, AMENDED, SETTLED, IMPORTED, WEAK)

#: Annotation kind of a whole mask (every pixel has a class).
KIND_FULL = "full"
#: Annotation kind of a weak label (class index where marked, 255 elsewhere). The stored
#: code is "scribble", the name of the editor tool that makes most weak labels; it stays
#: as written in existing databases until a migration renames it.
KIND_WEAK = "scribble"
#: Kinds of annotation masks.
ANNOTATION_KINDS = (KIND_FULL, KIND_WEAK)

_MOVES: dict[str, frozenset[str]] = {
    UNSEEN: frozenset({PROPOSED, HELD, ACCEPTED, AMENDED, IMPORTED, PARKED, CONTESTED}),
    PROPOSED: frozenset({PROPOSED, HELD, ACCEPTED, AMENDED, IMPORTED, PARKED, CONTESTED}),
    HELD: frozenset({PROPOSED, UNSEEN, HELD, ACCEPTED, AMENDED, IMPORTED, PARKED, CONTESTED}),
    ACCEPTED: frozenset({HELD, ACCEPTED, AMENDED, IMPORTED, CONTESTED, SETTLED, PROPOSED}),
    AMENDED: frozenset({HELD, ACCEPTED, AMENDED, IMPORTED, CONTESTED, SETTLED, PROPOSED}),
    IMPORTED: frozenset({HELD, ACCEPTED, AMENDED, IMPORTED, CONTESTED, SETTLED, PROPOSED}),
    CONTESTED: frozenset({SETTLED, CONTESTED, HELD}),
    SETTLED: frozenset({HELD, AMENDED, ACCEPTED, IMPORTED, CONTESTED, SETTLED}),
    PARKED: frozenset({HELD, PROPOSED, ACCEPTED, AMENDED, IMPORTED, PARKED, UNSEEN}),
}


def can_move(state_from: str, state_to: str) -> bool:
    """Whether a tile may move from ``state_from`` to ``state_to``.

    A saved tile that gets a new proposal stays saved (the caller keeps the state);
    moving it back to ``proposed`` is allowed only for an explicit reset.

    Parameters
    ----------
    state_from, state_to : str
        Tile states; an unknown name is never a valid end of a move.

    Returns
    -------
    bool
        True when the table allows the move.
    """
    if state_from not in _MOVES or state_to not in _MOVES:
        return False
    return state_to in _MOVES[state_from]


def check_move(state_from: str, state_to: str, *, tile: object = "tile") -> None:
    """Raise unless a tile may move from ``state_from`` to ``state_to``.

    Parameters
    ----------
    state_from, state_to : str
        Tile states (see :data:`STATES`).
    tile : object
        What to call the tile in the message (e.g. ``"tile 12"``).

    Returns
    -------
    None

    Raises
    ------
    ValueError
        Naming the unknown state and the known ones; or naming the tile, both states
        and the states allowed from ``state_from``.
    """
    for s in (state_from, state_to):
        if s not in _MOVES:
            raise ValueError(f"state: expected one of {', '.join(STATES)}, got {s!r}")
    if not can_move(state_from, state_to):
        raise ValueError(
            f"{tile}: cannot move from {state_from!r} to {state_to!r}; "
            f"allowed from {state_from!r}: {', '.join(sorted(_MOVES[state_from]))}"
        )
