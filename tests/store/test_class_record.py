"""The class table recorded with the saved masks, checked against the settings' classes."""

import numpy as np
import pytest
import sqlalchemy as sa

from labeler.classes import ClassSchema, LabelClass
from labeler.errors import StoreError
from labeler.store import Store
from labeler.store import schema as t
from labeler.store.class_record import CLASSES_KEY
from tests.store.conftest import make_store


def _schema(*names):
    return ClassSchema([LabelClass(i, n, None) for i, n in enumerate(names)])


def _recorded(store):
    with store.engine.connect() as conn:
        return conn.execute(sa.select(t.meta.c.value).where(t.meta.c.key == CLASSES_KEY)).scalar()


@pytest.fixture
def saved(tmp_path):
    """A store whose one saved mask uses classes 0, 1 and 3 (symptom)."""
    store = make_store(tmp_path / "labeler.db")
    tile = store.tiles()[0]
    mask = np.zeros(tile.shape, np.uint8)
    mask[:4] = 3
    mask[4:8] = 1
    store.save_annotation(tile.id, "ines", mask, parent_version=None, kind="full", state="amended")
    store.close()
    return tmp_path / "labeler.db", tile.id


def test_created_with_the_class_table(saved):
    db, _ = saved
    with Store(f"sqlite:///{db}") as store:
        assert _recorded(store) == '{"0": "soil", "1": "crop", "2": "weed", "3": "symptom"}'


def test_dropping_a_class_in_use_is_refused_and_nothing_recorded(saved):
    db, tile_id = saved
    with pytest.raises(
        StoreError,
        match=r"no longer defines class index 3 \('symptom'\), but 1 saved mask\(s\) use it \(first: tile \d+, version 1\)",
    ) as info:
        Store(f"sqlite:///{db}", schema=_schema("soil", "crop", "weed"))
    assert info.value.kind == "classes" and f"tile {tile_id}," in str(info.value)
    with Store(f"sqlite:///{db}") as store:  # the record is unchanged
        assert '"3": "symptom"' in _recorded(store)


def test_dropping_an_unused_class_or_renaming_is_recorded(saved):
    db, _ = saved
    with Store(f"sqlite:///{db}", schema=_schema("soil", "beet", "thistle", "leaf-spot")) as store:
        assert _recorded(store) == '{"0": "soil", "1": "beet", "2": "thistle", "3": "leaf-spot"}'
    schema = ClassSchema(
        [LabelClass(0, "soil", None), LabelClass(1, "beet", None), LabelClass(3, "spot", None)]
    )
    with Store(f"sqlite:///{db}", schema=schema) as store:  # weed (2) was never saved
        assert '"2"' not in _recorded(store)


def test_a_database_without_a_record_is_judged_by_its_masks(saved):
    db, _ = saved
    with Store(f"sqlite:///{db}") as store, store.engine.begin() as conn:  # an older database
        conn.execute(t.meta.delete().where(t.meta.c.key == CLASSES_KEY))
    with pytest.raises(StoreError, match=r"no longer defines class index 3, but 1 saved"):
        Store(f"sqlite:///{db}", schema=_schema("soil", "crop", "weed"))
    with Store(f"sqlite:///{db}") as store:
        assert _recorded(store) is not None  # recorded once the masks were found to fit
