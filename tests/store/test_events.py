"""The event log and the counts the status screens show."""

from datetime import timedelta

import numpy as np

from labeler.states import STATES


def _mask(tile, value):
    return np.full(tile.shape, value, np.uint8)


def test_event_log_is_append_only_record(store):
    tile = store.tiles()[0]
    store.save_annotation(tile.id, "ines", _mask(tile, 1), parent_version=None)
    kinds = [e.kind for e in store.events()]
    assert kinds == ["image_added", "save"]
    assert store.events()[0].detail == {"image": "plot-a", "tiles": 6}
    save = store.events(kind="save")[0]
    assert save.annotator == "ines" and save.detail["version"] == 1 and save.tile_id == tile.id


def test_log_event_and_since(store):
    first = store.events()[0]
    store.log_event("export", annotator="ines", detail={"files": 2})
    store.log_event("note", tile_id=3)
    assert [(e.kind, e.annotator, e.tile_id) for e in store.events()[1:]] == [
        ("export", "ines", None),
        ("note", None, 3),
    ]
    later = store.events()[1].at
    assert [e.kind for e in store.events(since=later)] == ["export", "note"]
    assert store.events(since=first.at + timedelta(days=1)) == []
    assert [e.id for e in store.events()] == sorted(e.id for e in store.events())


def test_counts(store):
    a, b, c = store.tiles()[:3]
    store.save_annotation(a.id, "ines", _mask(a, 1), parent_version=None, seconds=30, actions=4)
    store.save_annotation(a.id, "ines", _mask(a, 2), parent_version=1, seconds=10, actions=1)
    store.save_annotation(
        b.id, "ines", _mask(b, 255), parent_version=None, kind="scribble", state="weak", actions=2
    )
    store.set_state(c.id, "parked")
    counts = store.state_counts()
    assert list(counts) == list(STATES)
    assert counts == {**dict.fromkeys(STATES, 0), "unseen": 4, "amended": 1, "parked": 1}
    assert store.state_counts(image_id=a.image_id + 1) == dict.fromkeys(STATES, 0)
    # two saves of one tile count as one tile; seconds and actions add up over every save
    assert store.annotator_counts() == {
        "ines": {"tiles": 1, "weak_labels": 1, "seconds": 40.0, "actions": 7}
    }
