"""Learning on one tile: one scribble on a weed corrects its untouched look-alike.

The scene is invented and hand-made (common practice, no source;
``tests/model/ontile_scene.py``): brown soil, green crop disks, yellow weed disks for
training; the tile under test adds purple weeds the head never saw. The exact truth of
each disk is known, so the checks count pixels against it.
"""

import numpy as np
import pytest
import torch

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


def _like_marks_loop(feats, head_arg, head_top, head_sure, where, target, arg, k):
    """Slow reference of the look-alike rule: pixel by pixel, prototype by prototype."""
    d, n = feats.shape
    unit = [feats[:, i] / max(np.linalg.norm(feats[:, i]), 1e-6) for i in range(n)]
    marked = set(where.tolist())
    protos = []
    for c in range(k):
        sel = [w for w, t in zip(where.tolist(), target.tolist(), strict=True) if t == c]
        if sel:
            protos.append((np.mean([unit[i] for i in sel], axis=0), c))
        sel = [i for i in range(n)
               if i not in marked and head_arg[i] == c and head_top[i] >= head_sure]
        if len(sel) >= 5:
            protos.append((np.mean([unit[i] for i in sel], axis=0), -1))
    out = np.zeros(n, bool)
    for i in range(n):
        sims = [float(p @ unit[i]) / max(np.linalg.norm(p), 1e-6) for p, _ in protos]
        out[i] = protos[int(np.argmax(sims))][1] == arg[i]
    return out


def test_the_look_alike_rule_matches_a_slow_loop(trained):
    head, feats, tile, truth = trained
    learner = TileLearner(head, feats, image=tile)
    rng = np.random.default_rng(3)
    n = SIZE * SIZE
    where = torch.from_numpy(np.sort(rng.choice(n, 40, replace=False)))
    target = torch.from_numpy(rng.integers(0, 3, 40))
    arg = torch.from_numpy(rng.integers(0, 3, n))
    got = learner._like_marks(where, target, arg)
    want = _like_marks_loop(learner._feats.numpy(), learner._head_arg.numpy(),
                            learner._head_top.numpy(), learner.options.head_sure,
                            where.numpy(), target.numpy(), arg.numpy(), 3)
    # cosine ties between prototypes could differ in the last bit; on seeded random
    # marks there are none, so the two agree exactly
    np.testing.assert_array_equal(got, want)


def test_marked_pixels_take_their_mark_and_the_rule_moves_less_than_the_whole_fit(trained):
    head, feats, tile, truth = trained
    learner = TileLearner(head, feats, image=tile)
    base = learner.proposal()
    crop = disk(16, 16, 9)
    marks = np.full(truth.shape, 255, np.uint8)
    marks[14:17, 12:20] = 2  # an annotator's slip: weed marked on the green crop
    marks[2:5, 30:60] = 0  # and soil confirmed
    after = learner.fit(marks)
    np.testing.assert_array_equal(after[marks != 255], marks[marks != 255])
    unmarked = marks == 255
    whole_learner = TileLearner(head, feats, image=tile,
                                options=OnTileOptions(look_alike=False))
    whole = whole_learner.fit(marks)
    np.testing.assert_array_equal(whole[marks != 255], marks[marks != 255])
    # the slip's fit taken whole moves many unmarked pixels away from the head (most of
    # the crop disk turns weed); the rule moves fewer, and the soil stays soil (the
    # exact counts depend on the tiny head's training, which threads can change)
    moved_whole = int((whole[unmarked] != base[unmarked]).sum())
    moved = int((after[unmarked] != base[unmarked]).sum())
    assert moved < moved_whole
    assert (after[crop] == 1).mean() > (whole[crop] == 1).mean()
    assert (after[unmarked & (truth == 0)] == 0).mean() >= 0.98


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
        ({"head_sure": 0.0}, r"head_sure: expected a probability in \(0, 1\]"),
        ({"head_sure": 1.5}, r"head_sure: expected a probability in \(0, 1\]"),
        ({"fit_sure": 1.0}, r"fit_sure: expected a probability in \[0, 1\)"),
        ({"fit_sure": -0.1}, r"fit_sure: expected a probability in \[0, 1\)"),
    ],
)
def test_bad_options_are_named(kwargs, match):
    with pytest.raises(ValueError, match=match):
        OnTileOptions(**kwargs)
