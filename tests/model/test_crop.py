"""Training windows: aligned, random, and their logits equal to the whole tile's."""

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.model.crop import CropWindow, crop_logits, draw_crop
from labeler.model.head import HeadConfig, ProposalHead
from labeler.model.refine import pixel_input


def test_windows_are_aligned_inside_and_cover_every_start():
    rng = np.random.default_rng(0)
    seen = set()
    for _ in range(400):
        w = draw_crop((96, 80), 64, rng)
        assert w is not None and (w.height, w.width) == (64, 64)
        assert w.row % 4 == 0 and w.col % 4 == 0
        assert 0 <= w.row <= 32 and 0 <= w.col <= 16
        seen.add((w.row, w.col))
    # every start on multiples of 4: 9 rows x 5 columns
    assert seen == {(r, c) for r in range(0, 33, 4) for c in range(0, 17, 4)}


@pytest.mark.parametrize(
    ("shape", "size"),
    [((64, 64), 0), ((64, 64), 64), ((64, 200), 64), ((66, 128), 32), ((64, 130), 32)],
)
def test_whole_tiles_when_no_window_fits(shape, size):
    # size 0, a tile not larger than the window, or sides that are not multiples of 4
    assert draw_crop(shape, size, np.random.default_rng(0)) is None


@pytest.mark.parametrize("size", [-4, 30])
def test_bad_window_sizes_are_refused(size):
    with pytest.raises(
        ValueError, match=rf"size: expected 0 \(no crop\) or a positive multiple of 4, got {size}"
    ):
        draw_crop((64, 64), size, np.random.default_rng(0))


@pytest.mark.parametrize(
    "window",
    [
        CropWindow(0, 0, 32, 32),
        CropWindow(16, 24, 32, 40),
        CropWindow(32, 32, 32, 32),
        CropWindow(4, 60, 56, 4),
    ],
)
def test_window_logits_equal_the_whole_tiles_logits(window):
    # the claim of labeler.model.crop: with a 2-cell margin, bilinear upsampling and the
    # refinement's two 3 x 3 convolutions give inside the window what the whole tile gives
    torch.manual_seed(0)
    head = ProposalHead(HeadConfig(class_indices=(0, 1, 2), width=8, refine_channels=6)).eval()
    for p in head.refiner.out.parameters():  # a refinement that is not zero
        torch.nn.init.normal_(p, std=0.5)
    rng = np.random.default_rng(1)
    images = rng.integers(0, 256, (2, 64, 64, 3), dtype=np.uint8)
    z = torch.randn(2, 8, 16, 16).contiguous(memory_format=torch.channels_last)
    pixels = torch.from_numpy(images).permute(0, 3, 1, 2)
    with torch.no_grad():
        coarse, refined = crop_logits(head, z, pixels, window)
        full_coarse = F.interpolate(
            head.classify(z), size=(64, 64), mode="bilinear", align_corners=False
        )
        full_refined = head.refine(z, pixel_input(images))
    rows = slice(window.row, window.row + window.height)
    cols = slice(window.col, window.col + window.width)
    assert coarse.shape == refined.shape == (2, 3, window.height, window.width)
    torch.testing.assert_close(coarse, full_coarse[:, :, rows, cols], rtol=0, atol=1e-5)
    torch.testing.assert_close(refined, full_refined[:, :, rows, cols], rtol=0, atol=1e-5)


def test_without_pixels_only_the_coarse_logits():
    head = ProposalHead(HeadConfig(class_indices=(0, 1), width=8)).eval()
    z = torch.randn(1, 8, 16, 16)
    coarse, refined = crop_logits(head, z, None, CropWindow(8, 8, 16, 16))
    assert coarse.shape == (1, 2, 16, 16) and refined is None
