"""Joint bilateral upsampling (Kopf et al. 2007) against a pixel-by-pixel reference."""

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.model.upsample import guided_upsample


def _reference(probs, image, *, stride, radius, sigma_spatial, sigma_colour):
    """Slow loop: the formula of Kopf et al. (2007) written out for every pixel and cell."""
    k, h, w = probs.shape
    _, height, width = image.shape
    cell_colour = np.zeros((3, h, w))
    for i in range(h):
        for j in range(w):
            block = image[:, i * stride : (i + 1) * stride, j * stride : (j + 1) * stride]
            cell_colour[:, i, j] = block.reshape(3, -1).mean(axis=1)
    out = np.zeros((k, height, width))
    for y in range(height):
        for x in range(width):
            ci, cj = y // stride, x // stride
            num, den = np.zeros(k), 0.0
            for ni in range(ci - radius, ci + radius + 1):
                for nj in range(cj - radius, cj + radius + 1):
                    if not (0 <= ni < h and 0 <= nj < w):
                        continue
                    cy, cx = stride * (ni + 0.5), stride * (nj + 0.5)
                    d2 = (y + 0.5 - cy) ** 2 + (x + 0.5 - cx) ** 2
                    c2 = float(((image[:, y, x] - cell_colour[:, ni, nj]) ** 2).sum())
                    wgt = math.exp(-d2 / (2 * sigma_spatial**2)) * (
                        math.exp(-c2 / (2 * sigma_colour**2)) + 1e-6
                    )
                    num += wgt * probs[:, ni, nj]
                    den += wgt
            out[:, y, x] = num / den
    return out


@pytest.mark.parametrize(("height", "width", "radius"), [(12, 8, 1), (11, 7, 1), (9, 12, 2)])
def test_matches_the_pixel_loop(height, width, radius):
    rng = np.random.default_rng(0)
    h, w = -(-height // 4), -(-width // 4)
    probs = rng.uniform(0.01, 1, (2, h, w))
    probs /= probs.sum(axis=0)
    image = rng.uniform(0, 255, (3, height, width))
    got = guided_upsample(
        torch.from_numpy(probs)[None],
        torch.from_numpy(image)[None],
        radius=radius,
        sigma_spatial=4.0,
        sigma_colour=30.0,
    )[0].numpy()
    want = _reference(probs, image, stride=4, radius=radius, sigma_spatial=4.0, sigma_colour=30.0)
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12)


def test_result_is_a_probability_field():
    rng = np.random.default_rng(1)
    p = torch.from_numpy(rng.dirichlet(np.ones(4), size=(2, 8, 8))).permute(0, 3, 1, 2).float()
    im = torch.from_numpy(rng.uniform(0, 255, (2, 3, 32, 32))).float()
    out = guided_upsample(p, im)
    assert tuple(out.shape) == (2, 4, 32, 32) and bool((out >= 0).all())
    np.testing.assert_allclose(out.sum(dim=1).numpy(), 1.0, atol=1e-5)
    # a pixel unlike every nearby cell (far outside 0..255) falls back to spatial weights
    im[0, :, 5, 5] = 1e4
    assert torch.isfinite(guided_upsample(p, im)).all()


def test_colour_edge_is_recovered_where_bilinear_blurs_it():
    # a green blade 3 px wide (class 1, columns 9..11) on brown soil (class 0), 16 x 16
    # tile: it fills 3/4 of the third cell column (pixels 8..11) and nothing else
    truth = np.zeros((16, 16), np.int64)
    truth[:, 9:12] = 1
    image = np.empty((1, 3, 16, 16))
    image[0] = np.array([120, 90, 60])[:, None, None]
    image[0, :, :, 9:12] = np.array([50, 160, 40])[:, None, None]
    onehot = F.one_hot(torch.from_numpy(truth), 2).permute(2, 0, 1)[None].double()
    coarse = F.avg_pool2d(onehot, 4)  # exact class shares per cell
    bilinear = F.interpolate(coarse, size=(16, 16), mode="bilinear", align_corners=False)
    guided = guided_upsample(coarse, torch.from_numpy(image), sigma_colour=10.0)
    assert int((bilinear.argmax(dim=1)[0].numpy() != truth).sum()) > 0
    np.testing.assert_array_equal(guided.argmax(dim=1)[0].numpy(), truth)


@pytest.mark.parametrize(
    ("probs", "image", "kwargs", "match"),
    [
        (
            torch.ones(1, 2, 4, 4),
            torch.ones(1, 3, 20, 16),
            {},
            r"image: expected 1 tiles whose size",
        ),
        (torch.ones(1, 2, 4, 4), torch.ones(2, 3, 16, 16), {}, r"image: expected 1 tiles"),
        (
            torch.ones(2, 4, 4),
            torch.ones(1, 3, 16, 16),
            {},
            r"probs, image: expected \(B, K, h, w\)",
        ),
        (torch.ones(1, 2, 4, 4), torch.ones(1, 3, 16, 16), {"sigma_colour": 0.0}, "sigma_colour"),
    ],
)
def test_bad_inputs_are_refused(probs, image, kwargs, match):
    with pytest.raises(ValueError, match=match):
        guided_upsample(probs, image, **kwargs)
