"""Model versions: added, never changed; NaN figures stored as null."""

import math

import pytest


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
