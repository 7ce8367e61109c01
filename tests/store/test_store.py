"""The store: images and tiles, versioned saves, conflicts, shape checks, drafts, events."""

import numpy as np
import pytest

from labeler.errors import ConflictError, LabelerError, NotFoundError
from labeler.imagery.tiling import tile_grid
from labeler.store.store import NewImage, NewProposal, Store
from tests.common import zoo_unlabelled
from tests.store.conftest import make_store


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


def test_open_without_create_refuses(tmp_path):
    with pytest.raises(LabelerError, match="labeler init"):
        Store(f"sqlite:///{tmp_path / 'none.db'}")


def test_tables_and_wal(store):
    assert store.integrity_check() == "ok"
    with store.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
    tiles = store.tiles()
    assert len(tiles) == 6 and all(t.state == "unseen" for t in tiles)


def test_duplicate_image_refused_and_nothing_written(store):
    before = len(store.tiles())
    with pytest.raises(LabelerError, match="already in the project"):
        store.add_image(
            NewImage(
                name="other", path="x", sha256="a" * 64, width=10, height=10, bands=3, dtype="uint8"
            ),
            tile_grid(10, 10),
        )
    assert len(store.tiles()) == before and len(store.images()) == 1


def test_versions_and_conflict(store):
    tile = store.tiles()[0]
    a1 = store.save_annotation(
        tile.id, "ines", _mask(tile, 1), parent_version=None, state="amended"
    )
    assert (a1.version, a1.parent_version) == (1, None)
    a2 = store.save_annotation(tile.id, "ines", _mask(tile, 2), parent_version=1, state="amended")
    assert a2.version == 2
    with pytest.raises(
        ConflictError, match="based on version 1, but version 2 was saved by ines"
    ) as info:
        store.save_annotation(tile.id, "tomas", _mask(tile, 3), parent_version=1)
    assert info.value.current_version == 2 and info.value.theirs.version == 2
    # nothing was overwritten: history holds exactly the two saves
    history = store.annotation_history(tile.id)
    assert [h.version for h in history] == [1, 2]
    assert (history[0].mask() == 1).all() and (history[1].mask() == 2).all()
    assert store.tile(tile.id).state == "amended"


def test_mask_shape_and_values_checked_on_save(store):
    tile = store.tiles()[0]
    with pytest.raises(ValueError, match=r"expected shape \(256, 256\)"):
        store.save_annotation(tile.id, "ines", np.zeros((255, 256), np.uint8), parent_version=None)
    with pytest.raises(ValueError, match="not class indices"):
        store.save_annotation(tile.id, "ines", _mask(tile, 7), parent_version=None)
    assert store.annotation_history(tile.id) == []


def test_mask_shape_checked_on_read(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    # damage the row behind the store's back: a mask of another size
    from labeler.imagery.write import png_bytes
    from labeler.store import schema as t

    with store.engine.begin() as conn:
        conn.execute(
            t.annotations.update().values(mask_png=png_bytes(np.zeros((10, 10), np.uint8)))
        )
    rec = store.latest_annotation(tile.id)
    with pytest.raises(ValueError, match=r"shape \(10, 10\), but the tile is \(256, 256\)"):
        rec.mask()


def test_scribbles_keep_unlabelled_and_state(store):
    tile = store.tiles()[0]
    weak = zoo_unlabelled(tile.shape)
    weak[10:20, 10:20] = 2
    rec = store.save_annotation(
        tile.id, "ines", weak, parent_version=None, kind="scribble", state="weak"
    )
    np.testing.assert_array_equal(rec.mask(), weak)
    assert store.tile(tile.id).state == "unseen"  # scribbles do not change the state


def test_overlap_tiles_have_own_lineages(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    tile = store.tiles()[0]
    assert tile.overlap
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    # tomas sees only his own (no) mask and may save from no parent
    assert store.visible_annotation(tile.id, "tomas") is None
    assert store.lineage_head(tile.id, "tomas") is None
    rec = store.save_annotation(tile.id, "tomas", _mask(tile, 2), parent_version=None)
    assert rec.version == 2
    assert store.visible_annotation(tile.id, "ines").annotator == "ines"
    assert store.savers(tile.id) == ["ines", "tomas"]
    # a reviewer settles from the newest version of the tile
    with pytest.raises(ConflictError):
        store.save_annotation(tile.id, "rev", _mask(tile, 1), parent_version=1, state="settled")
    store.save_annotation(tile.id, "rev", _mask(tile, 1), parent_version=2, state="settled")
    assert store.tile(tile.id).state == "settled"
    store.close()


def test_available_for_overlap_assignment(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    tid = store.tiles()[0].id
    assert tid in store.available_for("ines", per_overlap_tile=2)
    store.hold(tid, "ines")
    store.hold(tid, "tomas")
    assert tid not in store.available_for("kai", per_overlap_tile=2)  # already handed to two
    assert tid in store.available_for("tomas", per_overlap_tile=2)
    store.save_annotation(tid, "tomas", np.zeros((256, 256), np.uint8), parent_version=None)
    assert tid not in store.available_for("tomas", per_overlap_tile=2)
    store.close()


def test_state_moves_checked(store):
    tile = store.tiles()[0]
    with pytest.raises(LabelerError, match="cannot move from 'unseen' to 'settled'"):
        store.set_state(tile.id, "settled")
    with pytest.raises(LabelerError, match="expected one of"):
        store.set_state(tile.id, "done")
    with pytest.raises(NotFoundError, match="tile 999"):
        store.set_state(999, "parked")
    assert store.set_state(tile.id, "parked", annotator="ines").state == "parked"


def test_hold_and_release(store):
    tile = store.tiles()[0]
    held = store.hold(tile.id, "ines")
    assert (held.state, held.held_by) == ("held", "ines")
    back = store.release(tile.id, "ines")
    assert (back.state, back.held_by) == ("unseen", None)


def test_proposals_move_unseen_to_proposed(store):
    tiles = store.tiles()
    mv = store.add_model_version(kind="cold_start", name="vegetation-rows")
    unc = np.random.default_rng(0).random((3, 64, 64)).astype(np.float16)
    store.add_proposals(
        mv.id,
        [
            NewProposal(
                tiles[0].id,
                _mask(tiles[0], 1),
                uncertainty=unc,
                class_fractions=[0, 1, 0, 0],
                mean_entropy=0.5,
            )
        ],
    )
    assert store.tile(tiles[0].id).state == "proposed"
    p = store.latest_proposal(tiles[0].id)
    np.testing.assert_array_equal(p.uncertainty(), unc)
    assert (p.mask() == 1).all() and p.class_fractions == [0, 1, 0, 0]
    assert set(store.latest_proposals()) == {tiles[0].id}
    with pytest.raises(ValueError, match="not class indices"):
        store.add_proposals(
            mv.id, [NewProposal(tiles[1].id, np.full(tiles[1].shape, 255, np.uint8))]
        )


def test_drafts(store):
    tile = store.tiles()[0]
    assert store.load_draft(tile.id, "ines") is None
    store.save_draft(
        tile.id, "ines", _mask(tile, 2), scribbles=_mask(tile, 255), actions=3, seconds=4.0
    )
    store.save_draft(tile.id, "ines", _mask(tile, 3), actions=5, seconds=6.0)
    d = store.load_draft(tile.id, "ines")
    assert (d.mask == 3).all() and d.actions == 5 and d.scribbles is None
    store.save_annotation(tile.id, "ines", _mask(tile, 3), parent_version=None)
    assert store.load_draft(tile.id, "ines") is None  # a save clears the draft


def test_event_log_is_append_only_record(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    kinds = [e.kind for e in store.events()]
    assert kinds[0] == "image_added" and "save" in kinds
    save = [e for e in store.events() if e.kind == "save"][0]
    assert save.annotator == "ines" and save.detail["version"] == 1


def test_rankings(store):
    from labeler.store.records import RankingItem

    ids = [t.id for t in store.tiles()]
    assert store.latest_ranking() == []
    store.write_ranking(
        strategy="mixed",
        k=2,
        seed=0,
        items=[
            RankingItem(ids[2], 0, 0.9, "uncertain", True),
            RankingItem(ids[0], 1, 0.5, "rare class", True),
        ],
    )
    got = store.latest_ranking()
    assert [(i.tile_id, i.reason) for i in got] == [(ids[2], "uncertain"), (ids[0], "rare class")]


def test_counts(store):
    tile = store.tiles()[0]
    store.save_annotation(
        tile.id, "ines", _mask(tile, 1), parent_version=None, seconds=30, actions=4
    )
    assert store.state_counts()["amended"] == 1
    assert store.annotator_counts()["ines"] == {
        "tiles": 1,
        "scribbles": 0,
        "seconds": 30.0,
        "actions": 4,
    }
