"""Image-level contrastive loss for self-supervised adaptation: NT-Xent.

SimCLR's normalised temperature-scaled cross-entropy (Chen, Kornblith, Norouzi & Hinton,
"A simple framework for contrastive learning of visual representations", ICML 2020).
A batch holds ``N`` positive pairs ``(z_a[i], z_b[i])``: two views of one tile, or the
same ground seen on two dates. The ``2N`` embeddings are compared by cosine similarity
``sim(u, v) = u . v / (|u| |v|)``; for each of them, the other member of its pair is the
positive and the remaining ``2N - 2`` embeddings are the negatives:

.. math::

    \\ell_{i} = -\\log \\frac{\\exp(\\mathrm{sim}(z_i, z_{p(i)}) / \\tau)}
                          {\\sum_{k \\ne i} \\exp(\\mathrm{sim}(z_i, z_k) / \\tau)}

and the loss is the mean of ``l_i`` over all ``2N`` anchors. With identical positives
and orthogonal negatives, ``N = 2`` and ``tau = 0.5``, every anchor has
``l = log(1 + 2 exp(-2)) = 0.239545``.

Why NT-Xent and not BYOL (Grill et al., NeurIPS 2020) for the image-level term. BYOL
needs no negatives and so tolerates small batches better, but it trains against a
second, momentum-averaged copy of the encoder: one more forward pass per step and a
second set of weights in memory; a gradient-free forward pass costs roughly a third of
a training step, so a fixed budget on a two-core CPU makes about a quarter fewer steps. Here the dense loss (:mod:`labeler.model.dense`) is already free of
negatives (its variance and covariance terms are taken over every matched feature cell
of the batch, hundreds of vectors even for a batch of eight tiles), so the image-level
term can stay the simpler one, which also has a closed-form check and a reference
implementation to test against. With small batches use a larger temperature (SimCLR
uses 0.1 to 0.5; 0.5 suits batches of a few dozen views).
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

__all__ = ["DEFAULT_TEMPERATURE", "nt_xent_loss", "nt_xent_per_anchor"]

#: Temperature for small CPU batches (the upper end of the range SimCLR reports).
DEFAULT_TEMPERATURE = 0.5


def _check_pairs(z_a: torch.Tensor, z_b: torch.Tensor, temperature: float) -> None:
    if z_a.dim() != 2 or z_b.dim() != 2:
        raise ValueError(
            "z_a, z_b: expected two (N, D) embedding matrices, got shapes "
            f"{tuple(z_a.shape)} and {tuple(z_b.shape)}; flatten or pool feature maps first"
        )
    if z_a.shape != z_b.shape:
        raise ValueError(
            f"z_a, z_b: expected the same shape (row i of each is one positive pair), got "
            f"{tuple(z_a.shape)} and {tuple(z_b.shape)}"
        )
    if z_a.shape[0] < 2:
        raise ValueError(
            f"z_a: expected at least 2 pairs (the other pairs are the negatives), got "
            f"{z_a.shape[0]}; use a batch of 2 tiles or more"
        )
    if not temperature > 0:
        raise ValueError(f"temperature: expected a positive number, got {temperature}")


def nt_xent_per_anchor(
    z_a: torch.Tensor, z_b: torch.Tensor, *, temperature: float = DEFAULT_TEMPERATURE
) -> torch.Tensor:
    """NT-Xent loss of each of the ``2N`` anchors.

    Parameters
    ----------
    z_a, z_b : Tensor, shape (N, D)
        Embeddings of the two views; row ``i`` of each is a positive pair. They need not
        be normalised (the similarity is the cosine).
    temperature : float
        ``tau`` > 0.

    Returns
    -------
    losses : Tensor, shape (2N,)
        Anchors ``0 .. N-1`` are the rows of ``z_a``, ``N .. 2N-1`` those of ``z_b``.

    Raises
    ------
    ValueError
        If the shapes differ, are not 2-D, hold fewer than two pairs, or ``temperature``
        is not positive.
    """
    _check_pairs(z_a, z_b, temperature)
    n = z_a.shape[0]
    z = F.normalize(torch.cat([z_a, z_b], dim=0), dim=1)
    logits = (z @ z.T) / temperature
    # an anchor is never its own negative: drop the diagonal from the softmax
    logits = logits.masked_fill(torch.eye(2 * n, dtype=torch.bool, device=z.device), -torch.inf)
    partner = torch.cat([torch.arange(n, 2 * n), torch.arange(0, n)]).to(z.device)
    return F.cross_entropy(logits, partner, reduction="none")


def nt_xent_loss(
    z_a: torch.Tensor, z_b: torch.Tensor, *, temperature: float = DEFAULT_TEMPERATURE
) -> torch.Tensor:
    """Mean NT-Xent loss over the ``2N`` anchors of ``N`` positive pairs.

    Parameters
    ----------
    z_a, z_b : Tensor, shape (N, D)
        Embeddings of the two views (row ``i`` of each is one pair).
    temperature : float
        ``tau`` > 0; :data:`DEFAULT_TEMPERATURE` (0.5) by default.

    Returns
    -------
    loss : Tensor, scalar
        Between 0 (each anchor certain of its partner) and larger values; for random
        embeddings about ``log(2N - 1)``.

    See Also
    --------
    nt_xent_per_anchor : the loss of each anchor.
    """
    return nt_xent_per_anchor(z_a, z_b, temperature=temperature).mean()
