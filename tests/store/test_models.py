"""Model versions: added, never changed; NaN figures stored as null."""

import math

import pytest

from labeler.errors import LabelerError


def test_model_versions_in_order_and_by_kind(store):
    assert store.model_versions() == [] and store.latest_model_version() is None
    cold = store.add_model_version(kind="cold_start", name="vegetation-rows")
    head = store.add_model_version(
        kind="head",
        name="head-1",
        encoder_version="imagenet-1k",
        checkpoint="models/head-1.pt",
        n_train_tiles=12,
        val_iou={"soil": 0.9, "crop": 0.75, "weed": math.nan, "symptom": None},
        miou=0.825,
        details={"epochs": 30},
    )
    assert [m.id for m in store.model_versions()] == [cold.id, head.id]
    assert store.latest_model_version() == head
    assert store.latest_model_version(kind="cold_start") == cold
    assert (head.encoder_version, head.checkpoint, head.n_train_tiles) == (
        "imagenet-1k",
        "models/head-1.pt",
        12,
    )
    # NaN (a class absent from the validation tiles) is stored as null
    assert head.val_iou == {"soil": 0.9, "crop": 0.75, "weed": None, "symptom": None}
    assert head.miou == 0.825 and head.details == {"epochs": 30}
    assert head.created_at.utcoffset().total_seconds() == 0
    assert [e.detail for e in store.events(kind="model_version")] == [
        {"id": cold.id, "kind": "cold_start", "name": "vegetation-rows"},
        {"id": head.id, "kind": "head", "name": "head-1"},
    ]


def test_nan_mean_iou_stored_as_null(store):
    assert store.add_model_version(kind="head", name="h", miou=math.nan).miou is None


def test_unknown_kind_refused(store):
    with pytest.raises(ValueError, match=r"^kind: expected one of \('cold_start', 'head', 'encoder'\), got 'net'$"):
        store.add_model_version(kind="net", name="x")
    assert store.model_versions() == []


def test_versions_are_numbered_per_kind_by_the_database(store):
    a = store.add_model_version(kind="head", weights=b"first head")
    rule = store.add_model_version(kind="cold_start", name="vegetation-rows")
    b = store.add_model_version(kind="head", weights=b"second head")
    enc = store.add_model_version(kind="encoder", weights=b"an encoder")
    assert [(m.name, m.number) for m in (a, rule, b, enc)] == [
        ("head-1", 1), ("vegetation-rows", 1), ("head-2", 2), ("encoder-1", 1)
    ]
    assert store.model_version(b.id) == b


def test_weights_kept_with_their_sha256_and_read_back(store):
    import hashlib

    data = bytes(range(256)) * 50
    mv = store.add_model_version(kind="head", weights=data)
    # SHA-256 of the bytes by Python's hashlib (the reference), stored beside them
    assert mv.weights_sha256 == hashlib.sha256(data).hexdigest()
    assert store.model_weights(mv.id) == data
    rule = store.add_model_version(kind="cold_start", name="rule")
    assert rule.weights_sha256 is None and store.model_weights(rule.id) is None


def test_weights_are_read_in_once_and_never_replaced(store):
    mv = store.add_model_version(kind="head", name="head-1", checkpoint="models/head-1.pt")
    assert store.put_model_weights(mv.id, b"from the file") is True
    assert store.put_model_weights(mv.id, b"another file") is False
    assert store.model_weights(mv.id) == b"from the file"
    assert [e.detail for e in store.events(kind="model_weights_kept")] == [{"id": mv.id}]
    with pytest.raises(LabelerError, match=r"^model version 999: no such model version$"):
        store.put_model_weights(999, b"x")


def test_bad_weights_refused(store):
    with pytest.raises(ValueError, match=r"^weights: expected the non-empty bytes of a weights file, got str$"):
        store.add_model_version(kind="head", weights="not bytes")
    with pytest.raises(ValueError, match=r"^weights: expected the non-empty bytes"):
        store.add_model_version(kind="head", weights=b"")
    assert store.model_versions() == []


def test_weights_changed_in_the_database_are_refused(store, store_url):
    import sqlalchemy as sa

    mv = store.add_model_version(kind="head", weights=b"the trained head")
    engine = sa.create_engine(store_url)
    with engine.begin() as conn:
        conn.execute(sa.text("UPDATE model_weights SET data = :d"), {"d": b"something else"})
    engine.dispose()
    with pytest.raises(LabelerError, match=rf"model version {mv.id}: its weights in the database do not match"):
        store.model_weights(mv.id)
