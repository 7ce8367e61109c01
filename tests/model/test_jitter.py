import colorsys

import numpy as np
import pytest
import torch
from torchvision.transforms.v2 import functional as TF

from labeler.model.jitter import GREY, YIQ, ColourJitter, jitter_matrices

ONE = torch.ones(1, dtype=torch.float64)


def _apply(image, *, b=1.0, c=1.0, s=1.0, h=0.0):
    """The matrix form on a float image (3, H, W) in 0..255."""
    flat = image.reshape(3, -1).to(torch.float64)
    mean = (torch.tensor(GREY, dtype=torch.float64) @ flat).mean()
    m, o = jitter_matrices(ONE * b, ONE * c, ONE * s, ONE * h, mean[None])
    return (m[0] @ flat + o[0][:, None]).reshape(image.shape)


def _slow(image, b, c, s, h):
    """Slow loop reference: the four steps one pixel at a time, in Python floats."""
    grey = GREY
    t = np.array(YIQ)
    a = 2 * np.pi * h
    rot = np.array([[1, 0, 0], [0, np.cos(a), np.sin(a)], [0, -np.sin(a), np.cos(a)]])
    turn = np.linalg.inv(t) @ rot @ t
    pixels = [
        [float(v) * b for v in image[:, i, j]]
        for i in range(image.shape[1])
        for j in range(image.shape[2])
    ]
    mean = sum(sum(g * v for g, v in zip(grey, p, strict=True)) for p in pixels) / len(pixels)
    out = []
    for p in pixels:
        p = [c * v + (1 - c) * mean for v in p]
        g = sum(w * v for w, v in zip(grey, p, strict=True))
        p = [s * v + (1 - s) * g for v in p]
        out.append([sum(turn[r, k] * p[k] for k in range(3)) for r in range(3)])
    return np.array(out).T.reshape(image.shape)


@pytest.fixture
def image():
    g = torch.Generator().manual_seed(0)
    return torch.rand(3, 5, 6, generator=g, dtype=torch.float64) * 150 + 50


def test_matrix_form_equals_the_slow_steps(image):
    got = _apply(image, b=1.1, c=0.85, s=1.2, h=0.025)
    want = _slow(image.numpy(), 1.1, 0.85, 1.2, 0.025)
    np.testing.assert_allclose(got.numpy(), want, rtol=0, atol=1e-9)


# oracle: torchvision.transforms.v2.functional on float images in 0..1 (its grey weights
# are 0.2989, 0.587, 0.114, hence the tolerance of a few thousandths of a level)
@pytest.mark.parametrize(
    ("kwargs", "reference"),
    [
        ({"b": 1.15}, lambda u: TF.adjust_brightness(u, 1.15)),
        ({"c": 0.85}, lambda u: TF.adjust_contrast(u, 0.85)),
        ({"s": 1.15}, lambda u: TF.adjust_saturation(u, 1.15)),
    ],
)
def test_brightness_contrast_saturation_match_torchvision(image, kwargs, reference):
    want = reference(image.to(torch.float32) / 255) * 255
    np.testing.assert_allclose(_apply(image, **kwargs).numpy(), want.numpy(), rtol=0, atol=0.01)


@pytest.mark.parametrize("rgb", [(180, 100, 60), (60, 160, 80), (90, 90, 170), (120, 140, 100)])
def test_hue_turn_raises_the_hsv_hue_by_about_h_and_keeps_luma(rgb):
    x = torch.tensor(rgb, dtype=torch.float64)[:, None, None]
    y = _apply(x, h=0.03)[:, 0, 0].tolist()
    before = colorsys.rgb_to_hsv(*[v / 255 for v in rgb])[0]  # oracle: Python's colorsys
    after = colorsys.rgb_to_hsv(*[v / 255 for v in y])[0]
    # the YIQ turn approximates the HSV shift (common practice, no source): within half
    assert 0.015 <= after - before <= 0.045
    luma = np.dot(GREY, y), np.dot(GREY, rgb)
    assert luma[0] == pytest.approx(luma[1], abs=1e-9)


def test_zero_and_whole_turns_are_the_identity(image):
    np.testing.assert_allclose(_apply(image).numpy(), image.numpy(), atol=1e-9)
    np.testing.assert_allclose(_apply(image, h=1.0).numpy(), image.numpy(), atol=1e-9)


def test_grey_stays_grey_under_saturation_and_hue():
    x = torch.full((3, 2, 2), 100.0, dtype=torch.float64)
    np.testing.assert_allclose(_apply(x, s=1.2, h=0.03).numpy(), x.numpy(), atol=1e-9)


def test_jitter_keeps_shape_dtype_and_range_and_draws_per_tile():
    torch.manual_seed(0)
    tiles = torch.randint(0, 256, (4, 3, 9, 7), dtype=torch.uint8)
    out = ColourJitter(brightness=0.5, contrast=0.5, saturation=0.5, hue=0.1)(tiles)
    assert out.shape == tiles.shape and out.dtype == torch.uint8
    ratios = [out[i].double().mean() / tiles[i].double().mean() for i in range(4)]
    assert len({round(float(r), 6) for r in ratios}) == 4  # each tile its own factors


def test_jitter_of_one_tile_equals_the_matrix_form_with_the_same_draws():
    tile = torch.randint(0, 256, (3, 4, 5), generator=torch.Generator().manual_seed(1))
    tile = tile.to(torch.float64)
    torch.manual_seed(7)
    got = ColourJitter()(tile)
    torch.manual_seed(7)
    draws = [
        torch.empty(1, dtype=torch.float64).uniform_(lo, hi)
        for lo, hi in ((0.8, 1.2), (0.8, 1.2), (0.8, 1.2), (-0.03, 0.03))
    ]
    want = _apply(tile, b=float(draws[0]), c=float(draws[1]), s=float(draws[2]), h=float(draws[3]))
    np.testing.assert_allclose(got.numpy(), want.clamp(0, 255).numpy(), atol=1e-3)


def test_no_change_ranges_leave_uint8_tiles_unchanged():
    tile = torch.randint(
        0, 256, (3, 6, 6), dtype=torch.uint8, generator=torch.Generator().manual_seed(2)
    )
    out = ColourJitter(brightness=0.0, contrast=0.0, saturation=0.0, hue=0.0)(tile)
    assert torch.equal(out, tile)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"brightness": 1.0}, r"brightness: expected a relative change in \[0, 1\), got 1.0"),
        ({"saturation": -0.1}, r"saturation: expected a relative change"),
        ({"hue": 0.6}, r"hue: expected a fraction of a turn in \[0, 0.5\], got 0.6"),
    ],
)
def test_jitter_rejects_bad_ranges(kwargs, match):
    with pytest.raises(ValueError, match=match):
        ColourJitter(**kwargs)


def test_jitter_rejects_non_rgb_tiles():
    with pytest.raises(
        ValueError, match=r"pixels: expected RGB tiles \(3, H, W\).*got shape \(4, 5, 5\)"
    ):
        ColourJitter()(torch.zeros(4, 5, 5))
