"""The tile life cycle: every allowed and every refused move, against a table written here.

The table below is written out by hand from the project's tile life cycle (the module
docstring of ``labeler/states.py``: unseen -> proposed -> held -> accepted, amended or
imported -> optionally contested -> settled; parked = set aside), not read from
``labeler.states``, so a change of the code's table fails here until the design is
changed on purpose.
"""

from __future__ import annotations

import itertools
import re

import pytest

from labeler import states
from labeler.states import can_move, check_move

# Columns and rows in life-cycle order. "Y" = allowed, "." = refused. Why each row is so:
# - unseen:    a proposal, a hold, a save from scratch (accepted/amended) or an import,
#              parking, or an overlap tile found contested; nothing settles a tile
#              nobody saved.
# - proposed:  as unseen (a new proposal of a proposed tile keeps it proposed); it never
#              goes back to unseen (its proposal stays).
# - held:      released back to proposed/unseen, saved, parked, found contested; a
#              reviewer settles only a saved tile.
# - accepted,  re-held, re-saved or re-imported, found contested, settled, or reset to
#   amended,   proposed; never back to unseen and never parked (saved work is not set
#   imported:  aside).
# - contested: only a reviewer's hold or decision (settled); no plain save, no import.
# - settled:   re-opened, re-saved (a later correction, or an import asked to replace
#              reviewed work), contested again, settled again; never back to
#              unseen/proposed/parked.
# - parked:    returns to the queue (held, proposed, unseen) or is saved; nothing
#              contests or settles a parked tile directly.
COLUMNS = (
    "unseen", "proposed", "held", "accepted", "amended", "imported", "contested", "settled",
    "parked",
)
TABLE = """
unseen     .  Y  Y  Y  Y  Y  Y  .  Y
proposed   .  Y  Y  Y  Y  Y  Y  .  Y
held       Y  Y  Y  Y  Y  Y  Y  .  Y
accepted   .  Y  Y  Y  Y  Y  Y  Y  .
amended    .  Y  Y  Y  Y  Y  Y  Y  .
imported   .  Y  Y  Y  Y  Y  Y  Y  .
contested  .  .  Y  .  .  .  Y  Y  .
settled    .  .  Y  Y  Y  Y  Y  Y  .
parked     Y  Y  Y  Y  Y  Y  .  .  Y
"""


def _expected() -> dict[tuple[str, str], bool]:
    out: dict[tuple[str, str], bool] = {}
    for line in TABLE.strip().splitlines():
        name, *marks = line.split()
        assert len(marks) == len(COLUMNS), line
        for to, mark in zip(COLUMNS, marks, strict=True):
            out[(name, to)] = mark == "Y"
    return out


EXPECTED = _expected()
ALLOWED = sorted(k for k, v in EXPECTED.items() if v)
REFUSED = sorted(k for k, v in EXPECTED.items() if not v)


def test_table_covers_every_pair_of_states():
    assert tuple(states.STATES) == COLUMNS  # life-cycle order
    assert set(EXPECTED) == set(itertools.product(COLUMNS, COLUMNS))
    assert (len(ALLOWED), len(REFUSED)) == (59, 22)  # counted from the table above


@pytest.mark.parametrize(("state_from", "state_to"), ALLOWED)
def test_allowed_move(state_from, state_to):
    assert can_move(state_from, state_to) is True
    assert check_move(state_from, state_to, tile="tile 7") is None


@pytest.mark.parametrize(("state_from", "state_to"), REFUSED)
def test_refused_move(state_from, state_to):
    assert can_move(state_from, state_to) is False
    allowed_from = sorted(to for (fr, to), ok in EXPECTED.items() if fr == state_from and ok)
    message = (
        f"tile 7: cannot move from {state_from!r} to {state_to!r}; "
        f"allowed from {state_from!r}: {', '.join(allowed_from)}"
    )
    with pytest.raises(ValueError, match=f"^{re.escape(message)}$"):
        check_move(state_from, state_to, tile="tile 7")


@pytest.mark.parametrize(
    ("state_from", "state_to", "bad"),
    [
        ("done", "held", "done"),
        ("held", "done", "done"),
        ("weak", "held", "weak"),  # an annotation state, not a tile state
        ("Held", "held", "Held"),  # names are exact
        ("", "held", ""),
    ],
)
def test_unknown_states_are_refused_by_name(state_from, state_to, bad):
    assert can_move(state_from, state_to) is False
    with pytest.raises(ValueError, match=rf"^state: expected one of unseen, .*got {bad!r}$"):
        check_move(state_from, state_to)


def test_default_tile_name_in_message():
    with pytest.raises(ValueError, match="^tile: cannot move from 'unseen' to 'settled'"):
        check_move("unseen", "settled")


def test_state_groups():
    assert states.SAVED_STATES == ("accepted", "amended", "imported", "contested", "settled")
    assert set(states.SAVED_STATES) <= set(states.STATES)
    assert states.ANNOTATION_STATES == ("accepted", "amended", "settled", "imported", "weak")
    assert states.ANNOTATION_KINDS == ("full", "scribble")
    # the stored codes of the annotation constants; a weak label's kind keeps the code
    # "scribble" that existing databases hold
    assert (states.IMPORTED, states.WEAK) == ("imported", "weak")
    assert (states.KIND_FULL, states.KIND_WEAK) == states.ANNOTATION_KINDS
    assert not set(states.ANNOTATION_KINDS) & set(states.STATES)
    # the constants are the names of the table
    named = [getattr(states, n.upper()) for n in COLUMNS]
    assert named == list(COLUMNS)


def test_imported_is_a_saved_state_between_amended_and_contested():
    # tile life cycle (docs/architecture.md): accepted or amended or imported, then optionally contested
    order = list(states.STATES)
    assert order.index("amended") + 1 == order.index("imported") == order.index("contested") - 1
    assert "imported" in states.SAVED_STATES and "imported" in states.ANNOTATION_STATES
    # an import never lands on a tile waiting for a reviewer
    assert not can_move("contested", "imported")
    with pytest.raises(ValueError, match="^tile 3: cannot move from 'contested' to 'imported'"):
        check_move("contested", "imported", tile="tile 3")


def test_settled_is_reached_only_from_a_saved_state():
    # "settled (a reviewer decided)" presupposes saved masks to decide between
    sources = {fr for (fr, to), ok in EXPECTED.items() if ok and to == "settled"}
    assert sources == set(states.SAVED_STATES)
    assert {s for s in states.STATES if can_move(s, "settled")} == sources
