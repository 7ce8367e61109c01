"""Holds as leases: a hold lapses after ``lease_seconds`` without a heartbeat, by the
database's clock, on SQLite and PostgreSQL.

Time is moved by writing the holder's last heartbeat into the past (no sleeps); the
lease rule itself is common practice, no source.
"""

from datetime import timedelta

import numpy as np
import pytest

from labeler.store import NewProposal, Store
from labeler.store import schema as t
from labeler.store.base import DEFAULT_LEASE_SECONDS, clock
from tests.store.conftest import make_store


def _age_hold(store, tile_id, seconds):
    """Pretend the holder's last sign of life was ``seconds`` ago (database clock)."""
    with store.engine.begin() as conn:
        at = clock(conn) - timedelta(seconds=seconds)
        conn.execute(t.tiles.update().where(t.tiles.c.id == tile_id).values(heartbeat_at=at))


def test_default_lease_is_thirty_minutes(store):
    assert DEFAULT_LEASE_SECONDS == 30 * 60 and store.lease_seconds == 1800.0
    with pytest.raises(ValueError, match="lease_seconds: expected 0 or more seconds, got -1"):
        Store(store.url, lease_seconds=-1)


def test_a_hold_lapses_after_the_lease_without_heartbeat(store):
    tiles = store.tiles()
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    store.add_proposals(mv.id, [NewProposal(tiles[0].id, np.zeros(tiles[0].shape, np.uint8))])
    store.hold(tiles[0].id, "ines")
    store.hold(tiles[1].id, "tomas")
    _age_hold(store, tiles[0].id, 29 * 60)  # inside the lease: kept
    assert store.end_lapsed_holds() == []
    assert tiles[0].id not in store.available_for("tomas")
    _age_hold(store, tiles[0].id, 31 * 60)  # past it: ended as a close without a save
    assert store.end_lapsed_holds() == [tiles[0].id]
    after = store.tile(tiles[0].id)
    assert (after.state, after.held_by) == ("proposed", None)
    assert store.tile(tiles[1].id).held_by == "tomas"  # the fresh hold stays
    (event,) = store.events(kind="hold_lapsed")
    assert (event.tile_id, event.annotator, event.detail["to"]) == (tiles[0].id, "ines", "proposed")
    assert store.end_lapsed_holds() == []  # nothing twice


def test_a_lapsed_hold_is_handed_out_again(store):
    tile = store.tiles()[0]
    store.hold(tile.id, "ines")
    assert tile.id not in store.available_for("tomas")
    _age_hold(store, tile.id, 31 * 60)
    assert tile.id in store.available_for("tomas")  # ended on the way
    assert store.tile(tile.id).state == "unseen"


def test_heartbeat_renews_only_the_holders_hold(store):
    tile = store.tiles()[0]
    store.hold(tile.id, "ines")
    _age_hold(store, tile.id, 25 * 60)
    assert store.heartbeat(tile.id, "ines") is True
    (_, who, left) = store.current_holds()[0]
    assert who == "ines" and 29 * 60 < left <= 30 * 60  # renewed to a full lease
    _age_hold(store, tile.id, 31 * 60)
    assert store.heartbeat(tile.id, "tomas") is False  # not the holder
    assert store.heartbeat(tile.id, "nobody-yet") is False  # never seen
    store.end_lapsed_holds()
    assert store.heartbeat(tile.id, "ines") is False  # lapsed: the editor is told


def test_a_save_after_the_hold_lapsed_still_checks_its_parent(store):
    tile = store.tiles()[0]
    store.hold(tile.id, "ines")
    _age_hold(store, tile.id, 31 * 60)
    store.end_lapsed_holds()
    store.hold(tile.id, "tomas")
    store.save_annotation(tile.id, "tomas", np.ones(tile.shape, np.uint8), parent_version=None)
    from labeler.errors import ConflictError

    with pytest.raises(ConflictError, match="based on version None, but version 1"):
        store.save_annotation(tile.id, "ines", np.zeros(tile.shape, np.uint8), parent_version=None)


def test_lease_times_come_from_the_database_clock(store_url, backend, monkeypatch):
    """On PostgreSQL the server's clock stamps holds, not this machine's."""
    from datetime import UTC, datetime

    import labeler.store.base as base

    store = make_store(store_url)
    try:
        tile = store.tiles()[0]
        wrong = datetime(1990, 1, 1, tzinfo=UTC)
        monkeypatch.setattr(base, "now", lambda: wrong)  # this machine's clock is off
        store.hold(tile.id, "ines")
        held = store.tile(tile.id)
        if backend == "postgresql":  # stamped by the server: this year, not 1990
            assert held.updated_at.year >= 2024
        else:  # SQLite runs here: its clock is this machine's
            assert held.updated_at == wrong
        # a short lease: the hold lapses as soon as the clock moves on
        monkeypatch.undo()
        short = Store(store_url, lease_seconds=0)
        try:
            assert short.end_lapsed_holds() == [tile.id]
        finally:
            short.close()
    finally:
        store.close()
