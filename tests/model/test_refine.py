"""Full-resolution refinement: its input, its layers against slow loops, and what it learns."""

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.masks.vegetation import exg_minus_exr
from labeler.model.refine import (
    PIXEL_CHANNELS,
    RefineConfig,
    Refiner,
    exg_minus_exr_t,
    pixel_input,
)


# -- input ------------------------------------------------------------------------------------
def test_vegetation_channel_on_worked_pixels():
    # worked by hand from Meyer & Neto 2008 (Comput. Electron. Agric. 63; ExG - ExR with
    # the ExR coefficient 1.4; ExG of Woebbecke et al. 1995): ExGR of
    # (0,255,0) = 3, (100,100,100) = -0.1333, (60,120,40) = 0.8; black: 0 (guarded)
    rgb = torch.tensor(
        [[0, 255, 0], [100, 100, 100], [60, 120, 40], [0, 0, 0]], dtype=torch.float32
    )
    got = exg_minus_exr_t(rgb.t().reshape(1, 3, 4, 1))[0, 0, :, 0].numpy()
    np.testing.assert_allclose(got, [3.0, -2 / 15, 0.8, 0.0], atol=1e-6)


def test_vegetation_channel_is_the_twin_of_the_numpy_index():
    rng = np.random.default_rng(0)
    images = rng.integers(0, 256, (2, 9, 7, 3), dtype=np.uint8)
    images[0, 0, 0] = 0  # a black pixel
    x = pixel_input(images, exr_coefficient=1.3)
    for n in range(2):
        want = exg_minus_exr(images[n], exr_coefficient=1.3)  # labeler.masks.vegetation
        np.testing.assert_allclose(x[n, 3].numpy(), want, atol=1e-6)


def test_pixel_input_normalises_like_the_encoder():
    rng = np.random.default_rng(1)
    images = rng.integers(0, 256, (3, 5, 6, 3), dtype=np.uint8)
    x = pixel_input(images)
    assert tuple(x.shape) == (3, PIXEL_CHANNELS, 5, 6) and x.dtype == torch.float32
    assert x.is_contiguous(memory_format=torch.channels_last)
    # the encoder's input normalisation (x - 127) / 128 (labeler/model/encoder.py, that of
    # the EfficientNet-Lite weights)
    want = (images.astype(np.float64) - 127.0) / 128.0
    np.testing.assert_allclose(x[:, :3].permute(0, 2, 3, 1).numpy(), want, atol=1e-7)
    # a (N, 3, H, W) tensor gives the same
    t = torch.from_numpy(images).permute(0, 3, 1, 2)
    torch.testing.assert_close(pixel_input(t), x, rtol=0, atol=0)


@pytest.mark.parametrize(
    ("images", "match"),
    [
        (np.zeros((5, 6, 3), np.uint8), r"images: expected an array \(N, H, W, 3\)"),
        (np.zeros((1, 5, 6, 4), np.uint8), r"images: expected an array \(N, H, W, 3\)"),
        (torch.zeros(1, 4, 5, 6), r"images: expected a batch \(N, 3, H, W\)"),
    ],
)
def test_pixel_input_refuses_other_shapes(images, match):
    with pytest.raises(ValueError, match=match):
        pixel_input(images)


def test_config_checks_and_round_trips():
    with pytest.raises(ValueError, match="channels: expected at least 1 channel, got 0"):
        RefineConfig(channels=0)
    cfg = RefineConfig(channels=8, exr_coefficient=1.3)
    assert RefineConfig.from_dict(cfg.as_dict()) == cfg


# -- layers against a slow reference -------------------------------------------------------------
def _conv(x, w, b, *, stride=1, pad=0):
    """Cross-correlation written out per output pixel (zero padding), float64."""
    c_in, h, wd = x.shape
    c_out, _, k, _ = w.shape
    xp = np.zeros((c_in, h + 2 * pad, wd + 2 * pad))
    xp[:, pad : pad + h, pad : pad + wd] = x
    oh = (h + 2 * pad - k) // stride + 1
    ow = (wd + 2 * pad - k) // stride + 1
    out = np.zeros((c_out, oh, ow))
    for o in range(c_out):
        for i in range(oh):
            for j in range(ow):
                patch = xp[:, i * stride : i * stride + k, j * stride : j * stride + k]
                out[o, i, j] = float((patch * w[o]).sum()) + b[o]
    return out


def _bilinear(x, size):
    """Bilinear resize with half-pixel centres (align_corners=False), per pixel."""
    c, h, w = x.shape
    oh, ow = size
    out = np.zeros((c, oh, ow))
    for i in range(oh):
        sy = max((i + 0.5) * h / oh - 0.5, 0.0)
        y0 = min(int(np.floor(sy)), h - 1)
        y1 = min(y0 + 1, h - 1)
        fy = sy - y0
        for j in range(ow):
            sx = max((j + 0.5) * w / ow - 0.5, 0.0)
            x0 = min(int(np.floor(sx)), w - 1)
            x1 = min(x0 + 1, w - 1)
            fx = sx - x0
            out[:, i, j] = (1 - fy) * ((1 - fx) * x[:, y0, x0] + fx * x[:, y0, x1]) + fy * (
                (1 - fx) * x[:, y1, x0] + fx * x[:, y1, x1]
            )
    return out


def _reference(ref, z, x):
    """Refiner.forward written with the loops above: layers as the module docstring says."""
    p = {k: v.detach().double().numpy() for k, v in ref.state_dict().items()}
    height, width = x.shape[-2:]
    fine = np.maximum(_conv(x, p["fine.weight"], p["fine.bias"], stride=2, pad=1), 0)
    coarse = np.maximum(_conv(z, p["coarse.weight"], p["coarse.bias"]), 0)
    coarse = _bilinear(coarse, fine.shape[-2:])
    y = np.maximum(
        _conv(np.concatenate([fine, coarse]), p["fuse.weight"], p["fuse.bias"], pad=1), 0
    )
    o = _conv(y, p["out.weight"], p["out.bias"])  # (4K, h2, w2)
    k = o.shape[0] // 4
    full = np.zeros((k, 2 * o.shape[1], 2 * o.shape[2]))
    for c in range(k):  # depth-to-space: channel c * 4 + 2 a + b goes to pixel (2 i + a, 2 j + b)
        for a in range(2):
            for b in range(2):
                full[c, a::2, b::2] = o[c * 4 + 2 * a + b]
    return full[:, :height, :width]


@pytest.mark.parametrize(("height", "width"), [(8, 8), (11, 6)])
def test_refiner_matches_the_slow_reference(height, width):
    torch.manual_seed(0)
    ref = Refiner(5, 3, RefineConfig(channels=4)).double().eval()
    with torch.no_grad():  # the output layer starts at zero: give it values to check
        ref.out.weight.normal_()
        ref.out.bias.normal_()
    rng = np.random.default_rng(2)
    z = rng.normal(size=(5, -(-height // 4), -(-width // 4)))
    x = rng.normal(size=(PIXEL_CHANNELS, height, width))
    with torch.no_grad():
        got = ref(torch.from_numpy(z)[None], torch.from_numpy(x)[None])[0].numpy()
    assert got.shape == (3, height, width)
    np.testing.assert_allclose(got, _reference(ref, z, x), rtol=1e-9, atol=1e-9)


def test_bilinear_reference_agrees_with_torch():
    # the loop above is the half-pixel rule torch documents for align_corners=False
    x = np.random.default_rng(3).normal(size=(2, 3, 4))
    want = F.interpolate(torch.from_numpy(x)[None], size=(7, 9), mode="bilinear")[0].numpy()
    np.testing.assert_allclose(_bilinear(x, (7, 9)), want, atol=1e-12)


def test_untrained_refiner_adds_nothing():
    ref = Refiner(8, 4)
    z = torch.randn(2, 8, 3, 4)
    x = torch.randn(2, PIXEL_CHANNELS, 10, 13)
    with torch.no_grad():
        out = ref(z, x)
    assert tuple(out.shape) == (2, 4, 10, 13)
    assert float(out.abs().max()) == 0.0
