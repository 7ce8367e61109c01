"""Element-wise dropout whose random mask is drawn from 15-bit integers.

``torch.nn.Dropout`` draws one Bernoulli variable per element, which on the CPU costs
about as much as the head's whole classifier: for a training batch of four tiles
(48 x 64 x 64 values each) it took 8 to 10 ms of a 50 ms optimiser step on the
development machine. :class:`ElementDropout` does the same thing from uniform 15-bit
integers (``Tensor.random_`` on ``int16`` fills 0..32767): an element is kept when its
integer is at least ``round(p * 32768)``, and kept elements are scaled by
``1 / (1 - p')``, where ``p' = round(p * 32768) / 32768`` is the probability actually
used (within 1.6e-5 of ``p``), so the expected output equals the input, as in
Srivastava et al. 2014, "Dropout: a simple way to prevent neural networks from
overfitting", JMLR 15. In evaluation mode it is the identity. The integers come from
torch's global generator: seeded runs repeat.
"""

from __future__ import annotations

import torch
from torch import nn

__all__ = ["ElementDropout", "LEVELS", "drop_threshold"]

#: Values a 15-bit integer takes.
LEVELS = 32768


def drop_threshold(p: float) -> int:
    """The integer below which an element is dropped: ``round(p * 32768)``.

    Raises
    ------
    ValueError
        If ``p`` is not in ``[0, 1)``.
    """
    if not 0.0 <= p < 1.0:
        raise ValueError(f"p: expected a dropout probability in [0, 1), got {p}")
    return round(p * LEVELS)


class ElementDropout(nn.Module):
    """Drop each element with probability ``p`` while training (module docstring).

    Parameters
    ----------
    p : float
        Dropout probability, in ``[0, 1)``.
    """

    def __init__(self, p: float = 0.5) -> None:
        super().__init__()
        self.threshold = drop_threshold(p)
        self.p = p

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """``x`` unchanged in evaluation mode; else each element zeroed or scaled."""
        if not self.training or self.threshold == 0:
            return x
        bits = torch.empty_like(x, dtype=torch.int16).random_()
        scale = LEVELS / (LEVELS - self.threshold)
        return x * ((bits >= self.threshold).to(x.dtype) * scale)

    def extra_repr(self) -> str:
        return f"p={self.p}"
