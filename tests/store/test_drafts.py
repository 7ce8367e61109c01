"""Drafts: one unsaved edit per tile and annotator, replaced on each autosave."""

import numpy as np
import pytest

from labeler.errors import NotFoundError
from labeler.store import schema as t


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


def test_drafts(store):
    tile = store.tiles()[0]
    assert store.load_draft(tile.id, "ines") is None
    store.save_draft(
        tile.id, "ines", _mask(tile, 2), weak_label=_mask(tile, 255), actions=3, seconds=4.0
    )
    first = store.load_draft(tile.id, "ines")
    assert (first.mask == 2).all() and (first.weak_label == 255).all()
    assert (first.actions, first.seconds, first.parent_version) == (3, 4.0, None)
    store.save_draft(tile.id, "ines", _mask(tile, 3), parent_version=1, actions=5, seconds=6.0)
    d = store.load_draft(tile.id, "ines")
    assert (d.mask == 3).all() and d.actions == 5 and d.weak_label is None
    assert d.parent_version == 1 and d.saved_at >= first.saved_at
    with store.engine.connect() as conn:  # replaced, not added
        assert len(conn.execute(t.drafts.select()).all()) == 1
    store.save_annotation(tile.id, "ines", _mask(tile, 3), parent_version=None)
    assert store.load_draft(tile.id, "ines") is None  # a save clears the draft


def test_drafts_are_per_annotator_and_discarded(store):
    tile = store.tiles()[0]
    store.save_draft(tile.id, "ines", _mask(tile, 1))
    store.save_draft(tile.id, "tomas", _mask(tile, 2))
    assert store.load_draft(tile.id, "kai") is None  # a name never seen has no draft
    store.discard_draft(tile.id, "ines")
    store.discard_draft(tile.id, "kai")  # nothing to discard is fine
    assert store.load_draft(tile.id, "ines") is None
    assert (store.load_draft(tile.id, "tomas").mask == 2).all()
    assert store.tile(tile.id).state == "unseen"  # a draft is not a save


def test_draft_shapes_checked(store):
    tile = store.tiles()[0]
    with pytest.raises(ValueError, match=rf"^mask: expected shape \(256, 256\) of tile {tile.id}"):
        store.save_draft(tile.id, "ines", np.zeros((8, 8), np.uint8))
    with pytest.raises(ValueError, match=r"^weak_label: expected shape \(256, 256\)"):
        store.save_draft(tile.id, "ines", _mask(tile, 1), weak_label=np.zeros((8, 8), np.uint8))
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.save_draft(999, "ines", _mask(tile, 1))
    assert store.load_draft(tile.id, "ines") is None


def test_damaged_draft_named_on_load(store):
    tile = store.tiles()[0]
    store.save_draft(tile.id, "ines", _mask(tile, 1))
    with store.engine.begin() as conn:
        conn.execute(t.drafts.update().values(mask_png=b"\x89PNG broken"))
    with pytest.raises(ValueError, match=rf"^draft of tile {tile.id} by ines: stored mask is not"):
        store.load_draft(tile.id, "ines")
