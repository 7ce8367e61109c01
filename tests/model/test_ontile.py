"""Learning on one tile: one scribble on a weed corrects its untouched look-alike.

The scene is invented and hand-made (common practice, no source;
``tests/model/ontile_scene.py``): brown soil, green crop disks, yellow weed disks for
training; the tile under test adds purple weeds the head never saw. The exact truth of
each disk is known, so the checks count pixels against it.
"""

import numpy as np
import pytest

from labeler.model.ontile import OnTileOptions, TileLearner
from labeler.model.predict import propose_tiles
from tests.model.ontile_scene import SIZE, disk, trained_scene


@pytest.fixture(scope="module")
def trained():
    return trained_scene()


def test_a_scribble_on_one_weed_corrects_its_untouched_look_alike(trained):
    head, feats, tile, truth = trained
    learner = TileLearner(head, feats, image=tile)
    first, second, crop = disk(44, 18, 7), disk(40, 46, 7), disk(16, 16, 9)
    soil = truth == 0
    before = learner.proposal()
    assert (before[second] == 2).mean() < 0.5  # the head does not know purple weeds
    marks = np.full(tile.shape[:2], 255, np.uint8)
    marks[43:46, 14:23] = 2  # one short scribble inside the first weed only
    assert not (marks[second] != 255).any()
    after = learner.fit(marks)
    assert (after[second] == 2).mean() >= 0.9  # the untouched second weed follows
    assert (after[first] == 2).mean() >= 0.9
    assert (after[crop] == 1).mean() >= 0.9  # the crop stays crop
    assert (after[soil] == 0).mean() >= 0.98  # and the soil soil
    np.testing.assert_array_equal(learner.fit(marks), after)  # deterministic


def test_without_marks_it_is_the_heads_own_proposal(trained):
    head, feats, tile, _ = trained
    learner = TileLearner(head, feats, image=tile)
    # the product's proposal of a refining head given the pixels (one pass, no dropout)
    (prop,) = propose_tiles(head, [feats], images=[tile], mc_samples=1)
    assert learner.refined and prop.refined
    np.testing.assert_array_equal(learner.proposal(), prop.mask)
    np.testing.assert_array_equal(learner.fit(np.full((SIZE, SIZE), 255, np.uint8)), prop.mask)
    # without pixels: the bilinear stride-4 proposal
    (coarse,) = propose_tiles(head, [feats], mc_samples=1)
    np.testing.assert_array_equal(TileLearner(head, feats).proposal(), coarse.mask)


def test_marks_that_agree_with_the_proposal_change_little(trained):
    head, feats, tile, truth = trained
    learner = TileLearner(head, feats, image=tile)
    base = learner.proposal()
    marks = np.full(truth.shape, 255, np.uint8)
    marks[14:18, 10:22] = base[14:18, 10:22]  # confirm part of what the head said
    marks[2:5, 30:60] = base[2:5, 30:60]
    assert (learner.fit(marks) == base).mean() >= 0.99


@pytest.mark.parametrize(
    ("marks", "match"),
    [
        (np.full((SIZE, SIZE), 255, np.int32), r"marks: expected a uint8 array of the tile's shape"),
        (np.full((8, 8), 255, np.uint8), r"marks: expected a uint8 array of the tile's shape"),
        (np.full((SIZE, SIZE), 3, np.uint8), r"expected the head's class indices \(0, 1, 2\)"),
    ],
)
def test_bad_marks_are_named(trained, marks, match):
    head, feats, tile, _ = trained
    with pytest.raises(ValueError, match=match):
        TileLearner(head, feats, image=tile).fit(marks)


def test_pixels_of_another_tile_are_refused(trained):
    head, feats, tile, _ = trained
    with pytest.raises(ValueError, match=r"image: the tile is \(32, 32\) but its stride-4"):
        TileLearner(head, feats, image=tile[:32, :32])
    with pytest.raises(ValueError, match=r"image: expected the tile's \(H, W, 3\) uint8"):
        TileLearner(head, feats, image=tile[..., 0])


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"steps": 0}, "steps: expected a whole number of at least 1"),
        ({"hidden": 0}, "hidden: expected a whole number of at least 1"),
        ({"max_marks": 2.5}, "max_marks: expected a whole number of at least 1"),
        ({"lr": 0.0}, "lr: expected a positive learning rate"),
        ({"prior_weight": -1.0}, "prior_weight: expected a finite number >= 0"),
        ({"prior_weight": float("nan")}, "prior_weight: expected a finite number >= 0"),
    ],
)
def test_bad_options_are_named(kwargs, match):
    with pytest.raises(ValueError, match=match):
        OnTileOptions(**kwargs)
