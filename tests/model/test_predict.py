"""Proposals: the torch uncertainty twins must equal labeler.picker's numpy definitions."""

import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from labeler.model.head import HeadConfig, ProposalHead, features_to_tensors
from labeler.model.predict import (
    _argmax_first,
    _dropout_masks,
    _masked_weights,
    bald_t,
    entropy_t,
    margin_t,
    propose_tiles,
)
from labeler.model.refine import pixel_input
from labeler.picker import pixel_bald, pixel_entropy, pixel_least_confidence, pixel_margin
from tests.model.conftest import random_features as _features


@pytest.fixture(scope="module")
def head():
    torch.manual_seed(0)
    h = ProposalHead(HeadConfig(class_indices=(0, 1, 3), width=8, dropout=0.3))
    with torch.no_grad():  # make the classifier confident enough to vary between passes
        h.classifier.weight.mul_(5.0)
    return h.eval()


# -- torch twins against labeler.picker ---------------------------------------------------
def test_twins_on_worked_values():
    # worked by hand from the definitions (Shannon entropy in nats; BALD of Houlsby et al.
    # 2011, arXiv:1112.5745): p = (0.5, 0.3, 0.2): H = 1.029653 nats, margin 0.2;
    # BALD of (1,0),(0,1) = ln 2; of (0.9,0.1),(0.1,0.9) = 0.368064
    p = torch.tensor([0.5, 0.3, 0.2], dtype=torch.float64)
    assert float(entropy_t(p, dim=0)) == pytest.approx(1.029653, abs=1e-6)
    assert float(margin_t(p, dim=0)) == pytest.approx(0.2, abs=1e-12)
    s = torch.tensor([[1.0, 0.0], [0.0, 1.0]], dtype=torch.float64)
    assert float(bald_t(s, sample_dim=0, class_dim=1)) == pytest.approx(math.log(2), abs=1e-9)
    s = torch.tensor([[0.9, 0.1], [0.1, 0.9]], dtype=torch.float64)
    assert float(bald_t(s, sample_dim=0, class_dim=1)) == pytest.approx(0.368064, abs=1e-6)


@settings(max_examples=40, deadline=None)
@given(arrays(np.float64, (4, 3, 2, 5), elements=st.floats(0.0, 1.0)))
def test_twins_equal_picker_functions(raw):
    samples = raw + 1e-3
    samples /= samples.sum(axis=1, keepdims=True)  # (T=4, K=3, 2, 5)
    mean = samples.mean(axis=0)
    t = torch.from_numpy(samples)
    np.testing.assert_allclose(
        entropy_t(torch.from_numpy(mean), dim=0).numpy(), pixel_entropy(mean, axis=0), atol=1e-12
    )
    np.testing.assert_allclose(
        margin_t(torch.from_numpy(mean), dim=0).numpy(), pixel_margin(mean, axis=0), atol=1e-12
    )
    np.testing.assert_allclose(
        bald_t(t, sample_dim=0, class_dim=1).numpy(),
        pixel_bald(samples, sample_axis=0, class_axis=1),
        atol=1e-12,
    )
    # other axis orders, as propose_tiles uses them: (B, T, K, ...) with class_dim numbered in input
    moved = np.moveaxis(samples, 0, 1)
    np.testing.assert_allclose(
        bald_t(torch.from_numpy(moved), sample_dim=1, class_dim=0).numpy(),
        pixel_bald(moved, sample_axis=1, class_axis=0),
        atol=1e-12,
    )


def test_argmax_first_matches_numpy_including_ties():
    rng = np.random.default_rng(0)
    x = rng.integers(0, 3, (2, 4, 7, 5)).astype(np.float32)  # many ties
    got = _argmax_first(torch.from_numpy(x), dim=1).numpy()
    np.testing.assert_array_equal(got, np.argmax(x, axis=1))  # numpy: first of equal maxima


def test_masked_weights_equal_explicit_dropout_passes():
    rng = np.random.default_rng(1)
    z = torch.from_numpy(rng.normal(size=(6, 4)).astype(np.float32))  # (HW, C)
    w = torch.from_numpy(rng.normal(size=(3, 4)).astype(np.float32))  # (K, C)
    g = torch.Generator().manual_seed(0)
    masks = _dropout_masks(5, 2, 3, 4, p=0.5, generator=g)  # (T, HW, C)
    per = _masked_weights(masks, w)  # (HW, C, T*K)
    fast = torch.einsum("pc,pcq->pq", z, per).reshape(6, 5, 3)
    for t in range(5):  # slow reference: one explicit dropout pass at a time
        for p in range(6):
            ref = (z[p] * masks[t, p]) @ w.t()
            torch.testing.assert_close(fast[p, t], ref, atol=1e-5, rtol=1e-5)
    assert set(np.unique(masks.numpy())) <= {0.0, 2.0}


# -- propose_tiles ----------------------------------------------------------------------------
def test_proposal_shapes_and_scalars(head):
    feats = _features(3)
    props = propose_tiles(head, feats, mc_samples=4, seed=0)
    assert len(props) == 3
    for p in props:
        assert p.mask.shape == (64, 64) and p.mask.dtype == np.uint8
        assert set(np.unique(p.mask)) <= {0, 1, 3}
        assert p.uncertainty.shape == (3, 16, 16) and p.uncertainty.dtype == np.float16
        assert p.mean_entropy == pytest.approx(
            float(p.uncertainty[0].astype(np.float64).mean()), abs=1e-3
        )
        assert p.mean_margin == pytest.approx(
            float(p.uncertainty[1].astype(np.float64).mean()), abs=1e-3
        )
        assert p.mean_bald == pytest.approx(
            float(p.uncertainty[2].astype(np.float64).mean()), abs=1e-3
        )
        assert 0 <= p.mean_bald <= p.mean_entropy <= math.log(3) + 1e-6
        # least confidence 1 - max p lies in [0, 1 - 1/K] (K = 3 classes)
        assert 0 <= p.mean_least_confidence <= 1 - 1 / 3 + 1e-6
        want = np.array([(p.mask == c).mean() for c in (0, 1, 3)])
        np.testing.assert_allclose(p.class_fractions, want, atol=1e-12)
        assert p.embedding.shape == (320,) and p.embedding.dtype == np.float32
        assert p.class_indices == (0, 1, 3)
    np.testing.assert_allclose(
        props[1].embedding, feats[1][3].astype(np.float32).mean(axis=(1, 2)), rtol=1e-5, atol=1e-6
    )
    assert props[0].mean_bald > 0  # dropout passes disagree somewhere


def test_proposal_matches_a_slow_reference(head):
    """Mean of T explicit dropout passes through head.classify, then the picker's numpy."""
    feats = _features(1, seed=5)
    t_passes = 3
    prop = propose_tiles(head, feats, mc_samples=t_passes, seed=7)[0]
    levels = features_to_tensors(feats)
    with torch.no_grad():
        z = head.trunk(levels)[0]  # (C, h, w)
        c, h, w = z.shape
        g = torch.Generator().manual_seed((7 * 1_000_003 + h * 1009 + w) % (2**63))
        masks = _dropout_masks(t_passes, h, w, c, p=head.config.dropout, generator=g)
        samples = []
        for t in range(t_passes):
            m = masks[t].reshape(h, w, c).permute(2, 0, 1)
            samples.append(head.classifier((z * m)[None])[0].softmax(dim=0).numpy())
    samples = np.stack(samples).astype(np.float64)  # (T, K, h, w)
    mean = samples.mean(axis=0)
    np.testing.assert_allclose(prop.uncertainty[0], pixel_entropy(mean, axis=0), atol=2e-3)
    np.testing.assert_allclose(prop.uncertainty[1], pixel_margin(mean, axis=0), atol=2e-3)
    np.testing.assert_allclose(prop.uncertainty[2], pixel_bald(samples), atol=2e-3)
    want_lc = float(pixel_least_confidence(mean, axis=0).mean())
    assert prop.mean_least_confidence == pytest.approx(want_lc, abs=1e-5)
    up = torch.nn.functional.interpolate(
        torch.from_numpy(mean)[None], size=(64, 64), mode="bilinear", align_corners=False
    )[0].numpy()
    want = np.array([0, 1, 3], np.uint8)[np.argmax(up, axis=0)]
    assert (prop.mask == want).mean() > 0.999  # float32 vs float64 ties at most


def test_proposals_do_not_depend_on_batching(head):
    feats = _features(5, seed=2)
    together = propose_tiles(head, feats, mc_samples=4, seed=3, batch_size=5)
    alone = propose_tiles(head, feats[3:4], mc_samples=4, seed=3)
    np.testing.assert_array_equal(together[3].mask, alone[0].mask)
    np.testing.assert_allclose(
        together[3].uncertainty.astype(np.float32),
        alone[0].uncertainty.astype(np.float32),
        atol=1e-3,
    )


def test_dropout_weights_kept_across_calls_give_the_same_proposals(head):
    """Reusing the passes' weights between calls (as propose does block by block) is exact:
    the same proposals as calls that each make their own; another seed gets its own."""
    feats = _features(6, seed=5) + _features(2, size=32, seed=6)
    kept: dict = {}
    for i in range(0, 8, 3):
        fresh = propose_tiles(head, feats[i : i + 3], mc_samples=4, seed=3)
        reused = propose_tiles(head, feats[i : i + 3], mc_samples=4, seed=3, dropout_weights=kept)
        for a, b in zip(fresh, reused, strict=True):
            np.testing.assert_array_equal(a.mask, b.mask)
            np.testing.assert_array_equal(a.uncertainty, b.uncertainty)
            assert (a.mean_entropy, a.mean_bald) == (b.mean_entropy, b.mean_bald)
    assert len(kept) == 2  # two grid sizes, made once each
    other = propose_tiles(head, feats[:1], mc_samples=4, seed=4, dropout_weights=kept)
    np.testing.assert_array_equal(
        other[0].uncertainty, propose_tiles(head, feats[:1], mc_samples=4, seed=4)[0].uncertainty
    )
    assert len(kept) == 3


def test_seed_makes_proposals_repeatable(head):
    feats = _features(2, seed=4)
    a = propose_tiles(head, feats, mc_samples=4, seed=11)
    b = propose_tiles(head, feats, mc_samples=4, seed=11)
    c = propose_tiles(head, feats, mc_samples=4, seed=12)
    np.testing.assert_array_equal(a[0].uncertainty, b[0].uncertainty)
    assert not np.array_equal(a[0].uncertainty, c[0].uncertainty)


def test_one_pass_has_no_bald(head):
    props = propose_tiles(head, _features(1), mc_samples=1)
    assert float(np.abs(props[0].uncertainty[2].astype(np.float32)).max()) == 0.0
    assert props[0].mean_bald == 0.0


@pytest.mark.parametrize(
    ("stride", "grid"), [(2, (32, 32)), (4, (16, 16)), (8, (8, 8)), (64, (1, 1))]
)
def test_uncertainty_stride(head, stride, grid):
    props = propose_tiles(head, _features(1), mc_samples=2, uncertainty_stride=stride)
    assert props[0].uncertainty.shape == (3, *grid)


def test_odd_tile_sizes(head):
    feats = _features(1, size=50)  # stride-4 grid 13 x 13
    props = propose_tiles(head, feats, tile_shapes=[(50, 49)], mc_samples=2)
    assert props[0].mask.shape == (50, 49)
    assert props[0].uncertainty.shape == (3, 13, 13)


def test_progress_reports(head):
    seen = []
    propose_tiles(head, _features(3), batch_size=2, progress=lambda d, t: seen.append((d, t)))
    assert seen == [(2, 3), (3, 3)]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"mc_samples": 0}, "mc_samples: expected at least 1, got 0"),
        ({"uncertainty_stride": 0}, "uncertainty_stride: expected at least 1 pixel, got 0"),
        ({"batch_size": 0}, "batch_size: expected at least 1, got 0"),
        (
            {"tile_shapes": [(64, 64), (64, 64)]},
            r"tile_shapes: expected one \(H, W\) per tile \(1\), got 2",
        ),
        (
            {"tile_shapes": [(128, 64)]},
            r"tile_shapes: tile 0 is \(128, 64\) but its stride-4 features are 16 x 16",
        ),
    ],
)
def test_propose_rejects_bad_options(head, kwargs, match):
    with pytest.raises(ValueError, match=match):
        propose_tiles(head, _features(1), **kwargs)


def test_images_guide_the_mask_upsampling(head):
    feats = _features(2, seed=8)
    rng = np.random.default_rng(9)
    images = [rng.integers(0, 256, (64, 64, 3), dtype=np.uint8) for _ in range(2)]
    plain = propose_tiles(head, feats, mc_samples=2, seed=1)
    guided = propose_tiles(head, feats, mc_samples=2, seed=1, images=images)
    for a, b in zip(plain, guided, strict=True):
        assert b.mask.shape == (64, 64) and b.mask.dtype == np.uint8
        np.testing.assert_array_equal(a.uncertainty, b.uncertainty)  # maps stay on the grid
        assert not np.array_equal(a.mask, b.mask)
        want = np.array([(b.mask == c).mean() for c in (0, 1, 3)])
        np.testing.assert_allclose(b.class_fractions, want, atol=1e-12)


def test_guide_images_must_fit_the_tiles(head):
    feats = _features(1)
    with pytest.raises(
        ValueError, match=r"images: expected one tile per features entry \(1\), got 2"
    ):
        propose_tiles(head, feats, images=[np.zeros((64, 64, 3), np.uint8)] * 2)
    with pytest.raises(ValueError, match=r"images: tile 0 expected shape \(64, 64, 3\)"):
        propose_tiles(head, feats, images=[np.zeros((64, 64), np.uint8)], tile_shapes=[(64, 64)])


# -- refinement -------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def refining_head():
    torch.manual_seed(2)
    h = ProposalHead(HeadConfig(class_indices=(0, 1, 3), width=8, dropout=0.3, refine_channels=4))
    with torch.no_grad():  # a trained-looking refiner: non-zero correction
        h.classifier.weight.mul_(5.0)
        h.refiner.out.weight.normal_(0.0, 2.0)
    return h.eval()


def test_refined_mask_is_the_argmax_of_the_refined_logits(refining_head):
    feats = _features(2, size=50, seed=6)
    rng = np.random.default_rng(7)
    images = [rng.integers(0, 256, (50, 49, 3), dtype=np.uint8) for _ in range(2)]
    props = propose_tiles(
        refining_head, feats, tile_shapes=[(50, 49)] * 2, mc_samples=4, seed=1, images=images
    )
    with torch.no_grad():
        logits = refining_head(features_to_tensors(feats), pixels=pixel_input(np.stack(images)))
    want = np.array([0, 1, 3], np.uint8)[np.argmax(logits.numpy(), axis=1)]
    for p, w in zip(props, want, strict=True):
        assert p.refined and p.mask.shape == (50, 49)
        np.testing.assert_array_equal(p.mask, w)
        np.testing.assert_allclose(
            p.class_fractions, [(p.mask == c).mean() for c in (0, 1, 3)], atol=1e-12
        )


def test_refinement_runs_once_and_leaves_uncertainty_alone(refining_head):
    feats = _features(2, seed=8)
    rng = np.random.default_rng(9)
    images = [rng.integers(0, 256, (64, 64, 3), dtype=np.uint8) for _ in range(2)]
    one = propose_tiles(refining_head, feats, mc_samples=1, images=images)
    many = propose_tiles(refining_head, feats, mc_samples=6, seed=3, images=images)
    plain = propose_tiles(refining_head, feats, mc_samples=6, seed=3)
    for a, b, c in zip(one, many, plain, strict=True):
        np.testing.assert_array_equal(a.mask, b.mask)  # not per dropout pass
        np.testing.assert_array_equal(b.uncertainty, c.uncertainty)  # maps from dropout only
        assert b.refined and not c.refined
        assert not np.array_equal(b.mask, c.mask)


def test_refining_head_without_pixels_gives_the_bilinear_mask(refining_head):
    feats = _features(1, seed=10)
    prop = propose_tiles(refining_head, feats, mc_samples=1)[0]
    with torch.no_grad():
        z = refining_head.trunk(features_to_tensors(feats))
        up = torch.nn.functional.interpolate(
            refining_head.classifier(z).softmax(dim=1), size=(64, 64), mode="bilinear"
        )
    want = np.array([0, 1, 3], np.uint8)[np.argmax(up[0].numpy(), axis=0)]
    assert not prop.refined
    assert (prop.mask == want).mean() > 0.999  # float rounding ties at most
