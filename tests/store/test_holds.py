"""State moves, holds and assignment; every tile state change passes the life-cycle check."""

import numpy as np
import pytest

from labeler import states
from labeler.errors import LabelerError, NotFoundError
from labeler.store import NewAnnotation, NewProposal
from labeler.store.holds import checked_move
from tests.store.conftest import make_store


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


def test_state_moves_checked(store):
    tile = store.tiles()[0]
    with pytest.raises(LabelerError, match="tile \\d+: cannot move from 'unseen' to 'settled'"):
        store.set_state(tile.id, "settled")
    with pytest.raises(LabelerError, match="state: expected one of unseen, .*got 'done'"):
        store.set_state(tile.id, "done")
    with pytest.raises(NotFoundError, match="tile 999"):
        store.set_state(999, "parked")
    assert store.tile(tile.id).state == "unseen"  # refused moves change nothing
    assert store.set_state(tile.id, "parked", annotator="ines").state == "parked"
    event = store.events(kind="state")[-1]
    assert (event.tile_id, event.annotator) == (tile.id, "ines")
    assert event.detail == {"from": "unseen", "to": "parked", "reason": None}


def test_set_state_held_names_the_holder(store):
    tile = store.tiles()[0]
    held = store.set_state(tile.id, "held", annotator="ines")
    assert (held.state, held.held_by) == ("held", "ines")
    assert store.set_state(tile.id, "parked").held_by is None


def test_checked_move_turns_the_refusal_into_a_labeler_error():
    with pytest.raises(LabelerError, match="^tile 4: cannot move from 'contested' to 'amended'"):
        checked_move("contested", "amended", tile_id=4)
    assert checked_move("contested", "settled", tile_id=4) is None


def test_hold_and_release(store):
    tile = store.tiles()[0]
    held = store.hold(tile.id, "ines")
    assert (held.state, held.held_by) == ("held", "ines")
    assert store.assigned(tile.id) == ["ines"]
    back = store.release(tile.id, "ines")
    assert (back.state, back.held_by) == ("unseen", None)
    assert [e.detail for e in store.events(kind="release")] == [{"to": "unseen"}]


def test_release_returns_a_proposed_tile_to_proposed(store):
    tile = store.tiles()[0]
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    store.add_proposals(mv.id, [NewProposal(tile.id, _mask(tile, 1))])
    assert store.hold(tile.id, "ines").state == "held"
    assert store.release(tile.id, "ines").state == "proposed"


def test_hold_keeps_a_saved_state_and_release_leaves_it(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    held = store.hold(tile.id, "tomas")
    assert (held.state, held.held_by) == ("amended", "tomas")
    back = store.release(tile.id, "tomas")
    assert (back.state, back.held_by) == ("amended", None)


def test_hold_and_release_of_a_missing_tile(store):
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.hold(999, "ines")
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.release(999, "ines")


def test_available_for_ordinary_tiles(store):
    ids = [t.id for t in store.tiles()]
    assert store.available_for("ines") == ids  # a name never seen gets every free tile
    store.hold(ids[0], "tomas")
    store.save_annotation(ids[1], "tomas", _mask(store.tile(ids[1]), 1), parent_version=None)
    store.set_state(ids[2], "parked")
    # held by someone else and saved by anyone are out; parked tiles come back
    assert store.available_for("ines") == ids[2:]
    assert store.available_for("tomas") == [ids[0], *ids[2:]]


def test_available_for_overlap_assignment(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    tid = store.tiles()[0].id
    assert tid in store.available_for("ines", per_overlap_tile=2)
    store.hold(tid, "ines")
    store.hold(tid, "tomas")
    assert store.assigned(tid) == ["ines", "tomas"]
    assert tid not in store.available_for("kai", per_overlap_tile=2)  # already handed to two
    assert tid in store.available_for("tomas", per_overlap_tile=2)
    store.save_annotation(tid, "tomas", np.zeros((256, 256), np.uint8), parent_version=None)
    assert tid not in store.available_for("tomas", per_overlap_tile=2)
    assert store.savers(tid) == ["tomas"] and store.savers(tid, kind="scribble") == []
    store.set_state(tid, "contested")
    assert tid not in store.available_for("ines", per_overlap_tile=2)  # reviewers settle it
    store.close()


# -- one life-cycle check for every state change ---------------------------------------


@pytest.fixture
def moves(monkeypatch):
    """Every (from, to) pair the store asks ``labeler.states.check_move`` about."""
    asked: list[tuple[str, str]] = []
    real = states.check_move

    def spy(state_from, state_to, *, tile="tile"):
        asked.append((state_from, state_to))
        return real(state_from, state_to, tile=tile)

    monkeypatch.setattr(states, "check_move", spy)
    return asked


def test_every_state_change_passes_the_life_cycle_check(tmp_path, moves):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    a, b, c, d, e, f = store.tiles()
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    proposal = NewProposal(a.id, _mask(a, 1))
    steps = [
        ("propose", lambda: store.add_proposals(mv.id, [proposal])),
        ("hold", lambda: store.hold(a.id, "ines")),
        ("release", lambda: store.release(a.id, "ines")),
        ("hold again", lambda: store.hold(a.id, "ines")),
        ("accept", lambda: store.save_annotation(a.id, "ines", _mask(a, 1), parent_version=None, state="accepted")),
        ("park", lambda: store.set_state(b.id, "parked", annotator="ines")),
        ("hold parked", lambda: store.hold(b.id, "ines")),
        ("amend", lambda: store.save_annotation(b.id, "ines", _mask(b, 2), parent_version=None)),
        ("second saver", lambda: store.save_annotation(a.id, "tomas", _mask(a, 2), parent_version=None)),
        ("contest", lambda: store.set_state(a.id, "contested")),
        ("settle", lambda: store.save_annotation(a.id, "rev", _mask(a, 1), parent_version=2, state="settled")),
        ("import", lambda: store.save_annotations([
            NewAnnotation(c.id, "ines", _mask(c, 3), None, state="imported"),
            NewAnnotation(d.id, "ines", _mask(d, 3), None, state="imported"),
        ])),
        ("scribble", lambda: store.save_annotation(e.id, "ines", _mask(e, 255), parent_version=None, kind="scribble", state="weak")),
        ("reset", lambda: store.set_state(c.id, "proposed")),
    ]  # fmt: skip
    seen_changes = set()
    for name, step in steps:
        before = {t.id: t.state for t in store.tiles()}
        moves.clear()
        step()
        after = {t.id: t.state for t in store.tiles()}
        changed = {(before[i], after[i]) for i in before if before[i] != after[i]}
        assert changed <= set(moves), f"{name}: {changed} changed without the check ({moves})"
        seen_changes |= changed
    # the scenario moved tiles along every path the store has
    assert seen_changes == {
        ("unseen", "proposed"),
        ("proposed", "held"),
        ("held", "proposed"),
        ("held", "accepted"),
        ("unseen", "parked"),
        ("parked", "held"),
        ("held", "amended"),
        ("accepted", "amended"),
        ("amended", "contested"),
        ("contested", "settled"),
        ("unseen", "imported"),
        ("imported", "proposed"),
    }
    assert store.tile(e.id).state == "unseen" and store.tile(f.id).state == "unseen"
    store.close()


def test_a_refusing_check_stops_every_kind_of_move(store, monkeypatch):
    def refuse(state_from, state_to, *, tile="tile"):
        raise ValueError(f"{tile}: refused {state_from} -> {state_to}")

    monkeypatch.setattr(states, "check_move", refuse)
    a, b = store.tiles()[:2]
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    calls = [
        lambda: store.set_state(a.id, "parked"),
        lambda: store.hold(a.id, "ines"),
        lambda: store.add_proposals(mv.id, [NewProposal(a.id, _mask(a, 1))]),
        lambda: store.save_annotation(a.id, "ines", _mask(a, 1), parent_version=None),
    ]
    for call in calls:
        with pytest.raises(LabelerError, match=f"tile {a.id}: refused unseen -> "):
            call()
    assert store.tile(a.id).state == "unseen"
    assert store.latest_proposal(a.id) is None and store.annotation_history(a.id) == []
    monkeypatch.undo()
    store.set_state(b.id, "held", annotator="ines")
    monkeypatch.setattr(states, "check_move", refuse)
    with pytest.raises(LabelerError, match=f"tile {b.id}: refused held -> unseen"):
        store.release(b.id, "ines")
    assert store.tile(b.id).state == "held"
