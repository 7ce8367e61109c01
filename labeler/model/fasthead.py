"""The proposal head as ``propose_tiles`` runs it: the same arithmetic, faster on a CPU.

:class:`ProposalHead` is written for training (one module, float32, the refinement's
two inputs concatenated). At inference the same weights can run cheaper:

- in bfloat16 (``precision="bfloat16"``): the feature pyramid and the refinement's
  convolutions run in bfloat16 on a copy of the head (CPUs with AVX512-BF16 or AMX do
  this at about twice the float32 rate); the stride-4 trunk features come back to float32
  before the classifier, so the MC-dropout passes, the probabilities and every
  uncertainty map are computed in float32 as before, and the refined logits are the
  float32 bilinear logits plus the correction cast to float32;
- the refinement's fusing convolution over ``[fine, coarse]`` is applied as two
  convolutions, one per half of its input channels, summed (a convolution is linear in
  its input channels, so this is the same sum in another order; no concatenated copy);
- the refinement's input (:func:`labeler.model.refine.pixel_input`) is made in one pass
  from the uint8 tiles into a channels-last buffer (:func:`pixel_input_nhwc`), and the
  depth-to-space step is one copy out of channels-last memory.

In float32 the results equal :meth:`ProposalHead.trunk` and :meth:`ProposalHead.refine`
to float rounding (``tests/model/test_fasthead.py``). bfloat16 keeps 8 bits of mantissa;
measured on the demo plots and the peanut photos its masks stay within 0.005 mIoU of
float32 (README, "Measured").
"""

from __future__ import annotations

import copy
from collections.abc import Sequence

import numpy as np
import torch
import torch.nn.functional as F

from labeler.model.head import ProposalHead

__all__ = ["FastHead", "pixel_input_nhwc", "levels_from_features", "HEAD_PRECISIONS"]

#: Arithmetic the head's convolutions may run in.
HEAD_PRECISIONS = ("float32", "bfloat16")

_DTYPES = {"float32": torch.float32, "bfloat16": torch.bfloat16}


def pixel_input_nhwc(
    images: np.ndarray, *, exr_coefficient: float = 1.4, dtype: torch.dtype = torch.float32
) -> torch.Tensor:
    """:func:`labeler.model.refine.pixel_input` of uint8 tiles, made in one pass.

    Parameters
    ----------
    images : ndarray, shape (N, H, W, 3), uint8
        RGB tiles.
    exr_coefficient : float
        Coefficient of ExR = c r - g (the refinement's setting).
    dtype : torch.dtype
        Type of the result (the arithmetic is float32 either way).

    Returns
    -------
    Tensor, shape (N, 4, H, W), channels-last
        ``(RGB - 127) / 128`` and ExG - ExR with chromatic coordinates ``c = RGB / (R + G
        + B)`` (0 for black pixels).

    Raises
    ------
    ValueError
        For another shape or dtype.
    """
    a = np.asarray(images)
    if a.ndim != 4 or a.shape[-1] != 3 or a.dtype != np.uint8:
        raise ValueError(
            f"images: expected uint8 RGB tiles of shape (N, H, W, 3), got {a.dtype} {a.shape}"
        )
    rgb = torch.from_numpy(np.ascontiguousarray(a)).to(torch.float32)  # (N, H, W, 3)
    out = torch.empty((*a.shape[:3], 4), dtype=torch.float32)
    torch.mul(rgb, 1.0 / 128.0, out=out[..., :3]).sub_(127.0 / 128.0)
    total = rgb.sum(dim=-1)
    inv = torch.where(total > 0, total, torch.ones_like(total)).reciprocal_()
    r, g, b = rgb[..., 0], rgb[..., 1], rgb[..., 2]
    # (2g - r - b) - (c r - g) = 3g - (1 + c) r - b, on chromatic coordinates
    exg = (3.0 * g - (1.0 + exr_coefficient) * r - b).mul_(inv)
    out[..., 3] = exg
    return out.to(dtype).permute(0, 3, 1, 2)


def levels_from_features(
    features: Sequence[Sequence[np.ndarray]], *, dtype: torch.dtype = torch.float32
) -> list[torch.Tensor]:
    """Four channels-last batches ``(N, C_i, h_i, w_i)`` of ``dtype`` from per-tile features.

    As :func:`labeler.model.head.features_to_tensors` (which it equals for float32), but
    converting straight into ``dtype``. All tiles must have equal level shapes.
    """
    levels = []
    for lvl in range(4):
        c, h, w = np.shape(features[0][lvl])
        out = torch.empty((len(features), h, w, c), dtype=dtype)
        for n, f in enumerate(features):
            part = (
                f[lvl] if isinstance(f[lvl], torch.Tensor) else torch.from_numpy(np.asarray(f[lvl]))
            )
            out[n].copy_(part.permute(1, 2, 0))
        levels.append(out.permute(0, 3, 1, 2))
    return levels


class FastHead:
    """Inference of a :class:`ProposalHead` in ``precision``; see the module docstring.

    Parameters
    ----------
    head : ProposalHead
        The trained head (float32; left unchanged).
    precision : {"float32", "bfloat16"}
        Arithmetic of the pyramid and of the refinement's convolutions.

    Raises
    ------
    ValueError
        For another precision.
    """

    def __init__(self, head: ProposalHead, *, precision: str = "float32") -> None:
        if precision not in HEAD_PRECISIONS:
            raise ValueError(f"precision: expected 'float32' or 'bfloat16', got {precision!r}")
        self.head = head.eval()
        self.precision = precision
        self.dtype = _DTYPES[precision]
        self.low = head if precision == "float32" else copy.deepcopy(head).to(self.dtype).eval()
        refiner = self.low.refiner
        self._fuse_split = None
        if refiner is not None:
            c = refiner.config.channels
            w = refiner.fuse.weight
            self._fuse_split = (
                w[:, :c].contiguous(memory_format=torch.channels_last),
                w[:, c:].contiguous(memory_format=torch.channels_last),
            )

    def trunk(self, levels: Sequence[torch.Tensor]) -> tuple[torch.Tensor, torch.Tensor]:
        """The trunk features ``(N, width, h4, w4)``: in ``precision`` and in float32.

        ``levels`` are in ``precision`` (:func:`levels_from_features`).
        """
        z = self.low.trunk(levels)
        return z, (z if z.dtype == torch.float32 else z.to(torch.float32))

    def refine(self, z_low: torch.Tensor, z32: torch.Tensor, images: np.ndarray) -> torch.Tensor:
        """Refined float32 logits ``(N, K, H, W)``, as :meth:`ProposalHead.refine`.

        Parameters
        ----------
        z_low, z32 : Tensor
            :meth:`trunk` of the tiles.
        images : ndarray, shape (N, H, W, 3), uint8
            The tiles' pixels.

        Raises
        ------
        ValueError
            If the head has no refinement.
        """
        r = self.low.refiner
        if r is None or self._fuse_split is None:
            raise ValueError(
                "head: this head has no refinement (config.refine_channels = 0); "
                "propose without pixels or train a head with refine_channels > 0"
            )
        height, width = images.shape[1:3]
        x = pixel_input_nhwc(images, exr_coefficient=r.config.exr_coefficient, dtype=self.dtype)
        fine = F.relu(r.fine(x))
        coarse = F.relu(r.coarse(z_low))
        coarse = F.interpolate(coarse, size=fine.shape[-2:], mode="bilinear", align_corners=False)
        w_fine, w_coarse = self._fuse_split
        y = F.conv2d(fine, w_fine, r.fuse.bias, padding=1)
        y = y.add_(F.conv2d(coarse, w_coarse, None, padding=1)).relu_()
        corr = _depth_to_space(r.out(y))[:, :, :height, :width]
        base = self.head.classifier(z32)
        up = F.interpolate(base, size=(height, width), mode="bilinear", align_corners=False)
        return up.add_(corr)  # float32 += the correction (bfloat16 promotes exactly)


def _depth_to_space(x: torch.Tensor, factor: int = 2) -> torch.Tensor:
    """``F.pixel_shuffle(x, factor)`` as one copy from channels-last memory.

    ``x`` is ``(N, K * f * f, h, w)``; channel ``k f^2 + i f + j`` of cell ``(y, x)``
    goes to pixel ``(f y + i, f x + j)`` of class ``k``. The result is contiguous
    ``(N, K, f h, f w)``.
    """
    n, c, h, w = x.shape
    k = c // (factor * factor)
    cells = x.permute(0, 2, 3, 1).reshape(n, h, w, k, factor, factor)
    return cells.permute(0, 3, 1, 4, 2, 5).reshape(n, k, h * factor, w * factor)
