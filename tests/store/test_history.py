"""Reading saved versions back; lineages of overlap tiles; who may see which mask."""

import numpy as np
import pytest

from labeler.errors import ConflictError, NotFoundError
from labeler.imagery.write import png_bytes
from labeler.store import schema as t
from labeler.store.base import now
from tests.store.conftest import make_store


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


def test_overlap_tiles_have_own_lineages(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=1.0)
    tile = store.tiles()[0]
    assert tile.overlap
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    # tomas sees only his own (no) mask and may save from no parent
    assert store.visible_annotation(tile.id, "tomas") is None
    assert store.lineage_head(tile.id, "tomas") is None
    assert store.lineage_head(tile.id, "tomas", settling=True) == 1
    rec = store.save_annotation(tile.id, "tomas", _mask(tile, 2), parent_version=None)
    assert rec.version == 2
    assert store.visible_annotation(tile.id, "ines").annotator == "ines"
    assert store.savers(tile.id) == ["ines", "tomas"]
    # a reviewer settles from the newest version of the tile
    with pytest.raises(ConflictError, match="based on version 1, but version 2 was saved"):
        store.save_annotation(tile.id, "rev", _mask(tile, 1), parent_version=1, state="settled")
    store.save_annotation(tile.id, "rev", _mask(tile, 1), parent_version=2, state="settled")
    assert store.tile(tile.id).state == "settled"
    assert store.savers(tile.id) == ["ines", "tomas"]  # the reviewer is not a saver
    # once settled, everyone sees the decision and follows the tile's newest version
    assert store.visible_annotation(tile.id, "tomas").annotator == "rev"
    assert store.lineage_head(tile.id, "ines") == 3
    store.close()


def test_ordinary_tile_has_one_lineage(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    assert store.lineage_head(tile.id, "tomas") == 1
    assert store.visible_annotation(tile.id, "tomas").annotator == "ines"
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.lineage_head(999, "ines")


def test_latest_annotation_filters(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    store.save_annotation(tile.id, "tomas", _mask(tile, 2), parent_version=1)
    store.save_annotation(
        tile.id, "ines", _mask(tile, 255), parent_version=2, kind="scribble", state="weak"
    )
    assert store.latest_annotation(tile.id).version == 2
    assert store.latest_annotation(tile.id, annotator="ines").version == 1
    assert store.latest_annotation(tile.id, kind=None).version == 3
    assert store.latest_annotation(tile.id, annotator="ines", kind="scribble").version == 3
    assert store.latest_annotation(tile.id, annotator="kai") is None
    assert store.latest_annotation(store.tiles()[1].id) is None


def test_annotations_filters(store):
    a, b = store.tiles()[:2]
    store.save_annotation(a.id, "ines", _mask(a, 1), parent_version=None)
    mid = now()
    store.save_annotation(b.id, "ines", _mask(b, 2), parent_version=None)
    store.save_annotation(
        b.id, "ines", _mask(b, 255), parent_version=1, kind="scribble", state="weak"
    )
    assert [(r.tile_id, r.kind) for r in store.annotations()] == [(a.id, "full"), (b.id, "full")]
    assert len(store.annotations(kind=None)) == 3
    assert [r.tile_id for r in store.annotations(since=mid)] == [b.id]
    assert [r.version for r in store.annotations(kind=None, tile_ids=[b.id])] == [1, 2]
    assert store.annotations(tile_ids=[]) == []


def test_mask_shape_checked_on_read(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    # damage the row behind the store's back: a mask of another size
    with store.engine.begin() as conn:
        conn.execute(
            t.annotations.update().values(mask_png=png_bytes(np.zeros((10, 10), np.uint8)))
        )
    rec = store.latest_annotation(tile.id)
    with pytest.raises(ValueError, match=r"shape \(10, 10\), but the tile is \(256, 256\)"):
        rec.mask()


def test_damaged_bytes_named_on_read(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    with store.engine.begin() as conn:
        conn.execute(t.annotations.update().values(mask_png=b"not a png"))
    rec = store.latest_annotation(tile.id)
    with pytest.raises(
        ValueError, match=rf"^annotation v1 of tile {tile.id}: stored mask is not a readable PNG"
    ):
        rec.mask()


def test_tile_work_agrees_with_lineage_head_and_latest_annotation(tmp_path):
    # reference: the one-tile queries lineage_head and latest_annotation, tile by tile
    store = make_store(tmp_path / "w.db", overlap_share=0.5)
    tiles = store.tiles()
    assert {t.overlap for t in tiles} == {True, False}
    rng = np.random.default_rng(13)
    names = ["ines", "tomas", "rev"]
    for _ in range(40):
        t = tiles[int(rng.integers(len(tiles)))]
        who = names[int(rng.integers(2))]
        kind = "full" if rng.random() < 0.7 else "scribble"
        parent = store.lineage_head(t.id, who)
        state = "amended" if kind == "full" else "weak"
        store.save_annotation(t.id, who, _mask(t, 1), parent_version=parent, kind=kind,
                              state=state)
    settle = next(t for t in tiles if t.overlap and store.annotation_history(t.id))
    store.set_state(settle.id, "contested")
    store.save_annotation(settle.id, "rev", _mask(settle, 2),
                          parent_version=store.lineage_head(settle.id, "rev", settling=True),
                          state="settled")
    for who in [*names, "nobody-yet"]:
        work = store.tile_work(who)
        assert [w.tile.id for w in work] == [t.id for t in tiles]
        for w in work:
            head = store.lineage_head(w.tile.id, who)
            assert w.head == head
            if head is not None:
                rec = next(a for a in store.annotation_history(w.tile.id) if a.version == head)
                assert (w.head_by, w.head_kind) == (rec.annotator, rec.kind)
            full = store.latest_annotation(w.tile.id, kind="full")
            weak = store.latest_annotation(w.tile.id, kind="scribble")
            assert w.full_by == (full.annotator if full else None)
            assert w.weak_by == (weak.annotator if weak else None)
            assert w.tile == store.tile(w.tile.id)
    assert store.tile_work("ines", image_id=999) == []
    assert len(store.tile_work("ines", image_id=tiles[0].image_id)) == len(tiles)
    store.close()


def test_annotations_at_reads_the_named_versions(store):
    a, b = store.tiles()[:2]
    for k in range(3):
        store.save_annotation(a.id, "ines", _mask(a, k), parent_version=k or None)
    store.save_annotation(b.id, "tomas", _mask(b, 3), parent_version=None)
    got = store.annotations_at([(a.id, 2), (b.id, 1), (b.id, 7), (a.id, 2)])
    assert set(got) == {(a.id, 2), (b.id, 1)}  # version 7 does not exist
    assert (got[(a.id, 2)].mask() == 1).all() and got[(b.id, 1)].annotator == "tomas"
    assert store.annotations_at([]) == {}
