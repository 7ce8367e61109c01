"""Texts of the agreement and model screens against scikit-learn and hand-made records."""

from datetime import UTC, datetime

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score, jaccard_score

from labeler.agreement import ComparedImage, summarise_agreement
from labeler.classes import DEFAULT_SCHEMA, ClassSchema, LabelClass
from labeler.metrics import format_iou
from labeler.store.records import ModelVersionRecord
from labeler.tui.figures import (
    AGREEMENT_COLUMNS,
    agreement_cells,
    miou_series,
    model_cells,
    model_columns,
)


def _summary(seed=3):
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 4, (20, 30)).astype(np.uint8)
    b = a.copy()
    flip = rng.random(a.shape) < 0.3
    b[flip] = rng.integers(0, 4, int(flip.sum()))
    when = datetime(2024, 6, 3, 9, 0, tzinfo=UTC)
    item = ComparedImage(image="mill-field", masks={"ana": a, "bo": b},
                         saved_at={"ana": when, "bo": when})
    return a, b, summarise_agreement([item], schema=DEFAULT_SCHEMA)


def test_agreement_rows_match_scikit_learn():
    a, b, summary = _summary()
    rows = agreement_cells(summary, schema=DEFAULT_SCHEMA)
    assert all(len(r) == len(AGREEMENT_COLUMNS) for r in rows)
    # one block of 1 + 4 rows for the pair, one for all pairs pooled
    assert len(rows) == 10
    assert rows[0][:2] == ("ana / bo", "all") and rows[5][:2] == ("all pairs", "all")
    # oracle: scikit-learn cohen_kappa_score on the pixels (Cohen 1960)
    kappa = cohen_kappa_score(a.ravel(), b.ravel())
    assert rows[0][2] == f"{kappa:.3f}"
    assert rows[0][5] == "1"
    for pos, c in enumerate(DEFAULT_SCHEMA, start=1):
        # one-vs-rest kappa and IoU of each class (scikit-learn on the binarised masks)
        k_c = cohen_kappa_score(a.ravel() == c.index, b.ravel() == c.index)
        iou_c = jaccard_score(a.ravel() == c.index, b.ravel() == c.index)
        assert rows[pos][:3] == ("", c.name, f"{k_c:.3f}")
        assert rows[pos][4] == f"{iou_c:.3f}"


def test_landis_koch_band_in_rows():
    a, b, summary = _summary()
    rows = agreement_cells(summary, schema=DEFAULT_SCHEMA)
    kappa = cohen_kappa_score(a.ravel(), b.ravel())
    # Landis & Koch (1977), Biometrics 33(1) p. 165 bands (upper bound inclusive)
    expected = next(name for upper, name in ((0.2, "slight"), (0.4, "fair"), (0.6, "moderate"),
                                             (0.8, "substantial"), (1.0, "almost perfect"))
                    if kappa <= upper)
    assert rows[0][3] == expected


def test_agreement_rows_without_pairs_and_schema_mismatch():
    summary = summarise_agreement([], schema=DEFAULT_SCHEMA)
    assert agreement_cells(summary, schema=DEFAULT_SCHEMA) == []
    other = ClassSchema([LabelClass(0, "soil", None), LabelClass(1, "vine", "#009E73")])
    with pytest.raises(ValueError, match=r"schema: classes \(0, 1\) differ from the summary's"):
        agreement_cells(summary, schema=other)


def _version(vid, *, miou, val_iou, kind="head", name=None):
    return ModelVersionRecord(
        id=vid, kind=kind, name=name or f"head-{vid}", encoder_version="lite0", checkpoint=None,
        n_train_tiles=12 * vid, val_iou=val_iou, miou=miou, details=None,
        created_at=datetime(2024, 6, vid, 14, 30, tzinfo=UTC),
    )


def test_model_rows():
    assert model_columns(DEFAULT_SCHEMA) == (
        "version", "kind", "made (UTC)", "tiles", "soil IoU", "crop IoU", "weed IoU", "symptom IoU",
        "mIoU",
    )
    v = _version(2, miou=0.6234, val_iou={"soil": 0.9, "crop": 0.8123, "weed": 0.41,
                                          "symptom": None})
    assert model_cells(v, schema=DEFAULT_SCHEMA) == (
        "head-2", "head", "2024-06-02 14:30", "24", "0.900", "0.812", "0.410", "-", "0.623",
    )
    cold = _version(1, miou=None, val_iou=None, kind="cold_start", name="cold-start")
    assert model_cells(cold, schema=DEFAULT_SCHEMA)[4:] == ("-",) * 5


def test_iou_line_and_series():
    assert format_iou({"crop": 0.8123, "weed": None}, names=("crop", "weed", "symptom")) == (
        "crop 0.812 · weed - · symptom -"
    )
    versions = [_version(1, miou=None, val_iou=None), _version(2, miou=0.5, val_iou={}),
                _version(3, miou=float("nan"), val_iou={}), _version(4, miou=0.625, val_iou={})]
    assert miou_series(versions) == [0.5, 0.625]
