"""The head's inference path must give what ProposalHead.trunk/refine give."""

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.model.fasthead import (
    FastHead,
    _depth_to_space,
    levels_from_features,
    pixel_input_nhwc,
)
from labeler.model.head import HeadConfig, ProposalHead, features_to_tensors
from labeler.model.predict import propose_tiles
from labeler.model.refine import pixel_input
from tests.model.conftest import random_features as _features


def _tiles(n, size=64, seed=1):
    rng = np.random.default_rng(seed)
    tiles = rng.integers(0, 256, (n, size, size, 3), dtype=np.uint8)
    tiles[0, :3, :3] = 0  # black pixels: chromatic coordinates 0
    return tiles


@pytest.fixture(scope="module")
def head():
    torch.manual_seed(0)
    h = ProposalHead(HeadConfig(class_indices=(0, 1, 2, 3), width=8, refine_channels=6))
    with torch.no_grad():  # the correction's last layer starts at zero: give it weights
        h.refiner.out.weight.normal_(0.0, 0.5)
        h.refiner.out.bias.normal_(0.0, 0.5)
    return h.eval()


def test_pixel_input_equals_the_refinements_own():
    tiles = _tiles(3)
    want = pixel_input(tiles)
    got = pixel_input_nhwc(tiles)
    assert got.shape == want.shape == (3, 4, 64, 64)
    # float32 rounding of the same sums in another order; common practice, no source
    np.testing.assert_allclose(got.numpy(), want.numpy(), atol=2e-6)
    assert got.is_contiguous(memory_format=torch.channels_last)


def test_pixel_input_refuses_other_arrays():
    with pytest.raises(
        ValueError, match=r"images: expected uint8 RGB tiles of shape \(N, H, W, 3\)"
    ):
        pixel_input_nhwc(np.zeros((2, 8, 8, 3), np.float32))


def test_depth_to_space_equals_pixel_shuffle():
    # torch's own F.pixel_shuffle is the reference
    x = torch.randn(2, 12, 5, 7).contiguous(memory_format=torch.channels_last)
    np.testing.assert_array_equal(_depth_to_space(x).numpy(), F.pixel_shuffle(x, 2).numpy())


def test_levels_equal_features_to_tensors():
    feats = _features(3)
    for a, b in zip(levels_from_features(feats), features_to_tensors(feats), strict=True):
        np.testing.assert_array_equal(a.numpy(), b.numpy())
    low = levels_from_features(feats, dtype=torch.bfloat16)
    assert all(t.dtype == torch.bfloat16 for t in low)


def test_float32_path_equals_the_head(head):
    feats, tiles = _features(3), _tiles(3)
    fast = FastHead(head, precision="float32")
    with torch.inference_mode():
        z_low, z32 = fast.trunk(levels_from_features(feats))
        z = head.trunk(features_to_tensors(feats))
        want = head.refine(z, pixel_input(tiles))
        got = fast.refine(z_low, z32, tiles)
    np.testing.assert_allclose(z32.numpy(), z.numpy(), rtol=0, atol=0)
    # the fusing convolution summed in two halves: float32 rounding; no source
    np.testing.assert_allclose(got.numpy(), want.numpy(), atol=1e-4)


def test_bfloat16_path_stays_close_to_float32(head):
    feats, tiles = _features(4), _tiles(4)
    with torch.inference_mode():
        want = head.refine(head.trunk(features_to_tensors(feats)), pixel_input(tiles))
        fast = FastHead(head, precision="bfloat16")
        got = fast.refine(*fast.trunk(levels_from_features(feats, dtype=fast.dtype)), tiles)
    assert got.dtype == torch.float32
    err = (got - want).abs().max().item()
    scale = want.abs().max().item()
    # bfloat16 keeps 8 significant bits (relative step 2**-8 = 0.4 %); through a few
    # layers a few steps: 5 % of the largest logit is a loose bound; no source
    assert 0 < err < 0.05 * scale
    assert head.refiner.fuse.weight.dtype == torch.float32  # the trained head is untouched


def test_bfloat16_proposals_keep_float32_uncertainty_arithmetic(head):
    feats, tiles = _features(4), list(_tiles(4))
    a = propose_tiles(head, feats, images=tiles, mc_samples=4, seed=2)
    b = propose_tiles(head, feats, images=tiles, mc_samples=4, seed=2, precision="bfloat16")
    for x, y in zip(a, b, strict=True):
        assert y.uncertainty.dtype == np.float16 and y.uncertainty.shape == x.uncertainty.shape
        assert np.mean(x.mask == y.mask) > 0.9  # near-ties may flip; no source
        np.testing.assert_array_equal(x.embedding, y.embedding)  # from the stored features


def test_fast_head_refuses_bad_options(head):
    with pytest.raises(ValueError, match="precision: expected 'float32' or 'bfloat16', got 'fp8'"):
        FastHead(head, precision="fp8")
    with pytest.raises(ValueError, match="precision: expected 'float32' or 'bfloat16'"):
        propose_tiles(head, _features(1), precision="half")
    plain = FastHead(ProposalHead(HeadConfig(width=8)).eval())
    with torch.inference_mode():
        z_low, z32 = plain.trunk(levels_from_features(_features(1)))
    with pytest.raises(ValueError, match="head: this head has no refinement"):
        plain.refine(z_low, z32, _tiles(1))
