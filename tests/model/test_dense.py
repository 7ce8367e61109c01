"""The dense VICReg loss against a slow loop and pytorch-metric-learning's VICRegLoss."""

from __future__ import annotations

import math

import pytest
import torch

from labeler.model.dense import (
    VICREG_WEIGHTS,
    dense_vicreg_loss,
    gather_matched,
    vicreg_loss,
    vicreg_terms,
)


def _vicreg_loop(za: list[list[float]], zb: list[list[float]], eps: float = 1e-4) -> float:
    """Slow reference: the three VICReg terms written out element by element
    (definitions of Bardes, Ponce & LeCun, ICLR 2022; variance averaged over the two
    branches as in their reference code)."""
    m, d = len(za), len(za[0])
    inv = sum((za[i][j] - zb[i][j]) ** 2 for i in range(m) for j in range(d)) / (m * d)

    def var_term(z):
        total = 0.0
        for j in range(d):
            mean = sum(z[i][j] for i in range(m)) / m
            var = sum((z[i][j] - mean) ** 2 for i in range(m)) / (m - 1)
            total += max(0.0, 1.0 - math.sqrt(var + eps))
        return total / d

    def cov_term(z):
        means = [sum(z[i][j] for i in range(m)) / m for j in range(d)]
        total = 0.0
        for j in range(d):
            for k in range(d):
                if j != k:
                    c = sum((z[i][j] - means[j]) * (z[i][k] - means[k]) for i in range(m)) / (m - 1)
                    total += c * c
        return total / d

    lam, mu, nu = VICREG_WEIGHTS
    return lam * inv + mu * (var_term(za) + var_term(zb)) / 2 + nu * (cov_term(za) + cov_term(zb))


def _dense_loop(fa: torch.Tensor, fb: torch.Tensor, pairs: list[tuple[int, int, int]]) -> float:
    wa, wb = fa.shape[3], fb.shape[3]
    za = [[float(fa[n, c, ca // wa, ca % wa]) for c in range(fa.shape[1])] for n, ca, _ in pairs]
    zb = [[float(fb[n, c, cb // wb, cb % wb]) for c in range(fb.shape[1])] for n, _, cb in pairs]
    return _vicreg_loop(za, zb)


@pytest.mark.parametrize("seed", range(3))
def test_dense_loss_against_a_loop(seed):
    g = torch.Generator().manual_seed(seed)
    fa = torch.randn(3, 5, 4, 4, generator=g, dtype=torch.float64)
    fb = 0.3 * torch.randn(3, 5, 2, 2, generator=g, dtype=torch.float64)  # another grid
    n = torch.randint(0, 3, (20,), generator=g)
    ca = torch.randint(0, 16, (20,), generator=g)
    cb = torch.randint(0, 4, (20,), generator=g)
    pairs = torch.stack([n, ca, cb], dim=1)
    got = dense_vicreg_loss(fa, fb, pairs)
    want = _dense_loop(fa, fb, [tuple(p) for p in pairs.tolist()])
    assert got.item() == pytest.approx(want, rel=1e-10)


def test_gather_matched_picks_the_named_cells():
    fa = torch.arange(2 * 3 * 2 * 2, dtype=torch.float64).reshape(2, 3, 2, 2)
    fb = -torch.arange(2 * 3 * 1 * 3, dtype=torch.float64).reshape(2, 3, 1, 3)
    pairs = torch.tensor([[1, 3, 2], [0, 0, 0]])
    za, zb = gather_matched(fa, fb, pairs)
    torch.testing.assert_close(za, torch.stack([fa[1, :, 1, 1], fa[0, :, 0, 0]]))
    torch.testing.assert_close(zb, torch.stack([fb[1, :, 0, 2], fb[0, :, 0, 0]]))


@pytest.mark.parametrize(("m", "d", "seed"), [(8, 5, 0), (64, 16, 1), (300, 32, 2)])
def test_vicreg_against_pytorch_metric_learning(m, d, seed):
    # Oracle: pytorch-metric-learning's VICRegLoss (defaults lambda = mu = 25, nu = 1,
    # eps = 1e-4; mean reduction of invariance per row and of variance per dimension).
    from pytorch_metric_learning.losses import VICRegLoss

    g = torch.Generator().manual_seed(seed)
    za = torch.randn(m, d, generator=g, dtype=torch.float64)
    zb = 0.5 * za + 0.2 * torch.randn(m, d, generator=g, dtype=torch.float64)
    want = VICRegLoss()(za, ref_emb=zb)
    torch.testing.assert_close(vicreg_loss(za, zb), want, rtol=1e-10, atol=1e-12)


def test_terms_of_hand_made_vectors():
    # worked by hand: z_a = [[1, 0], [-1, 0]], z_b = [[1, 0], [1, 0]]
    # invariance = (0 + 0 + 4 + 0) / 4 = 1
    # variance: z_a dim 0 var 2 -> std ~1.414 (no penalty), dim 1 var 0 -> 1 - sqrt(1e-4)
    #   = 0.99; z_b both dims var 0 -> 0.99 each; (0.99 / 2 + 0.99) / 2 = 0.7425
    # covariance: z_a cov off-diagonal 0, z_b 0 -> 0
    za = torch.tensor([[1.0, 0.0], [-1.0, 0.0]], dtype=torch.float64)
    zb = torch.tensor([[1.0, 0.0], [1.0, 0.0]], dtype=torch.float64)
    t = vicreg_terms(za, zb)
    assert t.invariance.item() == pytest.approx(1.0)
    assert t.variance.item() == pytest.approx(0.7425, abs=1e-12)
    assert t.covariance.item() == pytest.approx(0.0)
    assert t.total().item() == pytest.approx(25 * 1.0 + 25 * 0.7425)


def test_errors():
    f = torch.zeros(2, 3, 2, 2)
    ok = torch.tensor([[0, 0, 0], [1, 1, 1]])
    with pytest.raises(ValueError, match=r"expected \(N, C, H, W\) maps"):
        gather_matched(f[0], f, ok)
    with pytest.raises(ValueError, match="features_b: expected 2 samples of 3 channels"):
        gather_matched(f, torch.zeros(2, 4, 2, 2), ok)
    with pytest.raises(ValueError, match=r"pairs: expected an int64 tensor of shape \(M, 3\)"):
        gather_matched(f, f, ok.float())
    with pytest.raises(ValueError, match="an index lies outside the maps"):
        gather_matched(f, f, torch.tensor([[0, 4, 0]]))
    with pytest.raises(ValueError, match="at least 2 matched vectors"):
        dense_vicreg_loss(f, f, ok[:1])
    with pytest.raises(ValueError, match="the same shape"):
        vicreg_terms(torch.zeros(3, 2), torch.zeros(3, 3))
