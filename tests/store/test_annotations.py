"""Annotation saves: versions, conflicts, checks before writing, the tile's new state."""

import numpy as np
import pytest

from labeler.errors import ConflictError, LabelerError, NotFoundError
from labeler.store import NewAnnotation
from labeler.store.annotations import tile_state_after_save
from tests.common import zoo_unlabelled
from tests.store.conftest import make_store


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


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
    assert (info.value.tile_id, info.value.parent_version) == (tile.id, 1)
    # nothing was overwritten: history holds exactly the two saves
    history = store.annotation_history(tile.id)
    assert [h.version for h in history] == [1, 2]
    assert (history[0].mask() == 1).all() and (history[1].mask() == 2).all()
    assert store.tile(tile.id).state == "amended"


def test_mask_shape_and_values_checked_on_save(store):
    tile = store.tiles()[0]
    with pytest.raises(ValueError, match=r"mask: expected shape \(256, 256\) of tile \d+, got"):
        store.save_annotation(tile.id, "ines", np.zeros((255, 256), np.uint8), parent_version=None)
    with pytest.raises(ValueError, match="not class indices"):
        store.save_annotation(tile.id, "ines", _mask(tile, 7), parent_version=None)
    assert store.annotation_history(tile.id) == []


def test_kind_state_and_tile_checked_on_save(store):
    tile = store.tiles()[0]
    with pytest.raises(ValueError, match=r"kind: expected one of \('full', 'scribble'\), got 'x'"):
        store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None, kind="x")
    with pytest.raises(ValueError, match="state: expected one of .*got 'done'"):
        store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None, state="done")
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.save_annotation(999, "ines", _mask(tile, 1), parent_version=None)
    assert store.annotations(kind=None) == []


def test_weak_labels_keep_unlabelled_and_state(store):
    tile = store.tiles()[0]
    weak = zoo_unlabelled(tile.shape)
    weak[10:20, 10:20] = 2
    rec = store.save_annotation(
        tile.id, "ines", weak, parent_version=None, kind="scribble", state="weak"
    )
    np.testing.assert_array_equal(rec.mask(), weak)
    assert store.tile(tile.id).state == "unseen"  # a weak label does not change the state


@pytest.mark.parametrize(
    ("kind", "state", "asked", "expected"),
    [
        ("full", "accepted", None, "accepted"),
        ("full", "amended", None, "amended"),
        ("full", "settled", None, "settled"),
        ("full", "imported", None, "imported"),
        ("full", "weak", None, None),
        ("scribble", "weak", None, None),
        ("scribble", "amended", None, None),
        ("full", "amended", "contested", "contested"),
        ("scribble", "weak", "parked", "parked"),
    ],
)
def test_tile_state_after_save(kind, state, asked, expected):
    assert tile_state_after_save(kind, state, asked) == expected


def test_save_ends_the_hold_and_drops_the_draft(store):
    tile = store.tiles()[0]
    store.hold(tile.id, "ines")
    store.save_draft(tile.id, "ines", _mask(tile, 1))
    store.save_draft(tile.id, "tomas", _mask(tile, 2))
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None, state="accepted")
    after = store.tile(tile.id)
    assert (after.state, after.held_by) == ("accepted", None)
    assert store.load_draft(tile.id, "ines") is None
    assert store.load_draft(tile.id, "tomas") is not None  # another's draft stays
    save = store.events(kind="save")[-1]
    assert save.detail == {
        "version": 1,
        "parent": None,
        "kind": "full",
        "state": "accepted",
        "from": "held",
        "to": "accepted",
        "source": "editor",
    }


def test_save_the_life_cycle_refuses_writes_nothing(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    store.save_annotation(tile.id, "tomas", _mask(tile, 2), parent_version=None)
    store.set_state(tile.id, "contested")
    store.save_draft(tile.id, "ines", _mask(tile, 3), parent_version=1)
    with pytest.raises(
        LabelerError,
        match=rf"^tile {tile.id}: cannot move from 'contested' to 'amended'; "
        r"allowed from 'contested': contested, held, settled; nothing was saved$",
    ):
        store.save_annotation(tile.id, "ines", _mask(tile, 3), parent_version=1)
    assert [a.version for a in store.annotation_history(tile.id)] == [1, 2]
    assert store.tile(tile.id).state == "contested"
    assert store.load_draft(tile.id, "ines") is not None  # the work is still there
    # a weak-label save does not move the tile, so it is not refused
    store.save_annotation(
        tile.id, "ines", _mask(tile, 255), parent_version=1, kind="scribble", state="weak"
    )
    assert store.tile(tile.id).state == "contested"
    # the reviewer's decision is the move out of contested
    store.save_annotation(tile.id, "rev", _mask(tile, 1), parent_version=3, state="settled")
    assert store.tile(tile.id).state == "settled"
    store.close()


def test_explicit_tile_state_is_checked_too(store):
    tile = store.tiles()[0]
    with pytest.raises(LabelerError, match="cannot move from 'unseen' to 'settled'"):
        store.save_annotation(
            tile.id, "ines", _mask(tile, 1), parent_version=None, tile_state="settled"
        )
    rec = store.save_annotation(
        tile.id, "ines", _mask(tile, 1), parent_version=None, tile_state="parked"
    )
    assert rec.state == "amended" and store.tile(tile.id).state == "parked"


def test_save_annotations_all_or_nothing(store):
    a, b, c = store.tiles()[:3]
    good = [NewAnnotation(x.id, "ines", _mask(x, 1), None, state="imported") for x in (a, b)]
    with pytest.raises(ValueError, match="not class indices"):
        store.save_annotations([*good, NewAnnotation(c.id, "ines", _mask(c, 9), None)])
    store.save_annotation(b.id, "tomas", _mask(b, 2), parent_version=None)
    with pytest.raises(ConflictError, match="saved by tomas"):
        store.save_annotations(good)  # a conflict on the second item stops the first too
    assert store.annotation_history(a.id) == []
    assert store.save_annotations([]) == []
    recs = store.save_annotations([good[0], NewAnnotation(c.id, "ines", _mask(c, 3), None)])
    assert [(r.tile_id, r.version, r.state) for r in recs] == [
        (a.id, 1, "imported"),
        (c.id, 1, "amended"),
    ]
    assert store.tile(a.id).state == "imported"  # an imported full mask: a state of its own


def test_save_keeps_effort_and_origin(store):
    tile = store.tiles()[0]
    rec = store.save_annotation(
        tile.id,
        " ines ",
        _mask(tile, 2),
        parent_version=None,
        seconds=12.5,
        actions=3,
        source="queue",
        state="amended",
    )
    assert (rec.annotator, rec.seconds, rec.actions, rec.source, rec.proposal_id) == (
        "ines",
        12.5,
        3,
        "queue",
        None,
    )
    assert rec.created_at.utcoffset().total_seconds() == 0


# -- saves that skip tiles changed in the meantime (imports) ------------------------------


def test_save_if_unchanged_saves_the_current_and_reports_the_stale(store):
    a, b, c, d = store.tiles()[:4]
    store.save_annotation(b.id, "tomas", _mask(b, 2), parent_version=None)  # b is now at v1
    store.set_state(d.id, "parked")
    items = [
        NewAnnotation(a.id, "ines", _mask(a, 1), None, state="imported"),
        NewAnnotation(b.id, "ines", _mask(b, 1), None, state="imported"),  # stale: v1 exists
        NewAnnotation(c.id, "ines", _mask(c, 255), None, kind="scribble", state="weak"),
        NewAnnotation(d.id, "ines", _mask(d, 3), None, state="imported"),
    ]
    out = store.save_if_unchanged(items)
    assert [(o.tile_id, o.version) for o in out] == [(a.id, 1), (b.id, None), (c.id, 1), (d.id, 1)]
    assert out[1].problem == (
        f"tile {b.id}: this mask was based on version None, but version 1 was saved by tomas "
        "in the meantime; nothing was overwritten. Reopen the tile to see both masks."
    )
    assert out[0].problem is None and out[2].problem is None
    # tomas's mask is untouched; the saved tiles moved as a save moves them
    assert [h.annotator for h in store.annotation_history(b.id)] == ["tomas"]
    assert (store.tile(a.id).state, store.tile(c.id).state) == ("imported", "unseen")
    assert store.tile(d.id).state == "imported"  # parked -> imported is allowed
    assert store.latest_annotation(a.id).source == "editor"


def test_save_if_unchanged_reports_a_refused_move_and_saves_the_rest(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    a, b = store.tiles()[:2]
    store.save_annotation(a.id, "tomas", _mask(a, 2), parent_version=None)
    store.set_state(a.id, "contested")
    out = store.save_if_unchanged([
        NewAnnotation(a.id, "ines", _mask(a, 1), None, state="imported"),
        NewAnnotation(b.id, "ines", _mask(b, 1), None, state="imported"),
    ])
    assert out[0].version is None and out[1].version == 1
    assert out[0].problem.startswith(
        f"tile {a.id}: cannot move from 'contested' to 'imported'; allowed from 'contested':"
    ) and out[0].problem.endswith("; nothing was saved")
    assert store.tile(a.id).state == "contested" and len(store.annotation_history(a.id)) == 1
    store.close()


def test_save_if_unchanged_takes_a_generator_and_saves_nothing_when_it_fails(store):
    tiles = store.tiles()
    taken = []

    def items(fail_at):
        for k, t in enumerate(tiles):
            if k == fail_at:
                raise ValueError("the file broke off")
            taken.append(t.id)
            yield NewAnnotation(t.id, "ines", _mask(t, 1), None, state="imported")

    with pytest.raises(ValueError, match="the file broke off"):
        store.save_if_unchanged(items(fail_at=4))
    assert taken == [t.id for t in tiles[:4]]
    assert store.annotations(kind=None) == []  # nothing of the first four was written
    with pytest.raises(ValueError, match="not class indices"):
        store.save_if_unchanged([NewAnnotation(tiles[0].id, "ines", _mask(tiles[0], 9), None)])
    assert store.annotations(kind=None) == []
    assert store.save_if_unchanged(iter(())) == []
    out = store.save_if_unchanged(items(fail_at=None))
    assert [o.version for o in out] == [1] * len(tiles)


def test_a_batch_larger_than_one_chunk_of_statements(tmp_path):
    # 729 tiles (27 x 27 of 256 px) pass the 500-id chunks of the batched statements
    from labeler.imagery.tiling import tile_grid
    from labeler.store import NewImage, Store

    store = Store(f"sqlite:///{tmp_path / 'big.db'}", create=True)
    store.add_image(
        NewImage(name="field", path="images/field.tif", sha256="c" * 64, width=6080,
                 height=6080, bands=3, dtype="uint8"),
        tile_grid(6080, 6080, size=256, overlap=32),
    )
    tiles = store.tiles()
    assert len(tiles) == 729
    store.save_annotation(tiles[600].id, "tomas", _mask(tiles[600], 2), parent_version=None)
    store.hold(tiles[700].id, "ines")
    out = store.save_if_unchanged(
        NewAnnotation(t.id, "ines", _mask(t, 1), None, state="imported") for t in tiles
    )
    saved = [o.tile_id for o in out if o.version == 1]
    assert len(saved) == 728 and [o.tile_id for o in out if o.version is None] == [tiles[600].id]
    assert store.state_counts()["imported"] == 728
    assert store.tile(tiles[700].id).held_by is None  # her save ends her hold, as any save
    assert all(store.assigned(t.id) == ["ines"] for t in tiles[695:705])
    assert len(store.events(kind="save")) == 1 + 728
    store.close()


def test_saves_of_one_tile_chained_in_one_batch(store):
    a = store.tiles()[0]
    first, second = store.save_annotations([
        NewAnnotation(a.id, "ines", _mask(a, 1), None),
        NewAnnotation(a.id, "ines", _mask(a, 2), 1),  # based on the save just before it
    ])
    assert (first.version, second.version, second.parent_version) == (1, 2, 1)
    # the second names version 1, but the first of the batch comes as version 3
    with pytest.raises(ConflictError, match="based on version 1, but version 3 was saved"):
        store.save_annotations([
            NewAnnotation(a.id, "ines", _mask(a, 3), 2),
            NewAnnotation(a.id, "tomas", _mask(a, 3), 1),
        ])
    assert [h.version for h in store.annotation_history(a.id)] == [1, 2]  # none of them
