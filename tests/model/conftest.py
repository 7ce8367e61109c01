"""Fixtures of the model-room tests: one encoder load per session, a tiny stand-in encoder."""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.model.encoder import FEATURE_CHANNELS, FEATURE_STRIDES, load_encoder


@pytest.fixture(scope="session")
def encoder():
    """The real EfficientNet-Lite0 with the packaged weights (folded, channels-last)."""
    return load_encoder()


class PoolingEncoder:
    """A cheap deterministic stand-in with the encoder's output shapes.

    Level i is the input average-pooled by its stride (ceil mode), channels repeated to
    C_i and scaled by a per-channel constant. Not a model: it only exercises plumbing.
    """

    version = "pool-test-1"

    def __init__(self) -> None:
        self.calls = 0

    def __call__(self, x: torch.Tensor) -> tuple[torch.Tensor, ...]:
        self.calls += 1
        out = []
        for c, s in zip(FEATURE_CHANNELS, FEATURE_STRIDES, strict=True):
            p = F.avg_pool2d(x / 255.0, s, ceil_mode=True)
            reps = -(-c // 3)
            scale = torch.linspace(0.5, 1.5, c).view(1, c, 1, 1)
            out.append(p.repeat(1, reps, 1, 1)[:, :c] * scale)
        return tuple(out)


@pytest.fixture()
def pooling_encoder() -> PoolingEncoder:
    return PoolingEncoder()


def disk_tiles(
    n: int, *, size: int = 64, seed: int = 0
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """``n`` invented test tiles: green disks (class 1) on brown soil (class 0), with noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size]
    images, masks = [], []
    for _ in range(n):
        im = np.empty((size, size, 3), np.float64)
        im[:] = (120, 90, 60)
        m = np.zeros((size, size), np.uint8)
        for _ in range(3):
            cy, cx = rng.integers(8, size - 8, 2)
            r = rng.integers(size // 10, size // 5)
            d = (yy - cy) ** 2 + (xx - cx) ** 2 < r**2
            im[d] = (50, 160, 40)
            m[d] = 1
        im += rng.normal(0, 6, im.shape)
        images.append(np.clip(im, 0, 255).astype(np.uint8))
        masks.append(m)
    return images, masks


def random_features(n: int, size: int = 64, seed: int = 0) -> list[tuple[np.ndarray, ...]]:
    """``n`` tiles of seeded standard-normal float16 features at the encoder's four strides."""
    rng = np.random.default_rng(seed)
    return [
        tuple(
            rng.standard_normal((c, -(-size // s), -(-size // s))).astype(np.float16)
            for c, s in zip((24, 40, 112, 320), (4, 8, 16, 32), strict=True)
        )
        for _ in range(n)
    ]
