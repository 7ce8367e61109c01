"""The protocol-following simulated annotator: its first action, what it reaches with
each tool, how several of them disagree."""

from __future__ import annotations

import math
from itertools import product

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.morphology import dilation, disk, erosion
from sklearn.metrics import cohen_kappa_score

from labeler.demo.annotator import AnnotatorProfile
from labeler.demo.clicks import next_click
from labeler.demo.protocol import AnnotatorHabits, ProtocolOptions, run_protocol
from labeler.editor.state import EditorState
from tests.masks.scenes import LEAF_RGB, SOIL_RGB, plant_scene


def _fill_is_bounded() -> bool:
    """Whether the editor's fill stops at colour edges (it passes the tile image on)."""
    image = np.empty((8, 8, 3), np.uint8)
    image[:, :4], image[:, 4:] = SOIL_RGB, LEAF_RGB
    state = EditorState(image, np.zeros((8, 8), np.uint8), active_class=2)
    state.fill_at((4, 6))
    return not (state.mask[:, :4] == 2).any()


FILL_BOUNDED = _fill_is_bounded()


def _two_objects():
    """20 x 24: a 3 x 9 crop bar (27 px) at rows 3-5, cols 2-10 and a 5 x 5 weed square
    (25 px) at rows 10-14, cols 12-16; flat leaf colour on flat soil, no noise."""
    truth = np.zeros((20, 24), np.uint8)
    truth[3:6, 2:11] = 1
    truth[10:15, 12:17] = 2
    return plant_scene((20, 24), [truth > 0], noise_sd=0), truth


# ------------------------------------------------------------------ where it acts
def test_first_action_goes_to_the_click_with_the_target_class():
    image, truth = _two_objects()
    click = next_click(truth, np.zeros_like(truth))
    assert click.point == (4, 3)  # the bar (27 px) beats the square (25 px)
    run = run_protocol(image, truth, options=ProtocolOptions(tools=("brush",), max_actions=1))
    assert run.actions == 1 and run.steps[0].point == (4, 3) and run.steps[0].cls == 1
    assert run.mask[4, 3] == 1


# ------------------------------------------------------------------ what it reaches
def test_brush_alone_reaches_iou_1_in_four_actions():
    image, truth = _two_objects()
    run = run_protocol(
        image, truth, options=ProtocolOptions(tools=("brush",), target_iou=1.0)
    )
    # by hand: 1. the bar: depth 2, radius 1.5, a stroke along row 4 from col 3 to 9
    # covers all 27 px; 2. the square: depth 3 at (12, 14), radius 2.5, a dab (one more
    # pixel along the axis would leave the square) leaves the four corners; 3. corner
    # (10, 12): radius 0.5 along row 10 to col 16 takes (10, 16) too; 4. (14, 12) and (14, 16)
    assert run.actions == 4 and run.ious[-1] == 1.0
    np.testing.assert_array_equal(run.mask, truth)
    assert [s.point for s in run.steps] == [(4, 3), (12, 14), (10, 12), (14, 12)]
    assert all(b >= a for a, b in zip(run.ious, run.ious[1:], strict=False))


def test_scribble_and_refine_reach_iou_1_in_two_actions_per_object():
    image, truth = _two_objects()
    run = run_protocol(image, truth, options=ProtocolOptions(tools=("scribble",), target_iou=1.0))
    # each object is a flat colour region of its own: one scribble plus refine labels it
    assert run.actions == 4 and run.ious[-1] == 1.0
    assert [(s.tool, s.actions, s.kept) for s in run.steps] == [("scribble", 2, True)] * 2


def test_the_tool_that_does_most_per_action_goes_first():
    image, truth = _two_objects()
    run = run_protocol(
        image, truth, options=ProtocolOptions(tools=("scribble", "brush"), target_iou=1.0,
                                              max_actions=1)
    )
    # by hand: one brush stroke of radius 1.5 along row 4 covers the whole 3 x 9 bar in
    # one action; scribble + refine also labels it all but costs two
    assert [(s.tool, s.actions, s.kept) for s in run.steps] == [("brush", 1, True)]
    np.testing.assert_array_equal(run.mask[:8], truth[:8])


def test_a_thin_error_ring_along_the_edge_is_traced_in_one_brush_stroke():
    # a 9 x 9 plant proposed one pixel too small all round: the error is a ring of
    # 32 px one pixel wide (depth 1); a straight stroke covers one side, a stroke traced
    # along the ring's middle (its skeleton, the ring itself) covers all of it
    truth = np.zeros((15, 15), np.uint8)
    truth[3:12, 3:12] = 1
    start = np.zeros_like(truth)
    start[4:11, 4:11] = 1
    image = plant_scene((15, 15), [truth > 0], noise_sd=0)
    run = run_protocol(image, truth, start=start,
                       options=ProtocolOptions(tools=("brush",), target_iou=1.0))
    assert ((truth != start).sum(), run.actions, run.ious[-1]) == (32, 1, 1.0)
    np.testing.assert_array_equal(run.mask, truth)


@pytest.mark.xfail(
    not FILL_BOUNDED, strict=True,
    reason="the editor's fill_at does not pass the tile image to region_at yet, so a fill "
    "on an empty mask floods the tile and is taken back",
)
def test_fill_reaches_iou_1_in_one_action_per_object():
    image, truth = _two_objects()
    run = run_protocol(image, truth, options=ProtocolOptions(target_iou=1.0))
    assert run.actions == 2 and run.ious[-1] == 1.0
    assert [(s.tool, s.kept) for s in run.steps] == [("fill", True)] * 2


def _weed_disc():
    """24 x 24: a weed disc of radius 6 (skimage ``disk(6)``, 113 px) centred at (12, 11),
    flat leaf colour on flat soil, no noise."""
    truth = np.zeros((24, 24), np.uint8)
    truth[6:19, 5:18] = 2 * disk(6)
    return plant_scene((24, 24), [truth > 0], noise_sd=0), truth


def test_a_box_around_a_missed_weed_takes_it_in_one_action():
    image, truth = _weed_disc()
    assert (truth == 2).sum() == 113
    box = run_protocol(image, truth, options=ProtocolOptions(tools=("box",), target_iou=1.0))
    # by hand: the box is the disc's bounding box grown by 2 px (rows 4-20, cols 3-19);
    # in it only two flat colours meet, so GrabCut's foreground is the disc exactly
    assert [(s.tool, s.actions, s.kept) for s in box.steps] == [("box", 1, True)]
    np.testing.assert_array_equal(box.mask, truth)
    # the brush, whose footprint never leaves the disc, needs strokes round its rim
    brush = run_protocol(image, truth, options=ProtocolOptions(tools=("brush",),
                                                              target_iou=1.0))
    assert brush.actions > 1 and brush.ious[-1] == 1.0
    both = run_protocol(image, truth, options=ProtocolOptions(tools=("brush", "box"),
                                                             target_iou=1.0))
    assert [(s.tool, s.actions) for s in both.steps] == [("box", 1)]  # most per action first


def test_a_box_that_would_cover_the_whole_tile_is_not_drawn():
    # the error region is the whole tile: its box would leave GrabCut no background,
    # which the editor refuses, so the annotator does not drag it and brushes instead
    truth = np.full((8, 8), 2, np.uint8)
    image = plant_scene((8, 8), [truth > 0], noise_sd=0)
    run = run_protocol(image, truth, options=ProtocolOptions(tools=("box", "brush"),
                                                            max_actions=2))
    assert run.steps and all(s.tool == "brush" for s in run.steps)


def test_any_tool_order_reaches_iou_1_from_an_empty_mask():
    image, truth = _two_objects()
    for tools in (("fill", "box", "scribble", "brush"), ("fill", "brush"), ("scribble", "brush"),
                  ("box", "brush")):
        run = run_protocol(image, truth, options=ProtocolOptions(tools=tools, target_iou=1.0))
        np.testing.assert_array_equal(run.mask, truth)
        assert run.ious[-1] == 1.0 and run.actions <= 20


def test_session_stops_at_iou_090_and_at_the_action_cap():
    image, truth = _two_objects()
    run = run_protocol(image, truth, options=ProtocolOptions(tools=("brush",)))
    assert run.ious[-1] >= 0.90 and all(v < 0.90 for v in run.ious[:-1])
    assert run.noc() == run.actions
    short = run_protocol(image, truth, options=ProtocolOptions(tools=("brush",), max_actions=1))
    assert short.actions == 1 and short.ious[-1] < 0.90 and short.noc(cap=1) == 1


def test_a_good_proposal_costs_nothing():
    image, truth = _two_objects()
    run = run_protocol(image, truth, start=truth.copy())
    assert run.actions == 0 and run.noc() == 0 and run.steps == ()


def test_undone_fill_on_touching_crop_and_weed_then_another_tool():
    # crop and weed of one colour touch: a fill on the empty mask would take both, so a
    # person who knows the tool does not fill there (fill_precision) and scribbles
    truth = np.zeros((16, 20), np.uint8)
    truth[4:12, 3:10] = 1
    truth[4:12, 10:13] = 2
    image = plant_scene((16, 20), [truth > 0], noise_sd=0)
    run = run_protocol(image, truth, options=ProtocolOptions(target_iou=1.0))
    np.testing.assert_array_equal(run.mask, truth)
    assert run.steps[0].tool != "fill"


# ------------------------------------------------------------------ noise
def test_edge_habits_grow_or_shrink_the_plants():
    truth = np.zeros((20, 20), np.uint8)
    truth[6:14, 5:12] = 2
    truth[0:2, 0:2] = 255
    grown = AnnotatorHabits(edge_bias_px=2).perceive(truth, rng=np.random.default_rng(0))
    # oracle: scikit-image dilation / erosion with a disk (Euclidean radius)
    expected = np.where(dilation(truth == 2, disk(2)), 2, 0).astype(np.uint8)
    expected[0:2, 0:2] = 255
    np.testing.assert_array_equal(grown, expected)
    shrunk = AnnotatorHabits(edge_bias_px=-1).perceive(truth, rng=np.random.default_rng(0))
    inner = erosion(np.pad(truth == 2, 1), disk(1))[1:-1, 1:-1]
    expected = np.where(inner, 2, 0).astype(np.uint8)
    expected[0:2, 0:2] = 255
    np.testing.assert_array_equal(shrunk, expected)


def _grid_of_weeds(n_side=4, radius=3, spacing=16):
    shape = (n_side * spacing, n_side * spacing)
    truth = np.zeros(shape, np.uint8)
    r, c = np.indices(shape)
    for i, j in product(range(n_side), repeat=2):
        cr, cc = spacing // 2 + i * spacing, spacing // 2 + j * spacing
        truth[(r - cr) ** 2 + (c - cc) ** 2 <= radius**2] = 2
    return plant_scene(shape, [truth > 0], noise_sd=0), truth


def _kappa_range(n, area, soil, p_flip, coverage=0.998):
    """The range of Cohen's kappa between two annotators that each call every one of ``n``
    equal small weeds crop with probability ``p_flip``, independently: the exact
    distribution over the multinomial outcomes per weed (both weed, both crop, one each
    way), kappa = (p_o - p_e) / (1 - p_e) of Cohen (1960) for each, then its central
    ``coverage`` interval (derived here from the settings; common practice, no source)."""
    q = 1.0 - p_flip
    probs = (q * q, p_flip * p_flip, p_flip * q, q * p_flip)  # ww, cc, wc, cw
    values = []
    for ww in range(n + 1):
        for cc in range(n + 1 - ww):
            for wc in range(n + 1 - ww - cc):
                cw = n - ww - cc - wc
                counts = (ww, cc, wc, cw)
                logp = math.lgamma(n + 1) + sum(
                    k * math.log(p) - math.lgamma(k + 1) for k, p in zip(counts, probs, strict=True)
                )
                # rows: annotator one (soil, crop, weed); columns: annotator two
                cm = np.array([[soil, 0, 0], [0, cc, cw], [0, wc, ww]], float)
                cm[1:, 1:] *= area
                total = cm.sum()
                po = np.trace(cm) / total
                pe = float((cm.sum(axis=0) * cm.sum(axis=1)).sum()) / total**2
                values.append(((po - pe) / (1 - pe), math.exp(logp)))
    values.sort()
    kappas = np.array([v for v, _ in values])
    cdf = np.cumsum([p for _, p in values])
    tail = (1 - coverage) / 2
    return float(kappas[np.searchsorted(cdf, tail)]), float(kappas[np.searchsorted(cdf, 1 - tail)])


@pytest.mark.parametrize("seed", [3, 11])
def test_two_annotators_disagree_as_their_noise_settings_imply(seed):
    image, truth = _grid_of_weeds()
    p_flip = 0.3
    profile = AnnotatorProfile(
        boundary_px=0.0, miss_small_weed=0.0, confusion=p_flip, confusion_max_px=400,
        symptom_miss=0.0, symptom_grow=0.0,
    )
    habits = AnnotatorHabits(profile=profile)
    options = ProtocolOptions(target_iou=1.0, max_actions=200)
    runs = [
        run_protocol(image, truth, habits=habits, rng=np.random.default_rng([seed, k]),
                     options=options)
        for k in (1, 2)
    ]
    for run in runs:
        np.testing.assert_array_equal(run.mask, run.target)  # each reached its own mask
    kappa = cohen_kappa_score(runs[0].mask.ravel(), runs[1].mask.ravel())  # oracle: sklearn
    area = int((ndi.label(truth == 2)[0] == 1).sum())
    lo, hi = _kappa_range(16, area, int((truth == 0).sum()), p_flip)
    assert 0.3 < lo < hi < 1.0  # the settings imply real disagreement, not none
    assert lo <= kappa <= hi


def test_noiseless_annotators_agree_fully_and_a_seed_repeats_a_run():
    image, truth = _grid_of_weeds(n_side=2)
    options = ProtocolOptions(target_iou=1.0, max_actions=60)
    a = run_protocol(image, truth, options=options)
    b = run_protocol(image, truth, options=options)
    assert cohen_kappa_score(a.mask.ravel(), b.mask.ravel()) == 1.0
    habits = AnnotatorHabits(profile=AnnotatorProfile(confusion=0.5, confusion_max_px=400))
    one = run_protocol(image, truth, habits=habits, rng=np.random.default_rng(4), options=options)
    two = run_protocol(image, truth, habits=habits, rng=np.random.default_rng(4), options=options)
    np.testing.assert_array_equal(one.mask, two.mask)
    assert one.ious == two.ious


# ------------------------------------------------------------------ errors
@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"target_iou": 0.0}, r"target_iou: expected an IoU in \(0, 1\]"),
        ({"max_actions": 0}, "max_actions: expected at least 1"),
        ({"tools": ("lasso",)}, "tools: expected one or more of fill, box, scribble, brush"),
        ({"tools": ()}, "tools: expected one or more"),
        ({"fill_precision": 0.0}, "fill_precision: expected a share"),
        ({"scribble_radius_px": 0.2}, "scribble_radius_px: expected at least 0.5"),
        ({"stroke_length_px": -1}, "stroke_length_px: expected at least 0"),
        ({"box_margin_px": -1}, "box_margin_px: expected a whole number of pixels, at least 0"),
        ({"box_margin_px": 1.5}, "box_margin_px: expected a whole number of pixels"),
    ],
)
def test_option_errors(kwargs, match):
    with pytest.raises(ValueError, match=match):
        ProtocolOptions(**kwargs)


def test_run_errors():
    image, truth = _two_objects()
    with pytest.raises(ValueError, match=r"edge_bias_px: expected a whole number of pixels"):
        AnnotatorHabits(edge_bias_px=5)
    with pytest.raises(ValueError, match=r"truth: expected class indices .* got also \[7\]"):
        run_protocol(image, np.where(truth == 2, 7, truth).astype(np.uint8))
    with pytest.raises(ValueError, match="truth: expected a 2-D uint8 class mask"):
        run_protocol(image, truth.astype(np.int32))
    with pytest.raises(TypeError, match="rng: expected a numpy Generator"):
        run_protocol(image, truth, habits=AnnotatorHabits(profile=AnnotatorProfile()))
