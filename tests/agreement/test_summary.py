"""The pure agreement summary behind the report (labeler/agreement/summary.py).

Pooled figures are checked against scikit-learn on the concatenated commonly labelled
pixels (oracle); the scenario is an invented farm ("Hollow Ash"), its plots and annotators.
"""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, timedelta

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score, jaccard_score

from labeler import agreement as ag
from labeler import metrics as mt
from labeler.classes import DEFAULT_SCHEMA, ClassSchema, LabelClass
from labeler.imagery.tiling import Window

T0 = datetime(2025, 6, 2, 9, 0)


def plot_masks(seed: int, shape=(24, 32), noise=0.15, k=4):
    """Truth-like mask plus a noisy second annotator (seeded)."""
    rng = np.random.default_rng(seed)
    a = rng.integers(0, k, shape).astype(np.uint8)
    b = np.where(rng.random(shape) < noise, rng.integers(0, k, shape), a).astype(np.uint8)
    return a, b


def scenario():
    """Three plots of Hollow Ash farm; 'ines' labels only the left half of plot B."""
    items = []
    for n, name in enumerate(["hollow-ash-A", "hollow-ash-B", "hollow-ash-C"]):
        a, b = plot_masks(n, noise=0.1 + 0.2 * n)
        c = a.copy()
        c[:, 16:] = 255
        masks = {"odile": a, "marek": b}
        saved = {"odile": T0 + timedelta(days=n), "marek": T0 + timedelta(days=n, hours=3)}
        if n == 1:
            masks["ines"] = c
            saved["ines"] = T0 + timedelta(days=3)
        tiles = {"t0": (0, 0, 12, 16), "t1": Window(12, 16, 12, 16)}
        items.append(ag.ComparedImage(name, masks, saved, tiles=tiles))
    return items


def test_pair_figures_match_sklearn_on_pooled_pixels():
    items = scenario()
    s = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA)
    labels = [p.annotators for p in s.pairs]
    assert labels == [("ines", "marek"), ("ines", "odile"), ("marek", "odile")]
    mo = s.pairs[2]
    assert mo.images_compared == 3
    # pooled over images: concatenate the pixels both labelled, rows = marek
    x = np.concatenate([it.masks["marek"].ravel() for it in items])
    y = np.concatenate([it.masks["odile"].ravel() for it in items])
    assert mo.pixels_compared == x.size
    # oracle: sklearn cohen_kappa_score and jaccard_score(average=None)
    np.testing.assert_allclose(mo.kappa, cohen_kappa_score(x, y), atol=1e-12)
    np.testing.assert_allclose(mo.iou, jaccard_score(x, y, average=None), atol=1e-12)
    assert mo.band == ag.landis_koch_band(mo.kappa)
    np.testing.assert_array_equal(mo.confusion,
                                  mt.confusion_matrix(x, y, n_classes=4))
    # ines only on plot B and only on her labelled half
    im = s.pairs[0]
    assert im.images_compared == 1 and im.pixels_compared == 24 * 16


def test_class_figures_pool_every_pair():
    items = scenario()
    s = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA)
    xs, ys = [], []
    for it in items:
        names = sorted(it.masks)
        for i, a in enumerate(names):
            for b in names[i + 1:]:
                ma, mb = it.masks[a], it.masks[b]
                keep = (ma != 255) & (mb != 255)
                xs.append(ma[keep])
                ys.append(mb[keep])
    x, y = np.concatenate(xs), np.concatenate(ys)
    ref = jaccard_score(x, y, average=None)  # oracle: scikit-learn
    assert [c.name for c in s.classes] == ["soil", "crop", "weed", "symptom"]
    np.testing.assert_allclose([c.iou for c in s.classes], ref, atol=1e-12)
    np.testing.assert_allclose(s.overall.kappa, cohen_kappa_score(x, y), atol=1e-12)
    assert s.overall.pixels_compared == x.size
    weed = s.classes[2]
    assert weed.pixels == int(np.count_nonzero((x == 2) | (y == 2)))
    # one-vs-rest kappa of the class, oracle: sklearn on the binarised labels
    np.testing.assert_allclose(weed.kappa, cohen_kappa_score(x == 2, y == 2), atol=1e-12)


def test_images_tiles_and_least_agreed():
    items = scenario()
    s = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA, metric="kappa")
    first = s.images[0]
    assert first.annotators == ("marek", "odile")
    a, b = items[0].masks["marek"], items[0].masks["odile"]
    assert first.agreement == ag.tile_agreement(a, b, n_classes=4)
    assert first.worst_pair == ("marek", "odile")
    t1 = first.tiles[1]
    assert t1.window == (12, 16, 12, 16)
    np.testing.assert_allclose(
        t1.agreement, ag.tile_agreement(a[12:, 16:], b[12:, 16:], n_classes=4), atol=1e-12
    )
    # noise grows from plot A to C, so C's tiles are the least agreed
    least = s.least_agreed(3)
    assert len(least) == 3 and all(isinstance(e, ag.TileFigures) for e in least)
    assert least[0].image == "hollow-ash-C"
    values = [e.agreement for e in least]
    assert values == sorted(values)
    # with iou as the project metric the per-image scalar is the mean IoU
    s_iou = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA, metric="iou")
    assert s_iou.images[0].agreement == ag.tile_agreement(a, b, n_classes=4, metric="iou")


def test_least_agreed_images_when_no_tiles():
    items = [ag.ComparedImage(it.image, it.masks, it.saved_at) for it in scenario()]
    least = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA).least_agreed(10)
    assert [e.image for e in least] == ["hollow-ash-C", "hollow-ash-B", "hollow-ash-A"]


def test_days_follow_the_later_save_and_since_filters():
    items = scenario()
    s = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA)
    # plot B's pairs with ines fall on June 5 (her later save); the others on their day
    assert [d.day for d in s.days] == [date(2025, 6, d) for d in (2, 3, 4, 5)]
    assert [d.comparisons for d in s.days] == [1, 1, 1, 2]
    day0 = s.days[0]
    a, b = items[0].masks["marek"], items[0].masks["odile"]
    np.testing.assert_allclose(day0.kappa, cohen_kappa_score(a.ravel(), b.ravel()), atol=1e-12)
    later = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA, since=date(2025, 6, 5))
    assert [d.day for d in later.days] == [date(2025, 6, 5)]
    mo = [p for p in later.pairs if p.annotators == ("marek", "odile")][0]
    assert mo.images_compared == 0 and math.isnan(mo.kappa)
    # a datetime works too
    at = ag.summarise_agreement(items, schema=DEFAULT_SCHEMA, since=T0 + timedelta(days=2))
    assert sum(d.comparisons for d in at.days) == 3


def test_pair_without_common_pixels_is_zero_compared_not_error():
    left = np.full((6, 6), 255, np.uint8)
    left[:, :3] = 1
    right = np.full((6, 6), 255, np.uint8)
    right[:, 3:] = 2
    item = ag.ComparedImage("hollow-ash-D", {"odile": left, "marek": right},
                            {"odile": T0, "marek": T0})
    s = ag.summarise_agreement([item], schema=DEFAULT_SCHEMA)
    (pair,) = s.pairs
    assert pair.images_compared == 0 and pair.pixels_compared == 0
    assert math.isnan(pair.kappa) and pair.band == "undefined"
    assert math.isnan(s.images[0].agreement) and s.images[0].worst_pair is None
    assert s.days == () and s.least_agreed() == ()


def test_single_annotator_and_empty_inputs():
    one = ag.ComparedImage("hollow-ash-E", {"odile": np.zeros((4, 4), np.uint8)},
                           {"odile": T0})
    s = ag.summarise_agreement([one], schema=DEFAULT_SCHEMA)
    assert s.pairs == () and math.isnan(s.images[0].agreement)
    empty = ag.summarise_agreement([], schema=DEFAULT_SCHEMA)
    assert empty.images == () and empty.overall.pixels_compared == 0


def test_schema_with_gaps_and_progress():
    schema = ClassSchema([LabelClass(0, "soil", None), LabelClass(2, "weed", "#E69F00")])
    a = np.array([[0, 2], [2, 2]], np.uint8)
    b = np.array([[0, 2], [0, 2]], np.uint8)
    calls = []
    s = ag.summarise_agreement([ag.ComparedImage("p", {"x": a, "y": b}, {"x": T0, "y": T0})],
                               schema=schema, progress=lambda d, t: calls.append((d, t)))
    assert calls == [(1, 1)]
    assert s.class_indices == (0, 2) and s.class_names == ("soil", "weed")
    assert s.pairs[0].confusion.shape == (3, 3)
    np.testing.assert_allclose(s.classes[1].iou, 2 / 3, atol=1e-12)  # counted by hand


def test_summary_errors():
    a = np.zeros((4, 4), np.uint8)
    with pytest.raises(ValueError, match="p1: mask of y has shape"):
        ag.summarise_agreement(
            [ag.ComparedImage("p1", {"x": a, "y": np.zeros((4, 5), np.uint8)},
                              {"x": T0, "y": T0})], schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match=r"p2: saved_at lacks the annotator\(s\) \['y'\]"):
        ag.summarise_agreement([ag.ComparedImage("p2", {"x": a, "y": a}, {"x": T0})],
                               schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match=r"p3: mask of y: holds values \[9\]"):
        ag.summarise_agreement(
            [ag.ComparedImage("p3", {"x": a, "y": np.full((4, 4), 9, np.uint8)},
                              {"x": T0, "y": T0})], schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match="p4: tile t9 window .* reaches beyond the image"):
        ag.summarise_agreement(
            [ag.ComparedImage("p4", {"x": a, "y": a}, {"x": T0, "y": T0},
                              tiles={"t9": (2, 2, 4, 4)})], schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match="p5: saved_at mixes timezone-aware and naive"):
        ag.summarise_agreement(
            [ag.ComparedImage("p5", {"x": a, "y": a},
                              {"x": T0, "y": T0.replace(tzinfo=UTC)})],
            schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match="metric: expected 'kappa' or 'iou'"):
        ag.summarise_agreement([], schema=DEFAULT_SCHEMA, metric="dice")
    with pytest.raises(TypeError, match="schema: expected a ClassSchema"):
        ag.summarise_agreement([], schema={"soil": 0})
    with pytest.raises(TypeError, match="items: expected ComparedImage entries"):
        ag.summarise_agreement([{"image": "p"}], schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match="p6: tile t0: expected a window"):
        ag.summarise_agreement(
            [ag.ComparedImage("p6", {"x": a, "y": a}, {"x": T0, "y": T0},
                              tiles={"t0": "top-left"})], schema=DEFAULT_SCHEMA)
