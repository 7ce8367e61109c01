"""Proposals (the first one moves a tile from unseen to proposed) and picks."""

import numpy as np
import pytest

from labeler.errors import NotFoundError
from labeler.store import NewProposal, PickItem
from labeler.store.proposals import PICK_EVENT


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


def test_proposals_move_unseen_to_proposed(store):
    tiles = store.tiles()
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    unc = np.random.default_rng(0).random((3, 64, 64)).astype(np.float16)
    emb = np.random.default_rng(1).random(8).astype(np.float32)
    (pid,) = store.add_proposals(
        mv.id,
        [
            NewProposal(
                tiles[0].id,
                _mask(tiles[0], 1),
                uncertainty=unc,
                embedding=emb,
                class_fractions=[0, 1, 0, 0],
                mean_entropy=0.5,
                mean_margin=0.25,
                mean_bald=0.125,
                mean_least_confidence=0.375,
            )
        ],
    )
    assert store.tile(tiles[0].id).state == "proposed"
    assert store.tile(tiles[1].id).state == "unseen"
    p = store.latest_proposal(tiles[0].id)
    assert p.id == pid and p.model_version_id == mv.id and store.proposal(pid) == p
    np.testing.assert_array_equal(p.uncertainty(), unc)
    np.testing.assert_array_equal(p.embedding(), emb)
    assert (p.mask() == 1).all() and p.class_fractions == [0, 1, 0, 0]
    assert (p.mean_entropy, p.mean_margin, p.mean_bald, p.mean_least_confidence) == (
        0.5,
        0.25,
        0.125,
        0.375,
    )
    newest = store.latest_proposals()
    assert set(newest) == {tiles[0].id}
    assert newest[tiles[0].id].uncertainty() is None  # maps only when asked for
    np.testing.assert_array_equal(
        store.latest_proposals(with_uncertainty=True)[tiles[0].id].uncertainty(), unc
    )
    assert store.latest_proposal(tiles[1].id) is None


def test_newest_proposal_wins_and_saved_tiles_keep_their_state(store):
    a, b = store.tiles()[:2]
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    store.add_proposals(mv.id, [NewProposal(a.id, _mask(a, 1)), NewProposal(b.id, _mask(b, 1))])
    store.save_annotation(b.id, "ines", _mask(b, 2), parent_version=None)
    mv2 = store.add_model_version(kind="head", name="head-1")
    ids = store.add_proposals(
        mv2.id, [NewProposal(a.id, _mask(a, 2)), NewProposal(b.id, _mask(b, 3))]
    )
    assert [store.latest_proposal(x.id).id for x in (a, b)] == ids
    assert {p.model_version_id for p in store.latest_proposals().values()} == {mv2.id}
    assert store.tile(a.id).state == "proposed" and store.tile(b.id).state == "amended"
    assert store.add_proposals(mv2.id, []) == []
    assert [e.detail for e in store.events(kind="proposed")] == [
        {"model_version": mv.id, "tiles": 2},
        {"model_version": mv2.id, "tiles": 2},
    ]


def test_proposal_checks_write_nothing(store):
    a, b = store.tiles()[:2]
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    good = NewProposal(a.id, _mask(a, 1))
    with pytest.raises(ValueError, match=rf"proposal mask of tile {b.id}.*not class indices"):
        store.add_proposals(mv.id, [good, NewProposal(b.id, _mask(b, 255))])
    with pytest.raises(ValueError, match=r"^proposal mask: expected shape \(256, 256\) of tile"):
        store.add_proposals(mv.id, [good, NewProposal(b.id, np.zeros((4, 4), np.uint8))])
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.add_proposals(mv.id, [good, NewProposal(999, _mask(a, 1))])
    assert store.latest_proposals() == {} and store.tile(a.id).state == "unseen"
    with pytest.raises(NotFoundError, match="^proposal 5 is not in this project$"):
        store.proposal(5)


def test_picks(store):
    ids = [t.id for t in store.tiles()]
    assert store.latest_pick() == []
    first = store.write_pick(
        strategy="mixed",
        k=2,
        seed=0,
        items=[
            PickItem(ids[2], 0, 0.9, "uncertain", True),
            PickItem(ids[0], 1, 0.5, "rare class", True),
        ],
    )
    got = store.latest_pick()
    assert [(i.tile_id, i.reason) for i in got] == [(ids[2], "uncertain"), (ids[0], "rare class")]
    second = store.write_pick(
        strategy="uncertainty", k=1, seed=1, items=[PickItem(ids[1], 0, 0.7, "uncertain", False)]
    )
    assert second > first
    assert store.latest_pick() == [PickItem(ids[1], 0, 0.7, "uncertain", False)]
    assert PICK_EVENT == "ranked"  # the stored event kind existing databases hold
    assert store.events(kind=PICK_EVENT)[-1].detail == {
        "ranking": second,
        "strategy": "uncertainty",
        "k": 1,
        "tiles": 1,
    }


def test_only_open_skips_saved_and_held_tiles_inside_the_write(store):
    # a tile opened in the editor (held) or saved while proposals were computed keeps
    # its proposal: the filter is applied in the writing transaction
    a, b, c, d = store.tiles()[:4]
    old = store.add_model_version(kind="cold_start", name="vegetation-rows")
    store.add_proposals(old.id, [NewProposal(t.id, _mask(t, 0)) for t in (a, b, c, d)])
    store.hold(b.id, "ines")
    store.save_annotation(c.id, "tomas", _mask(c, 1), parent_version=None)
    store.hold(d.id, "tomas")
    store.release(d.id, "tomas")  # released again: open
    new = store.add_model_version(kind="head", name="head-1")
    ids = store.add_proposals(
        new.id, [NewProposal(t.id, _mask(t, 2)) for t in (a, b, c, d)], only_open=True
    )
    assert len(ids) == 2
    latest = store.latest_proposals()
    assert {t.id: latest[t.id].model_version_id for t in (a, b, c, d)} == {
        a.id: new.id,
        b.id: old.id,
        c.id: old.id,
        d.id: new.id,
    }
    assert store.add_proposals(new.id, [NewProposal(b.id, _mask(b, 3))], only_open=True) == []


def test_many_proposals_in_one_call_keep_their_order_and_versions(store):
    """Ids come back in the items' order; the light version query agrees with the full one."""
    tiles = store.tiles()[:3]
    old = store.add_model_version(kind="cold_start", name="vegetation-rows")
    new = store.add_model_version(kind="cold_start", name="vegetation-rows-2")
    assert store.latest_proposal_versions() == {}
    first = store.add_proposals(old.id, [NewProposal(t.id, _mask(t, 0)) for t in tiles])
    # reversed order, one tile left out: ids follow the items, newest per tile wins
    second = store.add_proposals(
        new.id, [NewProposal(t.id, _mask(t, k + 1)) for k, t in enumerate(tiles[:2][::-1])]
    )
    assert len(first) == 3 and len(second) == 2 and min(second) > max(first)
    assert [store.proposal(pid).tile_id for pid in first] == [t.id for t in tiles]
    assert [store.proposal(pid).tile_id for pid in second] == [tiles[1].id, tiles[0].id]
    assert store.latest_proposal(tiles[1].id).mask()[0, 0] == 1
    versions = store.latest_proposal_versions()
    assert versions == {tiles[0].id: new.id, tiles[1].id: new.id, tiles[2].id: old.id}
    assert versions == {k: p.model_version_id for k, p in store.latest_proposals().items()}


def test_proposal_of_an_unknown_tile_writes_nothing(store):
    tile = store.tiles()[0]
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    with pytest.raises(NotFoundError, match="tile 999999 is not in this project"):
        store.add_proposals(
            mv.id, [NewProposal(tile.id, _mask(tile, 0)), NewProposal(999999, _mask(tile, 0))]
        )
    assert store.latest_proposal_versions() == {}
