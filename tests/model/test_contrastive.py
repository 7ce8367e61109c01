"""NT-Xent against its closed form, a slow loop and pytorch-metric-learning's NTXentLoss."""

from __future__ import annotations

import math

import pytest
import torch

from labeler.model.contrastive import nt_xent_loss, nt_xent_per_anchor


def test_analytic_value_identical_positives_orthogonal_negatives():
    # Closed form (notes of the SimCLR loss, Chen et al. ICML 2020): with identical
    # positives (cosine 1) and orthogonal negatives (cosine 0), N = 2, tau = 0.5, each
    # anchor has l = -log(e^2 / (e^2 + 2)) = log(1 + 2 e^-2) = 0.239545.
    e1 = torch.tensor([[1.0, 0.0, 0.0]], dtype=torch.float64)
    e2 = torch.tensor([[0.0, 3.0, 0.0]], dtype=torch.float64)  # length does not matter
    z = torch.cat([e1, e2])
    loss = nt_xent_loss(z, z.clone(), temperature=0.5)
    assert loss.item() == pytest.approx(0.239545, abs=5e-7)
    assert loss.item() == pytest.approx(math.log(1 + 2 * math.exp(-2)), rel=1e-12)


def _nt_xent_loop(z_a: torch.Tensor, z_b: torch.Tensor, tau: float) -> list[float]:
    """Slow reference: the SimCLR formula anchor by anchor."""
    z = torch.cat([z_a, z_b]).tolist()
    n = len(z) // 2

    def cos(u, v):
        dot = sum(a * b for a, b in zip(u, v, strict=True))
        return dot / math.sqrt(sum(a * a for a in u) * sum(b * b for b in v))

    out = []
    for i in range(2 * n):
        p = i + n if i < n else i - n
        num = math.exp(cos(z[i], z[p]) / tau)
        den = sum(math.exp(cos(z[i], z[k]) / tau) for k in range(2 * n) if k != i)
        out.append(-math.log(num / den))
    return out


@pytest.mark.parametrize("tau", [0.1, 0.5, 1.0])
def test_per_anchor_against_a_loop(tau):
    g = torch.Generator().manual_seed(7)
    z_a = torch.randn(5, 4, generator=g, dtype=torch.float64)
    z_b = torch.randn(5, 4, generator=g, dtype=torch.float64)
    got = nt_xent_per_anchor(z_a, z_b, temperature=tau)
    want = torch.tensor(_nt_xent_loop(z_a, z_b, tau), dtype=torch.float64)
    torch.testing.assert_close(got, want, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize(
    ("n", "d", "tau", "seed"), [(2, 3, 0.5, 0), (8, 16, 0.1, 1), (16, 32, 0.5, 2)]
)
def test_against_pytorch_metric_learning(n, d, tau, seed):
    # Oracle: pytorch-metric-learning's NTXentLoss (a registry library, dev extra). Given
    # 2N embeddings with labels i and i for the two views of pair i, it averages
    # -log(exp(s_p / tau) / (exp(s_p / tau) + sum_neg exp(s_n / tau))) over the 2N
    # positive pairs, with cosine similarity: the SimCLR loss when each anchor has one positive.
    from pytorch_metric_learning.losses import NTXentLoss

    g = torch.Generator().manual_seed(seed)
    z_a = torch.randn(n, d, generator=g, dtype=torch.float64)
    z_b = z_a + 0.5 * torch.randn(n, d, generator=g, dtype=torch.float64)
    labels = torch.cat([torch.arange(n), torch.arange(n)])
    want = NTXentLoss(temperature=tau)(torch.cat([z_a, z_b]), labels)
    got = nt_xent_loss(z_a, z_b, temperature=tau)
    torch.testing.assert_close(got, want, rtol=1e-9, atol=1e-12)


def test_random_embeddings_near_log_of_negatives_plus_one():
    # common practice, no source: orthogonal-ish embeddings give uniform softmax rows,
    # so the loss is close to log(2N - 1)
    g = torch.Generator().manual_seed(3)
    z_a = torch.randn(8, 4096, generator=g, dtype=torch.float64)
    z_b = torch.randn(8, 4096, generator=g, dtype=torch.float64)
    assert nt_xent_loss(z_a, z_b).item() == pytest.approx(math.log(15), abs=0.02)


def test_gradient_pulls_positives_together():
    g = torch.Generator().manual_seed(4)
    z_a = torch.randn(4, 8, generator=g, requires_grad=True)
    z_b = torch.randn(4, 8, generator=g)
    before = nt_xent_loss(z_a, z_b)
    before.backward()
    with torch.no_grad():
        after = nt_xent_loss(z_a - 0.5 * z_a.grad, z_b)
    assert after < before


def test_errors():
    z = torch.zeros(3, 4)
    with pytest.raises(ValueError, match=r"expected two \(N, D\) embedding matrices"):
        nt_xent_loss(z[0], z[0])
    with pytest.raises(ValueError, match="expected the same shape"):
        nt_xent_loss(z, z[:2])
    with pytest.raises(ValueError, match="at least 2 pairs"):
        nt_xent_loss(z[:1], z[:1])
    with pytest.raises(ValueError, match="temperature: expected a positive number"):
        nt_xent_loss(z, z, temperature=0.0)
