"""The simulated annotator: corrections and weak labels made from a truth mask."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import ndimage
from sklearn.metrics import cohen_kappa_score

from labeler.demo.annotator import AnnotatorProfile, simulate_annotation, simulate_weak_label
from labeler.demo.fields import make_plot
from tests.common import zoo_four_classes, zoo_two_touching

QUIET = dict(
    boundary_px=0.0, miss_small_weed=0.0, confusion=0.0, symptom_miss=0.0, symptom_grow=0.0
)


@pytest.fixture(scope="module")
def field_truth() -> np.ndarray:
    return make_plot("annotator-test", seed=21, height=160, width=200).truth


def _small_scene() -> np.ndarray:
    """40 x 40: a 12 x 12 crop square holding a 3 x 3 lesion, a 2 x 2 weed (small), a
    9 x 9 weed (81 px, large) and a 3 x 4 crop seedling (12 px)."""
    m = np.zeros((40, 40), np.uint8)
    m[2:14, 2:14] = 1
    m[6:9, 6:9] = 3
    m[20:22, 20:22] = 2
    m[28:37, 28:37] = 2
    m[30:33, 5:9] = 1
    return m


def test_perfect_skill_returns_the_truth(field_truth):
    out = simulate_annotation(field_truth, rng=np.random.default_rng(0), skill=1.0)
    np.testing.assert_array_equal(out, field_truth)


def test_same_generator_state_same_mask(field_truth):
    a = simulate_annotation(field_truth, rng=np.random.default_rng(4), skill=0.5)
    b = simulate_annotation(field_truth, rng=np.random.default_rng(4), skill=0.5)
    c = simulate_annotation(field_truth, rng=np.random.default_rng(5), skill=0.5)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    assert a.dtype == np.uint8 and a.shape == field_truth.shape


def test_missed_small_weeds_become_soil():
    truth = _small_scene()
    p = AnnotatorProfile(**{**QUIET, "miss_small_weed": 1.0, "small_weed_px": 10})
    out = simulate_annotation(truth, rng=np.random.default_rng(0), profile=p)
    expected = truth.copy()
    expected[20:22, 20:22] = 0  # 4 px weed missed; the 81 px weed is too large to miss
    np.testing.assert_array_equal(out, expected)


def test_small_regions_swap_crop_and_weed():
    truth = _small_scene()
    p = AnnotatorProfile(**{**QUIET, "confusion": 1.0, "confusion_max_px": 20})
    out = simulate_annotation(truth, rng=np.random.default_rng(0), profile=p)
    expected = truth.copy()
    expected[20:22, 20:22] = 1  # small weed -> crop
    expected[30:33, 5:9] = 2  # 12 px seedling -> weed; the crop square (135 px) stays
    np.testing.assert_array_equal(out, expected)


def test_missed_lesion_takes_the_leaf_class():
    truth = _small_scene()
    p = AnnotatorProfile(**{**QUIET, "symptom_miss": 1.0})
    out = simulate_annotation(truth, rng=np.random.default_rng(0), profile=p)
    expected = truth.copy()
    expected[6:9, 6:9] = 1
    np.testing.assert_array_equal(out, expected)


def test_enlarged_lesion_grows_by_its_pixels_over_crop_only():
    truth = _small_scene()
    truth[4:11, 4] = 0  # a soil notch beside the lesion: growth must not paint it
    p = AnnotatorProfile(**{**QUIET, "symptom_grow": 1.0, "symptom_grow_px": 2})
    out = simulate_annotation(truth, rng=np.random.default_rng(0), profile=p)
    # loop reference: 8-connected growth by 2 px = Chebyshev distance <= 2 from the lesion
    expected = truth.copy()
    for i in range(40):
        for j in range(40):
            near = max(max(6 - i, i - 8, 0), max(6 - j, j - 8, 0)) <= 2
            if near and truth[i, j] == 1:
                expected[i, j] = 3
    np.testing.assert_array_equal(out, expected)


def test_boundary_jitter_stays_within_its_reach(field_truth):
    reach = 2.0
    p = AnnotatorProfile(**{**QUIET, "boundary_px": reach})
    out = simulate_annotation(field_truth, rng=np.random.default_rng(8), profile=p)
    changed = out != field_truth
    assert changed.any()
    # every changed pixel lies within `reach` of a pixel of the class it now has
    for cls in np.unique(out[changed]):
        dist = ndimage.distance_transform_edt(field_truth != cls)
        assert (dist[changed & (out == cls)] <= reach).all()
    # both directions occur: classes grow in some places and shrink in others
    grew = (changed & (out == 1)).sum()
    shrank = (changed & (field_truth == 1)).sum()
    assert grew > 0 and shrank > 0


def test_two_annotators_agree_less_at_lower_skill(field_truth):
    # Cohen's kappa between two simulated annotators (scikit-learn cohen_kappa_score as
    # the oracle of the statistic); the ordering is the property under test
    def kappa(skill: float) -> float:
        a = simulate_annotation(field_truth, rng=np.random.default_rng(1), skill=skill)
        b = simulate_annotation(field_truth, rng=np.random.default_rng(2), skill=skill)
        return cohen_kappa_score(a.ravel(), b.ravel())

    k_good, k_mid, k_poor = kappa(0.95), kappa(0.7), kappa(0.2)
    assert 1.0 >= k_good > k_mid > k_poor > 0.4


def test_unlabelled_pixels_stay_unlabelled():
    truth = zoo_four_classes()
    truth[0, :] = 255
    out = simulate_annotation(truth, rng=np.random.default_rng(3), skill=0.0)
    assert (out[0, :] == 255).all()
    assert (out[1:] != 255).all()


@settings(max_examples=25, deadline=None)
@given(
    arrays(
        np.uint8,
        st.tuples(st.integers(2, 16), st.integers(2, 16)),
        elements=st.sampled_from([0, 1, 2, 3, 255]),
    ),
    st.integers(0, 2**16),
    st.floats(0.0, 1.0),
)
def test_annotation_keeps_the_schema(truth, seed, skill):
    out = simulate_annotation(truth, rng=np.random.default_rng(seed), skill=skill)
    assert out.shape == truth.shape and out.dtype == np.uint8
    np.testing.assert_array_equal(out == 255, truth == 255)
    assert set(np.unique(out[truth != 255])) <= {0, 1, 2, 3}


def test_weak_label_strokes_are_true_in_every_class(field_truth):
    weak = simulate_weak_label(field_truth, rng=np.random.default_rng(6), n_per_class=3)
    labelled = weak != 255
    np.testing.assert_array_equal(weak[labelled], field_truth[labelled])
    present = set(np.unique(field_truth))
    assert set(np.unique(weak[labelled])) == present
    assert labelled.mean() < 0.05  # a few strokes, not a mask
    again = simulate_weak_label(field_truth, rng=np.random.default_rng(6), n_per_class=3)
    np.testing.assert_array_equal(weak, again)


def test_weak_label_strokes_on_a_wide_region_keep_off_its_edge():
    truth = zoo_two_touching()  # classes 1 and 2 side by side, 6 x 3 each, in soil
    big = np.kron(truth, np.ones((8, 8), np.uint8))  # 64 x 64, regions 48 x 24
    weak = simulate_weak_label(big, rng=np.random.default_rng(2), width_px=3, classes=(1, 2))
    assert set(np.unique(weak)) == {1, 2, 255}  # soil not asked for
    for cls in (1, 2):
        # edge pixels of a region are at distance 1 from outside; stroke pixels are >= 2
        depth = ndimage.distance_transform_edt(big == cls)
        assert (weak == cls).sum() >= 9
        assert depth[weak == cls].min() >= 2.0


def test_errors_name_the_parameter():
    truth = zoo_four_classes()
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="truth: expected a 2-D uint8 class mask"):
        simulate_annotation(truth.astype(np.int32), rng=rng)
    with pytest.raises(TypeError, match="rng: expected a numpy Generator, got int"):
        simulate_annotation(truth, rng=3)
    with pytest.raises(ValueError, match="skill: expected a value in 0..1, got 1.5"):
        simulate_annotation(truth, rng=rng, skill=1.5)
    with pytest.raises(ValueError, match="confusion: expected a probability in 0..1"):
        AnnotatorProfile(confusion=2.0)
    with pytest.raises(ValueError, match="boundary_px: expected 0..4 pixels"):
        AnnotatorProfile(boundary_px=-1)
    with pytest.raises(ValueError, match="small_weed_px: expected a pixel count >= 0"):
        AnnotatorProfile(small_weed_px=-5)
    with pytest.raises(ValueError, match="boundary_scale_px: expected a positive length"):
        AnnotatorProfile(boundary_scale_px=0)
    with pytest.raises(ValueError, match="n_per_class: expected at least 1 stroke"):
        simulate_weak_label(truth, rng=rng, n_per_class=0)
    with pytest.raises(ValueError, match="width_px: expected at least 1 pixel"):
        simulate_weak_label(truth, rng=rng, width_px=0.5)
    with pytest.raises(ValueError, match="length_px: expected at least 1 pixel"):
        simulate_weak_label(truth, rng=rng, length_px=0)
    with pytest.raises(ValueError, match="truth: expected a non-empty mask"):
        simulate_weak_label(np.zeros((0, 4), np.uint8), rng=rng)
