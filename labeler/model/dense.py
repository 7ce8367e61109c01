"""Dense self-supervised loss for segmentation: VICReg on feature cells that see the same ground.

A segmentation head reads every cell of the encoder's feature maps, so adaptation should
make the features of one patch of ground agree across views, cell by cell, not only the
pooled features of whole tiles. Two views of a tile (or of the same ground on two dates)
come with their geometry recorded (:mod:`labeler.model.views`), so we know exactly which
cell of view A sees the ground of which cell of view B. For those matched cells this
module computes the three VICReg terms (Bardes, Ponce & LeCun, "VICReg:
Variance-invariance-covariance regularization for self-supervised learning", ICLR 2022):

* invariance ``s(Z, Z') = mean_ij (Z_ij - Z'_ij)^2``: matched cells should agree;
* variance ``v(Z) = mean_j max(0, gamma - sqrt(Var(Z_:j) + eps))`` with ``gamma = 1``:
  every embedding dimension keeps a spread over the cells (no collapse to a constant);
* covariance ``c(Z) = sum_{i != j} C(Z)_ij^2 / D``: dimensions are decorrelated.

The loss is ``lambda s + mu (v(Z) + v(Z')) / 2 + nu (c(Z) + c(Z'))`` with
``lambda = mu = 25`` and ``nu = 1`` (the VICReg paper's coefficients; the variance term
averaged over the two branches as in its reference code and in pytorch-metric-learning's
``VICRegLoss``). ``Var`` and ``C`` use the ``n - 1`` denominator over all matched cells of
the batch. Applied to matched local vectors this is the local criterion of VICRegL
(Bardes, Ponce & LeCun, "VICRegL: Self-supervised learning of local visual features",
NeurIPS 2022), with its location-based matching; VICRegL also matches cells by nearest
features, left out here because our views give the exact correspondence.

Why VICRegL rather than DenseCL or PixPro.

* DenseCL (Wang et al., CVPR 2021) finds its dense positives by feature similarity
  (the most similar backbone cell in the other view), so it learns only what the network
  already matches, and it needs a MoCo queue of negatives and a momentum encoder. We
  have the true correspondence from the recorded geometry and from georeferencing.
* PixPro (Xie et al., CVPR 2021) uses geometric positives too, but learns against a
  momentum encoder through a pixel-propagation module: a second encoder copy and one
  more forward pass per step, expensive on a two-core CPU.
* VICReg terms need no negatives, no queue and no momentum encoder: one encoder, one
  forward pass per view. Its variance and covariance are taken over every matched
  cell of the batch, hundreds of vectors even for eight tiles, so small CPU batches are
  not starved of statistics the way a contrastive loss is starved of negatives.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

__all__ = [
    "VICREG_WEIGHTS",
    "VicregTerms",
    "vicreg_terms",
    "vicreg_loss",
    "gather_matched",
    "dense_vicreg_loss",
]

#: ``(lambda, mu, nu)``: weights of invariance, variance and covariance (VICReg paper).
VICREG_WEIGHTS = (25.0, 25.0, 1.0)


@dataclass(frozen=True)
class VicregTerms:
    """The three unweighted VICReg terms of a pair of embedding sets (scalar tensors).

    ``variance`` and ``covariance`` are each the sum over the two sets (the variance
    halved, see the module docstring).
    """

    invariance: torch.Tensor
    variance: torch.Tensor
    covariance: torch.Tensor

    def total(self, weights: tuple[float, float, float] = VICREG_WEIGHTS) -> torch.Tensor:
        """``lambda * invariance + mu * variance + nu * covariance``."""
        lam, mu, nu = weights
        return lam * self.invariance + mu * self.variance + nu * self.covariance


def _variance(z: torch.Tensor, eps: float) -> torch.Tensor:
    std = torch.sqrt(z.var(dim=0) + eps)
    return torch.relu(1.0 - std).mean()


def _covariance(z: torch.Tensor) -> torch.Tensor:
    n, d = z.shape
    centred = z - z.mean(dim=0)
    cov = (centred.T @ centred) / (n - 1)
    off = cov - torch.diag(torch.diagonal(cov))
    return off.pow(2).sum() / d


def vicreg_terms(z_a: torch.Tensor, z_b: torch.Tensor, *, eps: float = 1e-4) -> VicregTerms:
    """Invariance, variance and covariance terms of paired embeddings.

    Parameters
    ----------
    z_a, z_b : Tensor, shape (M, D)
        Row ``i`` of each is one positive pair (two views of the same ground).
    eps : float
        Added to the variance before the square root (keeps the gradient finite).

    Returns
    -------
    VicregTerms

    Raises
    ------
    ValueError
        If the shapes differ, are not 2-D or hold fewer than 2 rows (a variance needs
        two samples).
    """
    if z_a.dim() != 2 or z_a.shape != z_b.shape:
        raise ValueError(
            "z_a, z_b: expected two (M, D) matrices of the same shape, got "
            f"{tuple(z_a.shape)} and {tuple(z_b.shape)}"
        )
    if z_a.shape[0] < 2:
        raise ValueError(
            f"z_a: expected at least 2 matched vectors (variance and covariance need two), "
            f"got {z_a.shape[0]}; use views that overlap more or a larger batch"
        )
    invariance = (z_a - z_b).pow(2).mean()
    variance = (_variance(z_a, eps) + _variance(z_b, eps)) / 2.0
    covariance = _covariance(z_a) + _covariance(z_b)
    return VicregTerms(invariance, variance, covariance)


def vicreg_loss(
    z_a: torch.Tensor,
    z_b: torch.Tensor,
    *,
    weights: tuple[float, float, float] = VICREG_WEIGHTS,
    eps: float = 1e-4,
) -> torch.Tensor:
    """Weighted VICReg loss of paired embeddings ``(M, D)`` (see :func:`vicreg_terms`)."""
    return vicreg_terms(z_a, z_b, eps=eps).total(weights)


def gather_matched(
    features_a: torch.Tensor, features_b: torch.Tensor, pairs: torch.Tensor
) -> tuple[torch.Tensor, torch.Tensor]:
    """The feature vectors of matched cells, as two ``(M, C)`` matrices.

    Parameters
    ----------
    features_a : Tensor, shape (N, C, Ha, Wa)
        Dense embeddings of view A of each of ``N`` samples.
    features_b : Tensor, shape (N, C, Hb, Wb)
        Dense embeddings of view B.
    pairs : Tensor of int64, shape (M, 3)
        Rows ``(sample, cell_a, cell_b)``: cell ``cell_a = row * Wa + col`` of view A of
        ``sample`` sees the same ground as cell ``cell_b`` (flat index in the B grid).

    Returns
    -------
    z_a, z_b : Tensor, shape (M, C)

    Raises
    ------
    ValueError
        If the maps disagree in batch or channels, ``pairs`` is not ``(M, 3)`` integers,
        or an index lies outside its map.
    """
    if features_a.dim() != 4 or features_b.dim() != 4:
        raise ValueError(
            "features_a, features_b: expected (N, C, H, W) maps, got shapes "
            f"{tuple(features_a.shape)} and {tuple(features_b.shape)}"
        )
    n, c = features_a.shape[:2]
    if features_b.shape[:2] != (n, c):
        raise ValueError(
            f"features_b: expected {n} samples of {c} channels like features_a, got "
            f"{tuple(features_b.shape[:2])}"
        )
    if pairs.dim() != 2 or pairs.shape[1] != 3 or pairs.dtype != torch.int64:
        raise ValueError(
            f"pairs: expected an int64 tensor of shape (M, 3), got {pairs.dtype} "
            f"{tuple(pairs.shape)}; build it with labeler.model.views.cell_pairs"
        )
    cells_a = features_a.shape[2] * features_a.shape[3]
    cells_b = features_b.shape[2] * features_b.shape[3]
    if pairs.numel() and (
        int(pairs[:, 0].min()) < 0
        or int(pairs[:, 0].max()) >= n
        or int(pairs[:, 1].min()) < 0
        or int(pairs[:, 1].max()) >= cells_a
        or int(pairs[:, 2].min()) < 0
        or int(pairs[:, 2].max()) >= cells_b
    ):
        raise ValueError(
            f"pairs: an index lies outside the maps ({n} samples, {cells_a} cells in A, "
            f"{cells_b} in B); were the pairs made for another feature stride?"
        )
    flat_a = features_a.flatten(2)  # (N, C, Ha*Wa)
    flat_b = features_b.flatten(2)
    z_a = flat_a[pairs[:, 0], :, pairs[:, 1]]
    z_b = flat_b[pairs[:, 0], :, pairs[:, 2]]
    return z_a, z_b


def dense_vicreg_loss(
    features_a: torch.Tensor,
    features_b: torch.Tensor,
    pairs: torch.Tensor,
    *,
    weights: tuple[float, float, float] = VICREG_WEIGHTS,
    eps: float = 1e-4,
) -> torch.Tensor:
    """VICReg loss over the matched cells of two dense embedding maps.

    Parameters
    ----------
    features_a, features_b : Tensor, shapes (N, C, Ha, Wa) and (N, C, Hb, Wb)
        Dense embeddings (a projector's output on encoder features) of views A and B.
    pairs : Tensor of int64, shape (M, 3)
        Matched cells, see :func:`gather_matched`; ``M >= 2``.
    weights : (lambda, mu, nu)
        Weights of invariance, variance and covariance.
    eps : float
        Variance floor inside the square root.

    Returns
    -------
    loss : Tensor, scalar
    """
    z_a, z_b = gather_matched(features_a, features_b, pairs)
    return vicreg_loss(z_a, z_b, weights=weights, eps=eps)
